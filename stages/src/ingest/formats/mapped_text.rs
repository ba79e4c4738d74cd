//! The mapped delimited-text format: one record per line, columns named and scaled by the
//! trial file's `[columns]` (time as ISO 8601 or Unix seconds; WGS84 lon/lat; mass flow,
//! speed and swath width with their units; moisture in %; optional work state, HDOP and fix
//! quality). Every bad record becomes a rejection row naming its line and column:
//! `unreadable_row`, `wrong_field_count`, `unparseable`, `coordinate_range`, `no_position`,
//! `negative_value`.

use super::{reject, ExportRead, MonitorFormat, RawPoint};
use crate::config::TrialConfig;
use crate::ingest::settings::{FlowUnit, SpeedUnit, TimeFormat, WidthUnit};
use crate::ingest::{parse_iso8601, IngestError};
use std::path::Path;

/// The mapped delimited-text reader.
pub struct MappedText;

/// Positions of the mapped columns in one export's header.
struct ColumnIndex {
    time: usize,
    lon: usize,
    lat: usize,
    flow: usize,
    speed: usize,
    width: usize,
    moisture: usize,
    /// Optional columns: (index, name) when mapped.
    optional: [Option<(usize, String)>; 3],
}

fn column_index(
    cfg: &TrialConfig,
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
    Ok(ColumnIndex {
        time: find(&c.time.name, "time.name")?,
        lon: find(&c.longitude, "longitude")?,
        lat: find(&c.latitude, "latitude")?,
        flow: find(&c.flow.name, "flow.name")?,
        speed: find(&c.speed.name, "speed.name")?,
        width: find(&c.width.name, "width.name")?,
        moisture: find(&c.moisture, "moisture")?,
        optional: [
            (&c.work_state, "work_state"),
            (&c.hdop, "hdop"),
            (&c.fix_quality, "fix_quality"),
        ]
        .map(|(name, key)| {
            if name.is_empty() {
                Ok(None)
            } else {
                find(name, key).map(|i| Some((i, name.clone())))
            }
        })
        .into_iter()
        .collect::<Result<Vec<_>, _>>()?
        .try_into()
        .expect("three optional columns"),
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
fn width_factor(u: WidthUnit) -> f64 {
    match u {
        WidthUnit::M => 1.0,
        WidthUnit::Ft => 0.3048,
        WidthUnit::In => 0.0254,
    }
}

/// Read one export: good rows to points, unreadable ones to rejections.
fn read_export(
    cfg: &TrialConfig,
    path: &Path,
    name: &str,
    file_idx: u32,
) -> Result<ExportRead, IngestError> {
    let mut out = Vec::new();
    let mut rej = Vec::new();
    let delim = cfg.columns.delimiter.as_bytes()[0];
    let (mut rdr, header) = crate::ingest::open_table(path, name, delim)?;
    if header.is_empty() || (header.len() == 1 && header[0].trim().is_empty()) {
        return Err(IngestError::Unusable {
            file: name.to_string(),
            message: "empty file: no header line".into(),
        });
    }
    let idx = column_index(cfg, &header, name)?;
    let c = &cfg.columns;
    let (ff, sf, wf) = (
        flow_factor(c.flow.unit),
        speed_factor(c.speed.unit),
        width_factor(c.width.unit),
    );
    let cols = [
        (idx.lon, c.longitude.as_str()),
        (idx.lat, c.latitude.as_str()),
        (idx.flow, c.flow.name.as_str()),
        (idx.speed, c.speed.name.as_str()),
        (idx.width, c.width.name.as_str()),
        (idx.moisture, c.moisture.as_str()),
    ];
    let mut n = 0u64;
    let mut record = csv::StringRecord::new();
    loop {
        let line_hint = rdr.position().line() + 1;
        match rdr.read_record(&mut record) {
            Ok(false) => break,
            Ok(true) => {}
            Err(e) => {
                n += 1;
                let line = e.position().map(|p| p.line()).unwrap_or(line_hint);
                rej.push(reject(
                    name,
                    line,
                    "unreadable_row",
                    "",
                    &e.to_string(),
                    "a CSV record",
                ));
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
        let t = &record[idx.time];
        let time_s = match c.time.format {
            TimeFormat::Iso8601 => parse_iso8601(t),
            TimeFormat::UnixS => t.trim().parse::<f64>().ok().filter(|v| v.is_finite()),
        };
        let Some(time_s) = time_s else {
            let want = match c.time.format {
                TimeFormat::Iso8601 => "an ISO 8601 date-time",
                TimeFormat::UnixS => "seconds since 1970",
            };
            rej.push(reject(name, line, "unparseable", &c.time.name, t, want));
            continue;
        };
        let mut vals = [0.0f64; 6];
        let mut bad = None;
        for (k, (ci, cname)) in cols.iter().enumerate() {
            match record[*ci].trim().parse::<f64>() {
                Ok(v) if v.is_finite() => vals[k] = v,
                _ => {
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
                match record[*ci].trim().parse::<f64>() {
                    Ok(v) if v.is_finite() => optional[k] = v,
                    _ => {
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
        let [lon, lat, flow, speed, width, moisture] = vals;
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
        if let Some((cn, v)) = [
            (c.flow.name.as_str(), flow),
            (c.speed.name.as_str(), speed),
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
        out.push(RawPoint {
            file: file_idx,
            row: line,
            time_s,
            lon,
            lat,
            flow_kg_s: flow * ff,
            speed_m_s: speed * sf,
            width_m: width * wf,
            moisture_pct: moisture,
            optional,
        });
    }
    if n == 0 {
        return Err(IngestError::Unusable {
            file: name.to_string(),
            message: "no data rows after the header".into(),
        });
    }
    Ok(ExportRead {
        rows: n,
        points: out,
        rejections: rej,
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

    fn check(&self, cfg: &TrialConfig, path: &Path, name: &str) -> Result<(), String> {
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
        cfg: &TrialConfig,
        path: &Path,
        name: &str,
        file: u32,
    ) -> Result<ExportRead, IngestError> {
        read_export(cfg, path, name, file)
    }

    fn positions(
        &self,
        cfg: &TrialConfig,
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
        let mut out = Vec::new();
        let mut last_len = h.len();
        for rec in rdr.records() {
            let Ok(rec) = rec else { continue };
            last_len = rec.len();
            if let (Some(lon), Some(lat)) = (
                rec.get(ilon).and_then(|v| v.trim().parse::<f64>().ok()),
                rec.get(ilat).and_then(|v| v.trim().parse::<f64>().ok()),
            ) {
                out.push((lon, lat));
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
