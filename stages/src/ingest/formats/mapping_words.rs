//! The trial's `[columns]` mapping in words, as `check`, the ingest summary and the reports
//! show how an export was read.

use crate::ingest::settings::IngestConfig;
use crate::ingest::settings::{TimeFormat, YieldBasis};

/// A unit or order as the trial file spells it (`lb_s`, `mph`, `dmy`).
fn spelled<U: serde::Serialize>(u: &U) -> String {
    serde_json::to_value(u)
        .ok()
        .and_then(|v| v.as_str().map(String::from))
        .unwrap_or_default()
}

/// How the mapping reads an export, in words (for `check` and the ingest summary).
pub(crate) fn describe(cfg: &IngestConfig) -> String {
    let c = &cfg.columns;
    let mut parts = vec![format!(
        "delimiter {:?}, decimal {:?}",
        c.delimiter, c.decimal
    )];
    parts.push(match c.time.format {
        TimeFormat::Iso8601 => format!("time {} (ISO 8601)", c.time.name),
        TimeFormat::UnixS => format!("time {} (Unix seconds)", c.time.name),
        TimeFormat::None => {
            "no time column: records in file order, the rules timed in seconds skipped".into()
        }
        TimeFormat::TimeOfDay => format!(
            "date {} ({}) and time {}",
            c.time.date,
            c.time.date_order.as_ref().map(spelled).unwrap_or_default(),
            c.time.name
        ),
    });
    parts.push(if cfg.inputs.crs.is_empty() {
        format!("lon/lat {}/{}", c.longitude, c.latitude)
    } else {
        format!(
            "x/y {}/{} in {} (inputs.crs)",
            c.longitude, c.latitude, cfg.inputs.crs
        )
    });
    parts.push(match &c.yield_col {
        Some(y) => format!(
            "yield {} ({}, {} basis{})",
            y.name,
            spelled(&y.unit),
            spelled(&y.basis),
            if y.basis == YieldBasis::Wet {
                ", standardised with the moisture column"
            } else {
                ", at standard moisture"
            }
        ),
        None => format!("flow {} ({})", c.flow.name, spelled(&c.flow.unit)),
    });
    match (&c.speed, &c.distance) {
        (Some(sp), _) => parts.push(format!("speed {} ({})", sp.name, spelled(&sp.unit))),
        (None, Some(d)) => {
            let dist = if d.name.is_empty() {
                format!(
                    "a fixed {} {} per record (columns.distance.value)",
                    d.value.unwrap_or(f64::NAN),
                    spelled(&d.unit)
                )
            } else {
                format!("{} ({})", d.name, spelled(&d.unit))
            };
            let interval = if c.interval.is_empty() {
                "the time since the previous record".to_string()
            } else {
                format!("interval {} (s)", c.interval)
            };
            parts.push(format!("speed = distance {dist} / {interval}"));
        }
        (None, None) if c.time.format == TimeFormat::None => {
            parts.push("no speed or distance (and no times to derive it from)".into())
        }
        (None, None) => parts.push(
            "speed not logged: from positions and times (median of 4-step chord speeds over 5 records)"
                .into(),
        ),
    }
    parts.push(if c.width.name.is_empty() && c.width.value.is_none() {
        "no swath width".to_string()
    } else if c.width.name.is_empty() {
        format!(
            "swath a fixed {} {} (columns.width.value: the export has no swath column)",
            c.width.value.unwrap_or(f64::NAN),
            spelled(&c.width.unit)
        )
    } else {
        format!("swath {} ({})", c.width.name, spelled(&c.width.unit))
    });
    parts.push(if c.moisture.is_empty() {
        "no moisture".to_string()
    } else {
        format!("moisture {} (%)", c.moisture)
    });
    if !c.treatment.is_empty() {
        let mut l = format!("treatment label {}", c.treatment);
        for (what, col) in [("strip", &c.strip), ("replicate", &c.replicate)] {
            if !col.is_empty() {
                l += &format!(", {what} {col}");
            }
        }
        parts.push(l);
    }
    parts.join("; ")
}
