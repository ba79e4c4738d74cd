//! The mapped delimited-text format: one record per line, columns named and scaled by the
//! trial file's `[columns]` (time as ISO 8601 or Unix seconds; WGS84 lon/lat; mass flow,
//! speed and swath width with their units; moisture in %; optional work state, HDOP and fix
//! quality). Every bad record becomes a rejection row naming its line and column:
//! `unreadable_row`, `wrong_field_count`, `unparseable`, `coordinate_range`, `no_position`,
//! `negative_value`.

use super::{reject, unreadable_row, ExportRead, MonitorFormat, RawPoint};
use crate::ingest::settings::IngestConfig;
use crate::ingest::settings::{FlowUnit, SpeedUnit, TimeFormat, WidthUnit, YieldBasis};
use crate::ingest::time::parse_date_time;
use crate::ingest::{parse_iso8601, IngestError};
use std::path::Path;

/// The mapped delimited-text reader.
pub struct MappedText;

/// Positions of the mapped columns in one export's header.
struct ColumnIndex {
    /// None: `columns.time.format = "none"` (a yield-point export without times).
    time: Option<usize>,
    /// The date column of a time-of-day stamp.
    date: Option<usize>,
    lon: usize,
    lat: usize,
    /// The flow or yield column.
    flow: usize,
    amount: Amount,
    motion: Motion,
    /// None: the fixed `columns.width.value`.
    width: Option<usize>,
    /// None: a yield-point export without moisture.
    moisture: Option<usize>,
    /// Optional columns: (index, name) when mapped.
    optional: [Option<(usize, String)>; 3],
    /// Treatment, strip and replicate label columns when mapped (strip trials without
    /// plot polygons).
    labels: [Option<usize>; 3],
}

/// How ground speed is read.
enum Motion {
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
enum Amount {
    /// Mass flow and its factor to kg/s.
    Flow(f64),
    /// Yield and its factor to kg/ha; `wet`: at harvest moisture (standardised with the
    /// moisture column), else at the crop's standard moisture.
    Yield { per_unit: f64, wet: bool },
}

fn column_index(
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
        ]
        .map(|(name, key)| opt(name, key).map(|i| i.map(|i| (i, name.clone()))))
        .into_iter()
        .collect::<Result<Vec<_>, _>>()?
        .try_into()
        .expect("three optional columns"),
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
fn input_crs(cfg: &IngestConfig) -> Result<Option<crate::projection::Crs>, String> {
    if cfg.inputs.crs.is_empty() {
        return Ok(None);
    }
    crate::projection::Crs::parse(&cfg.inputs.crs)
        .map(|c| (c.code() != 4326).then_some(c))
        .map_err(|e| format!("inputs.crs: {e}"))
}

/// A number as the export writes it (a decimal comma when `comma`); finite only.
fn number(text: &str, comma: bool) -> Option<f64> {
    let t = text.trim();
    let v = if comma {
        t.replace(',', ".").parse::<f64>().ok()
    } else {
        t.parse::<f64>().ok()
    };
    v.filter(|v| v.is_finite())
}

/// Read one export: good rows to points, unreadable ones to rejections.
fn read_export(
    cfg: &IngestConfig,
    path: &Path,
    name: &str,
    file_idx: u32,
) -> Result<ExportRead, IngestError> {
    let delim = cfg.columns.delimiter.as_bytes()[0];
    let (rdr, header) = crate::ingest::open_table(path, name, delim)?;
    read_records(cfg, rdr, header, name, file_idx)
}

/// Read the records of a delimited table already opened (for formats that hand their records
/// to this reader as a table: the mapping, units and checks are this format's).
pub(super) fn read_records<R: std::io::Read>(
    cfg: &IngestConfig,
    mut rdr: csv::Reader<R>,
    header: csv::StringRecord,
    name: &str,
    file_idx: u32,
) -> Result<ExportRead, IngestError> {
    let mut out = Vec::new();
    let mut rej = Vec::new();
    if header.is_empty() || (header.len() == 1 && header[0].trim().is_empty()) {
        return Err(IngestError::Unusable {
            file: name.to_string(),
            message: "empty file: no header line".into(),
        });
    }
    let idx = column_index(cfg, &header, name)?;
    let c = &cfg.columns;
    let comma = c.decimal == ",";
    let crs = input_crs(cfg).map_err(|message| IngestError::Unusable {
        file: name.to_string(),
        message,
    })?;
    let wf = width_factor(c.width.unit);
    let standard = cfg.standard_moisture_pct();
    let amount_name = match &c.yield_col {
        Some(y) => y.name.as_str(),
        None => c.flow.name.as_str(),
    };
    let fixed_width = c.width.value.unwrap_or(f64::NAN) * wf;
    let speed_name = c.speed.as_ref().map(|s| s.name.as_str()).unwrap_or("");
    let distance_name = c.distance.as_ref().map(|s| s.name.as_str()).unwrap_or("");
    // Columns read as numbers: (index, name); the motion and width columns when mapped.
    let mut cols = vec![
        (idx.lon, c.longitude.as_str()),
        (idx.lat, c.latitude.as_str()),
        (idx.flow, amount_name),
    ];
    if let Some(i) = idx.moisture {
        cols.push((i, c.moisture.as_str()));
    }
    match &idx.motion {
        Motion::Speed(i, _) => cols.push((*i, speed_name)),
        Motion::Distance { col, interval, .. } => {
            if let Some(i) = col {
                cols.push((*i, distance_name));
            }
            if let Some(i) = interval {
                cols.push((*i, c.interval.as_str()));
            }
        }
        Motion::Unknown => {}
    }
    if let Some(i) = idx.width {
        cols.push((i, c.width.name.as_str()));
    }
    // Label texts (treatment, strip, replicate) -> index into `labels` (0: no treatment).
    let mut labels: Vec<[String; 3]> = vec![Default::default()];
    let mut label_of: std::collections::HashMap<[String; 3], u32> = Default::default();
    // Per point kept: the distance travelled (m) and interval (s, NaN: from the times).
    let mut travel: Vec<(f64, f64)> = Vec::new();
    let mut n = 0u64;
    // Moisture read 0 is no reading: the last reading before it stands (counted).
    let mut zeros = super::ZeroMoisture {
        source: name.to_string(),
        ..Default::default()
    };
    let mut last_moisture = f64::NAN;
    let mut record = csv::StringRecord::new();
    let mut vals = vec![0.0f64; cols.len()];
    loop {
        let line_hint = rdr.position().line() + 1;
        match rdr.read_record(&mut record) {
            Ok(false) => break,
            Ok(true) => {}
            Err(e) => {
                n += 1;
                let line = e.position().map(|p| p.line()).unwrap_or(line_hint);
                rej.push(unreadable_row(name, line, &e));
                continue;
            }
        }
        n += 1;
        let line = record.position().map(|p| p.line()).unwrap_or(line_hint);
        if record.len() != header.len() {
            rej.push(reject(
                name,
                line,
                "wrong_field_count",
                "",
                &format!("{} fields", record.len()),
                &format!("{} fields", header.len()),
            ));
            continue;
        }
        let t = idx.time.map_or("", |i| &record[i]);
        let time_s = match c.time.format {
            TimeFormat::None => Some(f64::NAN),
            TimeFormat::Iso8601 => parse_iso8601(t),
            TimeFormat::UnixS => number(t, comma),
            TimeFormat::TimeOfDay => match (idx.date, c.time.date_order) {
                (Some(d), Some(order)) => parse_date_time(&record[d], t, order),
                _ => None,
            },
        };
        let Some(time_s) = time_s else {
            let want = match c.time.format {
                TimeFormat::None => "",
                TimeFormat::Iso8601 => "an ISO 8601 date-time",
                TimeFormat::UnixS => "seconds since 1970",
                TimeFormat::TimeOfDay => "a date and an hh:mm:ss time of day",
            };
            let shown = match idx.date {
                Some(d) => format!("{} {t}", &record[d]),
                None => t.to_string(),
            };
            rej.push(reject(
                name,
                line,
                "unparseable",
                &c.time.name,
                &shown,
                want,
            ));
            continue;
        };
        let mut bad = None;
        for (k, (ci, cname)) in cols.iter().enumerate() {
            match number(&record[*ci], comma) {
                Some(v) => vals[k] = v,
                None => {
                    bad = Some((*cname, record[*ci].to_string()));
                    break;
                }
            }
        }
        if let Some((cname, text)) = bad {
            rej.push(reject(name, line, "unparseable", cname, &text, "a number"));
            continue;
        }
        let mut optional = [f64::NAN; 3];
        for (k, o) in idx.optional.iter().enumerate() {
            if let Some((ci, cname)) = o {
                match number(&record[*ci], comma) {
                    Some(v) => optional[k] = v,
                    None => {
                        bad = Some((cname.as_str(), record[*ci].to_string()));
                        break;
                    }
                }
            }
        }
        if let Some((cname, text)) = bad {
            rej.push(reject(name, line, "unparseable", cname, &text, "a number"));
            continue;
        }
        let (lon, lat, amount) = (vals[0], vals[1], vals[2]);
        let mut k = 3;
        let mut next = || {
            k += 1;
            vals[k - 1]
        };
        let moisture = if idx.moisture.is_some() {
            zeros.take(next(), &mut last_moisture)
        } else {
            f64::NAN
        };
        // (speed m/s, or distance m and interval s).
        let (speed, dist, interval) = match &idx.motion {
            Motion::Speed(_, f) => (next() * f, f64::NAN, f64::NAN),
            Motion::Distance {
                col,
                fixed_m,
                factor,
                interval,
            } => {
                let d = if col.is_some() {
                    next() * factor
                } else {
                    *fixed_m
                };
                let i = if interval.is_some() { next() } else { f64::NAN };
                (f64::NAN, d, i)
            }
            Motion::Unknown => (f64::NAN, f64::NAN, f64::NAN),
        };
        // Mass flow (kg/s), or the given yield at standard moisture (kg/ha).
        let (flow, given) = match idx.amount {
            Amount::Flow(f) => (amount * f, f64::NAN),
            Amount::Yield { per_unit, wet } => {
                let kg = amount * per_unit;
                let std = if wet {
                    crate::crop::to_standard_moisture(kg, moisture.min(99.0), standard)
                } else {
                    kg
                };
                (f64::NAN, std)
            }
        };
        let width = if idx.width.is_some() {
            next() * wf
        } else {
            fixed_width
        };
        if lon == 0.0 && lat == 0.0 {
            rej.push(reject(
                name,
                line,
                "no_position",
                &c.longitude,
                "0,0",
                "a GPS fix",
            ));
            continue;
        }
        // Easting and northing in the trial's CRS, to lon/lat.
        let (lon, lat) = match &crs {
            None => (lon, lat),
            Some(k) => match k.to_wgs84(lon, lat) {
                Ok(ll) => ll,
                Err(_) => {
                    rej.push(reject(
                        name,
                        line,
                        "coordinate_range",
                        &c.longitude,
                        &format!("{lon}, {lat}"),
                        &format!("a position in {} (inputs.crs)", k.label()),
                    ));
                    continue;
                }
            },
        };
        if !(-180.0..=180.0).contains(&lon) || !(-90.0..=90.0).contains(&lat) {
            let (cn, v, lim) = if !(-180.0..=180.0).contains(&lon) {
                (c.longitude.as_str(), lon, "-180..180")
            } else {
                (c.latitude.as_str(), lat, "-90..90")
            };
            rej.push(reject(
                name,
                line,
                "coordinate_range",
                cn,
                &v.to_string(),
                lim,
            ));
            continue;
        }
        if let Some((cn, v)) = [
            (amount_name, amount),
            (speed_name, speed),
            (distance_name, dist),
            (c.interval.as_str(), interval),
            (c.width.name.as_str(), width),
            (c.moisture.as_str(), moisture),
        ]
        .into_iter()
        .find(|(_, v)| *v < 0.0)
        {
            rej.push(reject(
                name,
                line,
                "negative_value",
                cn,
                &v.to_string(),
                ">= 0",
            ));
            continue;
        }
        let label = match idx.labels {
            [Some(t), s, r] if !record[t].trim().is_empty() => {
                let text = |i: Option<usize>| i.map(|i| record[i].trim().to_string());
                let key = [
                    record[t].trim().to_string(),
                    text(s).unwrap_or_default(),
                    text(r).unwrap_or_default(),
                ];
                *label_of.entry(key.clone()).or_insert_with(|| {
                    labels.push(key);
                    labels.len() as u32 - 1
                })
            }
            _ => 0,
        };
        travel.push((dist, interval));
        out.push(RawPoint {
            file: file_idx,
            row: line,
            time_s,
            lon,
            lat,
            flow_kg_s: flow,
            speed_m_s: speed,
            width_m: width,
            moisture_pct: moisture,
            optional,
            yield_kg_ha: given,
            label,
        });
    }
    if n == 0 {
        return Err(IngestError::Unusable {
            file: name.to_string(),
            message: "no data rows after the header".into(),
        });
    }
    if let Motion::Distance { interval, .. } = &idx.motion {
        // Speed = distance / interval; without an interval column, the interval is the time
        // since the previous record read (for the first, the time to the next).
        let times: Vec<f64> = out.iter().map(|p| p.time_s).collect();
        let mut keep = Vec::with_capacity(out.len());
        for (i, p) in out.iter_mut().enumerate() {
            let (d, iv) = travel[i];
            let dt = if interval.is_some() {
                iv
            } else if i > 0 {
                times[i] - times[i - 1]
            } else if times.len() > 1 {
                times[1] - times[0]
            } else {
                f64::NAN
            };
            if dt > 0.0 && dt.is_finite() {
                p.speed_m_s = d / dt;
                keep.push(true);
            } else {
                let (col, want) = if interval.is_some() {
                    (c.interval.as_str(), "an interval above 0 s")
                } else {
                    (
                        c.time.name.as_str(),
                        "a later time than the previous record",
                    )
                };
                rej.push(reject(
                    name,
                    p.row,
                    "no_interval",
                    col,
                    &format!("{dt} s"),
                    want,
                ));
                keep.push(false);
            }
        }
        let mut k = keep.into_iter();
        out.retain(|_| k.next().unwrap_or(false));
        rej.sort_by_key(|r| r.source_row);
    }
    // An export without speed or distance: speed from positions and times (smoothed, see
    // [`super::speed_from_positions`]); without times it stays unknown.
    if matches!(idx.motion, Motion::Unknown) && idx.time.is_some() {
        super::speed_from_positions(&mut out);
    }
    Ok(ExportRead {
        rows: n,
        points: out,
        rejections: rej,
        labels,
        zero_moisture: vec![zeros],
    })
}

impl MonitorFormat for MappedText {
    fn name(&self) -> &'static str {
        "mapped_text"
    }

    fn extensions(&self) -> &'static [&'static str] {
        &["csv"]
    }

    fn sniff(&self, _path: &Path, _head: &[u8]) -> bool {
        // The fallback: any file is tried as delimited text with the trial's mapping.
        true
    }

    fn describe(&self, cfg: &IngestConfig) -> String {
        super::mapping_words::describe(cfg)
    }

    fn check(&self, cfg: &IngestConfig, path: &Path, name: &str) -> Result<(), String> {
        let rdr = csv::ReaderBuilder::new()
            .delimiter(cfg.columns.delimiter.as_bytes()[0])
            .flexible(true)
            .from_path(path);
        match rdr {
            Err(e) => Err(format!("{name}: cannot read: {e}")),
            Ok(mut r) => match r.headers() {
                Err(e) => Err(format!("{name}: header is not readable: {e}")),
                Ok(h) => column_index(cfg, &h.clone(), name)
                    .map(|_| ())
                    .map_err(|e| e.to_string()),
            },
        }
    }

    fn read(
        &self,
        cfg: &IngestConfig,
        path: &Path,
        name: &str,
        file: u32,
    ) -> Result<ExportRead, IngestError> {
        read_export(cfg, path, name, file)
    }

    fn positions(
        &self,
        cfg: &IngestConfig,
        bytes: &[u8],
    ) -> Result<Option<Vec<(f64, f64)>>, String> {
        let c = &cfg.columns;
        let mut rdr = csv::ReaderBuilder::new()
            .delimiter(c.delimiter.as_bytes()[0])
            .flexible(true)
            .from_reader(bytes);
        let Ok(h) = rdr.headers().cloned() else {
            return Ok(None);
        };
        let (Some(ilon), Some(ilat)) = (
            h.iter().position(|x| x.trim() == c.longitude),
            h.iter().position(|x| x.trim() == c.latitude),
        ) else {
            return Ok(None);
        };
        let crs = input_crs(cfg)?;
        let mut out = Vec::new();
        let mut last_len = h.len();
        for rec in rdr.records() {
            let Ok(rec) = rec else { continue };
            last_len = rec.len();
            if let (Some(lon), Some(lat)) = (
                rec.get(ilon).and_then(|v| number(v, c.decimal == ",")),
                rec.get(ilat).and_then(|v| number(v, c.decimal == ",")),
            ) {
                match &crs {
                    None => out.push((lon, lat)),
                    Some(k) => {
                        if let Ok(ll) = k.to_wgs84(lon, lat) {
                            out.push(ll);
                        }
                    }
                }
            }
        }
        if last_len != h.len() {
            return Err(format!(
                "partial: the last record has {last_len} fields, the header {}",
                h.len()
            ));
        }
        Ok(Some(out))
    }
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
