//! The mapping of a delimited export's columns: where each mapped column is in one export's
//! header, how speed and the amount of grain are read, and the units' factors to SI.

use super::IngestError;
use crate::ingest::settings::IngestConfig;
use crate::ingest::settings::{FlowUnit, SpeedUnit, TimeFormat, WidthUnit, YieldBasis};

/// Positions of the mapped columns in one export's header.
pub(super) struct ColumnIndex {
    /// None: `columns.time.format = "none"` (a yield-point export without times).
    pub(super) time: Option<usize>,
    /// The date column of a time-of-day stamp.
    pub(super) date: Option<usize>,
    pub(super) lon: usize,
    pub(super) lat: usize,
    /// The flow or yield column.
    pub(super) flow: usize,
    pub(super) amount: Amount,
    pub(super) motion: Motion,
    /// None: the fixed `columns.width.value`.
    pub(super) width: Option<usize>,
    /// None: a yield-point export without moisture.
    pub(super) moisture: Option<usize>,
    /// Optional columns: (index, name) when mapped.
    pub(super) optional: [Option<(usize, String)>; 4],
    /// Treatment, strip and replicate label columns when mapped (strip trials without
    /// plot polygons).
    pub(super) labels: [Option<usize>; 3],
}

/// How ground speed is read.
pub(super) enum Motion {
    /// A speed column and its factor to m/s.
    Speed(usize, f64),
    /// Distance per record (column, or fixed value in m) and its factor to metres; the
    /// record's interval from a column or from the time since the previous record.
    Distance {
        col: Option<usize>,
        fixed_m: f64,
        factor: f64,
        interval: Option<usize>,
    },
    /// Not logged: derived from positions and times where the export has times (see
    /// [`super::speed_from_positions`]), else unknown (a yield-point export without times).
    Unknown,
}

/// What the export measures of the grain: mass flow, or the yield itself.
pub(super) enum Amount {
    /// Mass flow and its factor to kg/s.
    Flow(f64),
    /// Yield and its factor to kg/ha; `wet`: at harvest moisture (standardised with the
    /// moisture column), else at the crop's standard moisture.
    Yield { per_unit: f64, wet: bool },
}

pub(super) fn column_index(
    cfg: &IngestConfig,
    header: &csv::StringRecord,
    file: &str,
) -> Result<ColumnIndex, IngestError> {
    let c = &cfg.columns;
    let find = |name: &str, key: &str| -> Result<usize, IngestError> {
        header
            .iter()
            .position(|h| h.trim() == name)
            .ok_or_else(|| IngestError::MissingColumn {
                file: file.to_string(),
                column: name.to_string(),
                key: key.to_string(),
                found: header.iter().collect::<Vec<_>>().join(", "),
            })
    };
    let opt = |name: &str, key: &str| -> Result<Option<usize>, IngestError> {
        if name.is_empty() {
            Ok(None)
        } else {
            find(name, key).map(Some)
        }
    };
    // Looked up in the order of the mapping, so a header that fits nothing names the time.
    let (time, date) = (
        if c.time.format == TimeFormat::None {
            None
        } else {
            Some(find(&c.time.name, "time.name")?)
        },
        opt(&c.time.date, "time.date")?,
    );
    let (lon, lat) = (
        find(&c.longitude, "longitude")?,
        find(&c.latitude, "latitude")?,
    );
    let (flow, amount) = match &c.yield_col {
        Some(y) => (
            find(&y.name, "yield.name")?,
            Amount::Yield {
                per_unit: y.unit.kg_ha_per_unit(cfg.bushel_lb()),
                wet: y.basis == YieldBasis::Wet,
            },
        ),
        None => (
            find(&c.flow.name, "flow.name")?,
            Amount::Flow(flow_factor(c.flow.unit)),
        ),
    };
    let motion = match (&c.speed, &c.distance) {
        (Some(sp), _) => Motion::Speed(find(&sp.name, "speed.name")?, speed_factor(sp.unit)),
        (None, Some(d)) => Motion::Distance {
            col: opt(&d.name, "distance.name")?,
            fixed_m: d.value.unwrap_or(f64::NAN) * width_factor(d.unit),
            factor: width_factor(d.unit),
            interval: opt(&c.interval, "interval")?,
        },
        // Without speed or distance: speed from positions and times (a flow export needs
        // it for its yields; validation refuses a flow export without times).
        (None, None) => Motion::Unknown,
    };
    Ok(ColumnIndex {
        time,
        date,
        lon,
        lat,
        flow,
        amount,
        motion,
        width: opt(&c.width.name, "width.name")?,
        moisture: opt(&c.moisture, "moisture")?,
        optional: [
            (&c.work_state, "work_state"),
            (&c.hdop, "hdop"),
            (&c.fix_quality, "fix_quality"),
            (
                c.applied_rate
                    .as_ref()
                    .map(|a| &a.name)
                    .unwrap_or(&String::new()),
                "applied_rate.name",
            ),
        ]
        .map(|(name, key)| opt(name, key).map(|i| i.map(|i| (i, name.clone()))))
        .into_iter()
        .collect::<Result<Vec<_>, _>>()?
        .try_into()
        .expect("four optional columns"),
        labels: [
            opt(&c.treatment, "treatment")?,
            opt(&c.strip, "strip")?,
            opt(&c.replicate, "replicate")?,
        ],
    })
}

/// Conversion factors to SI (exact by definition of the units).
fn flow_factor(u: FlowUnit) -> f64 {
    match u {
        FlowUnit::KgS => 1.0,
        FlowUnit::LbS => 0.45359237,
    }
}
fn speed_factor(u: SpeedUnit) -> f64 {
    match u {
        SpeedUnit::MS => 1.0,
        SpeedUnit::KmH => 1.0 / 3.6,
        SpeedUnit::Mph => 0.44704,
    }
}
pub(crate) fn width_factor(u: WidthUnit) -> f64 {
    match u {
        WidthUnit::M => 1.0,
        WidthUnit::Ft => 0.3048,
        WidthUnit::In => 0.0254,
    }
}

/// The CRS of the coordinate columns (None: WGS84 lon/lat).
pub(super) fn input_crs(cfg: &IngestConfig) -> Result<Option<crate::projection::Crs>, String> {
    if cfg.inputs.crs.is_empty() {
        return Ok(None);
    }
    crate::projection::Crs::parse(&cfg.inputs.crs)
        .map(|c| (c.code() != 4326).then_some(c))
        .map_err(|e| format!("inputs.crs: {e}"))
}

/// A number as the export writes it (a decimal comma when `comma`); finite only.
pub(super) fn number(text: &str, comma: bool) -> Option<f64> {
    let t = text.trim();
    let v = if comma {
        t.replace(',', ".").parse::<f64>().ok()
    } else {
        t.parse::<f64>().ok()
    };
    v.filter(|v| v.is_finite())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn unit_factors_are_exact_definitions() {
        assert_eq!(flow_factor(FlowUnit::LbS), 0.45359237);
        assert_eq!(speed_factor(SpeedUnit::Mph), 0.44704);
        assert!((speed_factor(SpeedUnit::KmH) * 3.6 - 1.0).abs() < 1e-15);
        assert_eq!(width_factor(WidthUnit::Ft), 0.3048);
    }
}
