//! The records of a delimited table read with the trial's `[columns]` mapping: each good
//! record to a point, each bad one to a rejection naming its line and column (see
//! `mapped_text` for the rules).

use super::column_map::{
    column_index, input_crs, number, width_factor, Amount, ColumnIndex, Motion,
};
use super::{reject, unreadable_row, ExportRead, RawPoint, ZeroMoisture};
use crate::ingest::settings::{ColumnsSection, IngestConfig, TimeFormat};
use crate::ingest::time::parse_date_time;
use crate::ingest::{parse_iso8601, IngestError};
use crate::table::Rejection;

/// The most columns read as numbers: position (2), amount, moisture, distance or speed,
/// interval, width.
const MAX_NUMBERS: usize = 8;

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
    let crs = input_crs(cfg).map_err(|message| IngestError::Unusable {
        file: name.to_string(),
        message,
    })?;
    let mut rows = Rows::new(cfg, idx, crs, name, file_idx);
    // Per point kept: the distance travelled (m) and interval (s, NaN: from the times).
    let mut travel: Vec<(f64, f64)> = Vec::new();
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
        match rows.point(&record, line) {
            Ok((p, t)) => {
                travel.push(t);
                out.push(p);
            }
            Err(r) => rej.push(r),
        }
    }
    if n == 0 {
        return Err(IngestError::Unusable {
            file: name.to_string(),
            message: "no data rows after the header".into(),
        });
    }
    if let Motion::Distance { interval, .. } = &rows.idx.motion {
        speeds_from_distance(
            &mut out,
            &travel,
            interval.is_some(),
            &cfg.columns,
            name,
            &mut rej,
        );
    }
    // An export without speed or distance: speed from positions and times (smoothed, see
    // [`super::speed_from_positions`]); without times it stays unknown.
    if matches!(rows.idx.motion, Motion::Unknown) && rows.idx.time.is_some() {
        super::speed_from_positions(&mut out);
    }
    Ok(ExportRead {
        rows: n,
        points: out,
        rejections: rej,
        labels: rows.labels,
        zero_moisture: vec![rows.zeros],
    })
}

/// Speed = distance / interval; without an interval column, the interval is the time since
/// the previous record read (for the first, the time to the next). A record without a
/// usable interval is rejected (`no_interval`).
fn speeds_from_distance(
    out: &mut Vec<RawPoint>,
    travel: &[(f64, f64)],
    interval_mapped: bool,
    c: &ColumnsSection,
    name: &str,
    rej: &mut Vec<Rejection>,
) {
    let times: Vec<f64> = out.iter().map(|p| p.time_s).collect();
    let mut keep = Vec::with_capacity(out.len());
    for (i, p) in out.iter_mut().enumerate() {
        let (d, iv) = travel[i];
        let dt = if interval_mapped {
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
            let (col, want) = if interval_mapped {
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

/// One export's reading of its records: the mapping and what the records share.
struct Rows<'a> {
    c: &'a ColumnsSection,
    idx: ColumnIndex,
    name: &'a str,
    file_idx: u32,
    /// A decimal comma.
    comma: bool,
    /// The positions' CRS when not WGS 84.
    crs: Option<crate::projection::Crs>,
    /// The width column's factor to metres, and the fixed width without a column.
    wf: f64,
    fixed_width: f64,
    standard: f64,
    amount_name: &'a str,
    speed_name: &'a str,
    distance_name: &'a str,
    /// Columns read as numbers: (index, name); the motion and width columns when mapped.
    cols: Vec<(usize, &'a str)>,
    /// Label texts (treatment, strip, replicate) -> index into `labels` (0: no treatment).
    labels: Vec<[String; 3]>,
    label_of: std::collections::HashMap<[String; 3], u32>,
    /// Moisture read 0 is no reading: the last reading before it stands (counted).
    zeros: ZeroMoisture,
    last_moisture: f64,
}

impl<'a> Rows<'a> {
    fn new(
        cfg: &'a IngestConfig,
        idx: ColumnIndex,
        crs: Option<crate::projection::Crs>,
        name: &'a str,
        file_idx: u32,
    ) -> Rows<'a> {
        let c = &cfg.columns;
        let wf = width_factor(c.width.unit);
        let amount_name = match &c.yield_col {
            Some(y) => y.name.as_str(),
            None => c.flow.name.as_str(),
        };
        let speed_name = c.speed.as_ref().map(|s| s.name.as_str()).unwrap_or("");
        let distance_name = c.distance.as_ref().map(|s| s.name.as_str()).unwrap_or("");
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
        debug_assert!(cols.len() <= MAX_NUMBERS);
        Rows {
            c,
            idx,
            name,
            file_idx,
            comma: c.decimal == ",",
            crs,
            wf,
            fixed_width: c.width.value.unwrap_or(f64::NAN) * wf,
            standard: cfg.standard_moisture_pct(),
            amount_name,
            speed_name,
            distance_name,
            cols,
            labels: vec![Default::default()],
            label_of: Default::default(),
            zeros: ZeroMoisture {
                source: name.to_string(),
                ..Default::default()
            },
            last_moisture: f64::NAN,
        }
    }

    /// A rejection of this record.
    fn reject(&self, line: u64, rule: &str, column: &str, value: &str, limit: &str) -> Rejection {
        reject(self.name, line, rule, column, value, limit)
    }

    /// The record's time (NaN without a time column), or its rejection.
    fn time(&self, record: &csv::StringRecord, line: u64) -> Result<f64, Rejection> {
        let (c, idx) = (self.c, &self.idx);
        let t = idx.time.map_or("", |i| &record[i]);
        let time_s = match c.time.format {
            TimeFormat::None => Some(f64::NAN),
            TimeFormat::Iso8601 => parse_iso8601(t),
            TimeFormat::UnixS => number(t, self.comma),
            TimeFormat::TimeOfDay => match (idx.date, c.time.date_order) {
                (Some(d), Some(order)) => parse_date_time(&record[d], t, order),
                _ => None,
            },
        };
        time_s.ok_or_else(|| {
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
            self.reject(line, "unparseable", &c.time.name, &shown, want)
        })
    }

    /// The numeric columns (into `vals`, in the order of `cols`) and the optional ones, or
    /// the rejection of the first that is not a number.
    fn numbers(
        &self,
        record: &csv::StringRecord,
        line: u64,
        vals: &mut [f64; MAX_NUMBERS],
    ) -> Result<[f64; 4], Rejection> {
        let unparseable =
            |cname: &str, text: &str| self.reject(line, "unparseable", cname, text, "a number");
        for (k, (ci, cname)) in self.cols.iter().enumerate() {
            match number(&record[*ci], self.comma) {
                Some(v) => vals[k] = v,
                None => return Err(unparseable(cname, &record[*ci])),
            }
        }
        let mut optional = [f64::NAN; 4];
        for (k, o) in self.idx.optional.iter().enumerate() {
            if let Some((ci, cname)) = o {
                let text = &record[*ci];
                // An as-applied rate may be missing where nothing was applied or logged.
                if k == 3 && text.trim().is_empty() {
                    continue;
                }
                match number(text, self.comma) {
                    Some(v) if k == 3 && v < 0.0 => {
                        return Err(self.reject(line, "negative_value", cname, text, ">= 0"))
                    }
                    Some(v) => optional[k] = v,
                    None => return Err(unparseable(cname, text)),
                }
            }
        }
        if let Some(a) = &self.c.applied_rate {
            optional[3] *= a.to_per_ha();
        }
        Ok(optional)
    }

    /// The position in WGS 84 (from the trial's CRS where it is not), or the rejection of
    /// a record without a fix or outside the coordinate ranges.
    fn position(&self, lon: f64, lat: f64, line: u64) -> Result<(f64, f64), Rejection> {
        let c = self.c;
        if lon == 0.0 && lat == 0.0 {
            return Err(self.reject(line, "no_position", &c.longitude, "0,0", "a GPS fix"));
        }
        // Easting and northing in the trial's CRS, to lon/lat.
        let (lon, lat) = match &self.crs {
            None => (lon, lat),
            Some(k) => k.to_wgs84(lon, lat).map_err(|_| {
                self.reject(
                    line,
                    "coordinate_range",
                    &c.longitude,
                    &format!("{lon}, {lat}"),
                    &format!("a position in {} (inputs.crs)", k.label()),
                )
            })?,
        };
        if !(-180.0..=180.0).contains(&lon) || !(-90.0..=90.0).contains(&lat) {
            let (cn, v, lim) = if !(-180.0..=180.0).contains(&lon) {
                (c.longitude.as_str(), lon, "-180..180")
            } else {
                (c.latitude.as_str(), lat, "-90..90")
            };
            return Err(self.reject(line, "coordinate_range", cn, &v.to_string(), lim));
        }
        Ok((lon, lat))
    }

    /// The record's label index (0: no treatment label), its texts kept once.
    fn label(&mut self, record: &csv::StringRecord) -> u32 {
        match self.idx.labels {
            [Some(t), s, r] if !record[t].trim().is_empty() => {
                let text = |i: Option<usize>| i.map(|i| record[i].trim().to_string());
                let key = [
                    record[t].trim().to_string(),
                    text(s).unwrap_or_default(),
                    text(r).unwrap_or_default(),
                ];
                let labels = &mut self.labels;
                *self.label_of.entry(key.clone()).or_insert_with(|| {
                    labels.push(key);
                    labels.len() as u32 - 1
                })
            }
            _ => 0,
        }
    }

    /// One record to a point and its travel (distance m, interval s), or its rejection.
    fn point(
        &mut self,
        record: &csv::StringRecord,
        line: u64,
    ) -> Result<(RawPoint, (f64, f64)), Rejection> {
        let time_s = self.time(record, line)?;
        let mut vals = [0.0f64; MAX_NUMBERS];
        let optional = self.numbers(record, line, &mut vals)?;
        let (lon, lat, amount) = (vals[0], vals[1], vals[2]);
        let mut k = 3;
        let mut next = || {
            k += 1;
            vals[k - 1]
        };
        let moisture = if self.idx.moisture.is_some() {
            self.zeros.take(next(), &mut self.last_moisture)
        } else {
            f64::NAN
        };
        // (speed m/s, or distance m and interval s).
        let (speed, dist, interval) = match &self.idx.motion {
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
        let (flow, given) = match self.idx.amount {
            Amount::Flow(f) => (amount * f, f64::NAN),
            Amount::Yield { per_unit, wet } => {
                let kg = amount * per_unit;
                let std = if wet {
                    crate::crop::to_standard_moisture(kg, moisture.min(99.0), self.standard)
                } else {
                    kg
                };
                (f64::NAN, std)
            }
        };
        let width = if self.idx.width.is_some() {
            next() * self.wf
        } else {
            self.fixed_width
        };
        let (lon, lat) = self.position(lon, lat, line)?;
        let c = self.c;
        if let Some((cn, v)) = [
            (self.amount_name, amount),
            (self.speed_name, speed),
            (self.distance_name, dist),
            (c.interval.as_str(), interval),
            (c.width.name.as_str(), width),
            (c.moisture.as_str(), moisture),
        ]
        .into_iter()
        .find(|(_, v)| *v < 0.0)
        {
            return Err(self.reject(line, "negative_value", cn, &v.to_string(), ">= 0"));
        }
        let label = self.label(record);
        Ok((
            RawPoint {
                file: self.file_idx,
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
            },
            (dist, interval),
        ))
    }
}
