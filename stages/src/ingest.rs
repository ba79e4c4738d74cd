//! Ingest: monitor exports, plot boundaries and the design table, projected to UTM.
//!
//! Parameters: the trial configuration (column mapping with units, file paths) and the
//! folder the paths are relative to.
//! Returns: points in SI units with UTM coordinates, projected plot polygons, the design
//! table, and one rejection row for every record that could not be read (with the column
//! and the text found).
//! Errors: [`IngestError`] when a file is unusable as a whole (missing, no header, a mapped
//! column absent, no data rows, malformed GeoJSON, a design table that does not match the
//! plot geometry). Every message names the file, and the row and column where there is one.
//! Complexity: linear in the number of records; projection runs in parallel (rayon).

use crate::config::{FlowUnit, SpeedUnit, TimeFormat, TrialConfig, WidthUnit};
use crate::projection::{zone_of, Utm};
use crate::table::{DesignRow, PlotPolygon, Point, PointSet, Rejection, StageSummary};
use rayon::prelude::*;
use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

/// A file that cannot be used at all.
#[derive(Debug, thiserror::Error)]
pub enum IngestError {
    #[error("{file}: cannot read: {message}")]
    Read { file: String, message: String },
    #[error(
        "{file}: column {column:?} named in [columns] {key} is not in the header (found: {found})"
    )]
    MissingColumn {
        file: String,
        column: String,
        key: String,
        found: String,
    },
    #[error("{file}: {message}")]
    Unusable { file: String, message: String },
    #[error("{file}, line {row}, column {column:?}: {message}")]
    BadRow {
        file: String,
        row: u64,
        column: String,
        message: String,
    },
    #[error("design and plot geometry do not match:\n  {}", .0.join("\n  "))]
    Mismatch(Vec<String>),
    #[error(transparent)]
    Projection(#[from] crate::projection::ProjectionError),
}

/// What ingest hands on.
#[derive(Clone, Debug)]
pub struct IngestOutput {
    pub points: PointSet,
    pub polygons: Vec<PlotPolygon>,
    pub design: Vec<DesignRow>,
    pub rejections: Vec<Rejection>,
    pub summary: StageSummary,
}

/// Display form of a path relative to the trial folder, with `/` separators.
fn display(base: &Path, p: &Path) -> String {
    p.strip_prefix(base)
        .unwrap_or(p)
        .to_string_lossy()
        .replace('\\', "/")
}

/// The monitor export files named by `inputs.monitor` (folders give their `*.csv`, sorted).
pub fn monitor_files(cfg: &TrialConfig, base: &Path) -> Result<Vec<PathBuf>, IngestError> {
    let mut out = Vec::new();
    for entry in &cfg.inputs.monitor {
        let p = base.join(entry);
        if p.is_dir() {
            let mut v: Vec<PathBuf> = std::fs::read_dir(&p)
                .map_err(|e| IngestError::Read {
                    file: entry.clone(),
                    message: e.to_string(),
                })?
                .filter_map(|e| e.ok().map(|e| e.path()))
                .filter(|p| p.extension().is_some_and(|x| x.eq_ignore_ascii_case("csv")))
                .collect();
            v.sort();
            if v.is_empty() {
                return Err(IngestError::Unusable {
                    file: entry.clone(),
                    message: "folder holds no .csv export".into(),
                });
            }
            out.extend(v);
        } else if p.is_file() {
            out.push(p);
        } else {
            return Err(IngestError::Read {
                file: entry.clone(),
                message: "no such file or folder (inputs.monitor)".into(),
            });
        }
    }
    Ok(out)
}

/// Days from 1970-01-01 to a civil date (Hinnant's `days_from_civil` algorithm).
fn days_from_civil(y: i64, m: i64, d: i64) -> i64 {
    let y = if m <= 2 { y - 1 } else { y };
    let era = if y >= 0 { y } else { y - 399 } / 400;
    let yoe = y - era * 400;
    let mp = (m + 9) % 12;
    let doy = (153 * mp + 2) / 5 + d - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

/// Parse an ISO 8601 date-time (`YYYY-MM-DDTHH:MM:SS[.f][Z|+HH:MM]`, `T` or space) to
/// seconds since 1970-01-01 UTC. No offset means UTC.
pub fn parse_iso8601(s: &str) -> Option<f64> {
    let s = s.trim();
    let b = s.as_bytes();
    if b.len() < 19 || b[4] != b'-' || b[7] != b'-' || (b[10] != b'T' && b[10] != b' ') {
        return None;
    }
    if b[13] != b':' || b[16] != b':' {
        return None;
    }
    let num = |r: std::ops::Range<usize>| -> Option<i64> {
        let t = s.get(r)?;
        if t.bytes().all(|c| c.is_ascii_digit()) {
            t.parse().ok()
        } else {
            None
        }
    };
    let (y, mo, d) = (num(0..4)?, num(5..7)?, num(8..10)?);
    let (h, mi, se) = (num(11..13)?, num(14..16)?, num(17..19)?);
    if !(1..=12).contains(&mo) || !(1..=31).contains(&d) || h > 23 || mi > 59 || se > 60 {
        return None;
    }
    let mut rest = &s[19..];
    let mut frac = 0.0;
    if let Some(r) = rest.strip_prefix('.') {
        let n = r.bytes().take_while(|c| c.is_ascii_digit()).count();
        if n == 0 {
            return None;
        }
        frac = format!("0.{}", &r[..n]).parse().ok()?;
        rest = &r[n..];
    }
    let offset = match rest {
        "" | "Z" | "z" => 0,
        o if o.len() == 6 && (o.starts_with('+') || o.starts_with('-')) && &o[3..4] == ":" => {
            let hh: i64 = o[1..3].parse().ok()?;
            let mm: i64 = o[4..6].parse().ok()?;
            let sign = if o.starts_with('-') { -1 } else { 1 };
            sign * (hh * 3600 + mm * 60)
        }
        _ => return None,
    };
    let days = days_from_civil(y, mo, d);
    Some((days * 86_400 + h * 3600 + mi * 60 + se - offset) as f64 + frac)
}

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

/// A record parsed to SI, before projection.
struct RawPoint {
    file: u32,
    row: u64,
    time_s: f64,
    lon: f64,
    lat: f64,
    flow_kg_s: f64,
    speed_m_s: f64,
    width_m: f64,
    moisture_pct: f64,
    optional: [f64; 3],
}

fn reject(file: &str, row: u64, rule: &str, column: &str, value: &str, limit: &str) -> Rejection {
    Rejection {
        source_file: file.to_string(),
        source_row: row,
        id: String::new(),
        rule: rule.to_string(),
        column: column.to_string(),
        value: value.to_string(),
        limit: limit.to_string(),
    }
}

/// Read one export; good rows to `out`, unreadable ones to `rej`. Returns rows read.
fn read_export(
    cfg: &TrialConfig,
    path: &Path,
    name: &str,
    file_idx: u32,
    out: &mut Vec<RawPoint>,
    rej: &mut Vec<Rejection>,
) -> Result<u64, IngestError> {
    let delim = cfg.columns.delimiter.as_bytes()[0];
    let mut rdr = csv::ReaderBuilder::new()
        .delimiter(delim)
        .flexible(true)
        .has_headers(true)
        .from_path(path)
        .map_err(|e| IngestError::Read {
            file: name.to_string(),
            message: e.to_string(),
        })?;
    let header = rdr
        .headers()
        .map_err(|e| IngestError::Unusable {
            file: name.to_string(),
            message: format!("header is not readable: {e}"),
        })?
        .clone();
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
    Ok(n)
}

/// The projection the settings ask for, or the zone of the median point.
pub fn choose_projection(
    cfg: &TrialConfig,
    lons: &[f64],
    lats: &[f64],
) -> Result<Utm, IngestError> {
    let zone = if cfg.ingest.utm_zone > 0 {
        cfg.ingest.utm_zone
    } else {
        zone_of(crate::util::median(lons)) as i64
    };
    let south = match cfg.ingest.hemisphere.as_str() {
        "north" => false,
        "south" => true,
        _ => crate::util::median(lats) < 0.0,
    };
    Ok(Utm::new(zone, south)?)
}

/// Run ingest.
pub fn run(cfg: &TrialConfig, base: &Path) -> Result<IngestOutput, IngestError> {
    run_with(cfg, base, &crate::progress::Progress::none())
}

/// [`run`], reporting each export read to `progress`.
pub fn run_with(
    cfg: &TrialConfig,
    base: &Path,
    progress: &crate::progress::Progress,
) -> Result<IngestOutput, IngestError> {
    let files = monitor_files(cfg, base)?;
    progress.start(files.len() as u64, "exports read");
    let names: Vec<String> = files.iter().map(|p| display(base, p)).collect();
    let mut raw = Vec::new();
    let mut rejections = Vec::new();
    let mut count_in = 0;
    for (i, (p, name)) in files.iter().zip(&names).enumerate() {
        count_in += read_export(cfg, p, name, i as u32, &mut raw, &mut rejections)?;
        progress.step();
    }
    let design = read_design(&base.join(&cfg.inputs.design), &cfg.inputs.design)?;
    let polygons_ll = if cfg.layout.is_empty() {
        read_geojson(
            &base.join(&cfg.inputs.plots),
            &cfg.inputs.plots,
            &cfg.inputs.plot_id_property,
        )?
    } else {
        Vec::new()
    };
    let lons: Vec<f64> = raw.iter().map(|r| r.lon).collect();
    let lats: Vec<f64> = raw.iter().map(|r| r.lat).collect();
    let (lons, lats) = if !lons.is_empty() {
        (lons, lats)
    } else if !cfg.layout.is_empty() {
        (
            cfg.layout.iter().map(|l| l.origin_lon).collect(),
            cfg.layout.iter().map(|l| l.origin_lat).collect(),
        )
    } else {
        // No readable point at all: take the zone from the plots.
        let pts: Vec<(f64, f64)> = polygons_ll
            .iter()
            .flat_map(|p| p.exterior.clone())
            .collect();
        (
            pts.iter().map(|p| p.0).collect(),
            pts.iter().map(|p| p.1).collect(),
        )
    };
    let utm = choose_projection(cfg, &lons, &lats)?;
    let projected: Result<Vec<(f64, f64)>, _> =
        raw.par_iter().map(|r| utm.forward(r.lon, r.lat)).collect();
    let projected = projected?;
    let points: Vec<Point> = raw
        .iter()
        .zip(projected)
        .enumerate()
        .map(|(i, (r, (x, y)))| Point {
            id: i as u64,
            file: r.file,
            row: r.row,
            time_s: r.time_s,
            lon: r.lon,
            lat: r.lat,
            x_m: x,
            y_m: y,
            flow_kg_s: r.flow_kg_s,
            speed_m_s: r.speed_m_s,
            width_m: r.width_m,
            moisture_pct: r.moisture_pct,
            work_state: r.optional[0],
            hdop: r.optional[1],
            fix_quality: r.optional[2],
        })
        .collect();
    let polygons = if cfg.layout.is_empty() {
        project_polygons(&utm, polygons_ll)?
    } else {
        let mut v = Vec::new();
        for l in &cfg.layout {
            let (ox, oy) = utm.forward(l.origin_lon, l.origin_lat)?;
            v.extend(l.polygons(ox, oy));
        }
        v
    };
    let plots_name = if cfg.layout.is_empty() {
        cfg.inputs.plots.clone()
    } else {
        "[[layout]]".to_string()
    };
    let (polygons, design, warnings) = reconcile(cfg, &plots_name, polygons, design)?;
    let mut summary = StageSummary::from_rejections("ingest", "points", count_in, &rejections);
    summary
        .details
        .insert("epsg".into(), serde_json::json!(utm.epsg()));
    summary
        .details
        .insert("files".into(), serde_json::json!(names.len()));
    summary
        .details
        .insert("plots".into(), serde_json::json!(polygons.len()));
    summary
        .details
        .insert("warnings".into(), serde_json::json!(warnings));
    Ok(IngestOutput {
        points: PointSet {
            files: names,
            points,
            epsg: utm.epsg(),
        },
        polygons,
        design,
        rejections,
        summary,
    })
}

fn project_polygons(utm: &Utm, polys: Vec<PlotPolygon>) -> Result<Vec<PlotPolygon>, IngestError> {
    polys
        .into_iter()
        .map(|p| -> Result<PlotPolygon, IngestError> {
            let proj = |ring: &[(f64, f64)]| -> Result<Vec<(f64, f64)>, IngestError> {
                ring.iter()
                    .map(|&(lon, lat)| utm.forward(lon, lat).map_err(IngestError::from))
                    .collect()
            };
            Ok(PlotPolygon {
                exterior: proj(&p.exterior)?,
                holes: p.holes.iter().map(|h| proj(h)).collect::<Result<_, _>>()?,
                plot_id: p.plot_id,
            })
        })
        .collect()
}

/// Check that the design and the plot geometry match: ids in one and not the other, duplicate
/// ids, a field without the check. With `plots.design_mismatch = "error"` every problem is in
/// one error; with "warn" unmatched plots and design rows are dropped and the problems come
/// back as warnings (a field without the check stays an error: nothing could be compared).
pub fn reconcile(
    cfg: &TrialConfig,
    plots_name: &str,
    polys: Vec<PlotPolygon>,
    design: Vec<DesignRow>,
) -> Result<(Vec<PlotPolygon>, Vec<DesignRow>, Vec<String>), IngestError> {
    let mut problems = Vec::new();
    let mut fatal = Vec::new();
    let mut seen = BTreeSet::new();
    let dups: BTreeSet<String> = polys
        .iter()
        .map(|p| p.plot_id.clone())
        .filter(|id| !seen.insert(id.clone()))
        .collect();
    if !dups.is_empty() {
        fatal.push(format!(
            "{plots_name}: duplicate plot ids: {}",
            dups.iter().cloned().collect::<Vec<_>>().join(", ")
        ));
    }
    let geo_ids: BTreeSet<String> = polys.iter().map(|p| p.plot_id.clone()).collect();
    let des_ids: BTreeSet<String> = design.iter().map(|d| d.plot_id.clone()).collect();
    let missing_geo: Vec<&str> = des_ids.difference(&geo_ids).map(|s| s.as_str()).collect();
    let missing_des: Vec<&str> = geo_ids.difference(&des_ids).map(|s| s.as_str()).collect();
    if !missing_geo.is_empty() {
        problems.push(format!(
            "{}: plot ids with no polygon in {plots_name}: {}",
            cfg.inputs.design,
            missing_geo.join(", ")
        ));
    }
    if !missing_des.is_empty() {
        problems.push(format!(
            "{plots_name}: plot ids with no row in {}: {}",
            cfg.inputs.design,
            missing_des.join(", ")
        ));
    }
    let mut fields: BTreeMap<&str, BTreeSet<&str>> = BTreeMap::new();
    for d in design.iter().filter(|d| geo_ids.contains(&d.plot_id)) {
        fields.entry(&d.field).or_default().insert(&d.treatment);
    }
    for (f, ts) in &fields {
        if !ts.contains(cfg.trial.check.as_str()) {
            fatal.push(format!(
                "{}: field {f} has no plot of the check treatment {:?} (trial.check)",
                cfg.inputs.design, cfg.trial.check
            ));
        }
    }
    let warn = cfg.plots.design_mismatch == "warn";
    if !fatal.is_empty() || (!problems.is_empty() && !warn) {
        problems.extend(fatal);
        return Err(IngestError::Mismatch(problems));
    }
    let polys: Vec<PlotPolygon> = polys
        .into_iter()
        .filter(|p| des_ids.contains(&p.plot_id))
        .collect();
    let design: Vec<DesignRow> = design
        .into_iter()
        .filter(|d| geo_ids.contains(&d.plot_id))
        .collect();
    Ok((polys, design, problems))
}

fn ring_from_json(v: &serde_json::Value) -> Option<Vec<(f64, f64)>> {
    v.as_array()?
        .iter()
        .map(|p| {
            let a = p.as_array()?;
            Some((a.first()?.as_f64()?, a.get(1)?.as_f64()?))
        })
        .collect()
}

/// Read plot polygons from GeoJSON (Polygon or single-part MultiPolygon features).
pub fn read_geojson(
    path: &Path,
    name: &str,
    id_prop: &str,
) -> Result<Vec<PlotPolygon>, IngestError> {
    let text = std::fs::read_to_string(path).map_err(|e| IngestError::Read {
        file: name.to_string(),
        message: e.to_string(),
    })?;
    let unusable = |message: String| IngestError::Unusable {
        file: name.to_string(),
        message,
    };
    let v: serde_json::Value =
        serde_json::from_str(&text).map_err(|e| unusable(format!("not valid JSON: {e}")))?;
    let feats = v
        .get("features")
        .and_then(|f| f.as_array())
        .ok_or_else(|| unusable("expected a GeoJSON FeatureCollection with \"features\"".into()))?;
    let mut out = Vec::new();
    for (i, f) in feats.iter().enumerate() {
        let id = match f.get("properties").and_then(|p| p.get(id_prop)) {
            Some(serde_json::Value::String(s)) => s.clone(),
            Some(serde_json::Value::Number(n)) => n.to_string(),
            _ => {
                return Err(unusable(format!(
                    "feature {i}: no property {id_prop:?} (inputs.plot_id_property)"
                )))
            }
        };
        let g = f
            .get("geometry")
            .ok_or_else(|| unusable(format!("feature {i} (plot {id}): no geometry")))?;
        let coords = g.get("coordinates");
        let rings = match g.get("type").and_then(|t| t.as_str()) {
            Some("Polygon") => coords.and_then(|c| c.as_array()).cloned(),
            Some("MultiPolygon") => {
                let parts = coords
                    .and_then(|c| c.as_array())
                    .cloned()
                    .unwrap_or_default();
                if parts.len() != 1 {
                    return Err(unusable(format!(
                        "feature {i} (plot {id}): a MultiPolygon with {} parts; a plot must be one polygon",
                        parts.len()
                    )));
                }
                parts[0].as_array().cloned()
            }
            other => {
                return Err(unusable(format!(
                    "feature {i} (plot {id}): geometry type {other:?}, expected Polygon"
                )))
            }
        };
        let rings =
            rings.ok_or_else(|| unusable(format!("feature {i} (plot {id}): no coordinates")))?;
        let mut parsed = Vec::new();
        for r in &rings {
            let ring = ring_from_json(r).ok_or_else(|| {
                unusable(format!(
                    "feature {i} (plot {id}): coordinates must be [lon, lat] number pairs"
                ))
            })?;
            if ring.len() < 4 {
                return Err(unusable(format!(
                    "feature {i} (plot {id}): a ring needs at least 4 positions"
                )));
            }
            parsed.push(ring);
        }
        if parsed.is_empty() {
            return Err(unusable(format!("feature {i} (plot {id}): empty polygon")));
        }
        let exterior = parsed.remove(0);
        out.push(PlotPolygon {
            plot_id: id,
            exterior,
            holes: parsed,
        });
    }
    if out.is_empty() {
        return Err(unusable("no plot features".into()));
    }
    Ok(out)
}

/// Read the design table: columns plot_id, treatment, block, field (any order, others
/// ignored). Every row must be complete and plot ids unique.
pub fn read_design(path: &Path, name: &str) -> Result<Vec<DesignRow>, IngestError> {
    let mut rdr = csv::ReaderBuilder::new()
        .flexible(true)
        .from_path(path)
        .map_err(|e| IngestError::Read {
            file: name.to_string(),
            message: e.to_string(),
        })?;
    let header = rdr
        .headers()
        .map_err(|e| IngestError::Unusable {
            file: name.to_string(),
            message: format!("header is not readable: {e}"),
        })?
        .clone();
    let want = ["plot_id", "treatment", "block", "field"];
    let mut idx = [0usize; 4];
    for (k, w) in want.iter().enumerate() {
        idx[k] = header.iter().position(|h| h.trim() == *w).ok_or_else(|| {
            IngestError::MissingColumn {
                file: name.to_string(),
                column: w.to_string(),
                key: "(design table)".into(),
                found: header.iter().collect::<Vec<_>>().join(", "),
            }
        })?;
    }
    let mut out: Vec<DesignRow> = Vec::new();
    let mut seen = BTreeMap::new();
    for rec in rdr.records() {
        let rec = rec.map_err(|e| IngestError::Unusable {
            file: name.to_string(),
            message: e.to_string(),
        })?;
        let line = rec.position().map(|p| p.line()).unwrap_or(0);
        let mut vals = Vec::new();
        for (k, w) in want.iter().enumerate() {
            let v = rec.get(idx[k]).unwrap_or("").trim();
            if v.is_empty() {
                return Err(IngestError::BadRow {
                    file: name.to_string(),
                    row: line,
                    column: w.to_string(),
                    message: "empty; every design row needs plot_id, treatment, block and field"
                        .into(),
                });
            }
            vals.push(v.to_string());
        }
        if let Some(prev) = seen.insert(vals[0].clone(), line) {
            return Err(IngestError::BadRow {
                file: name.to_string(),
                row: line,
                column: "plot_id".into(),
                message: format!("duplicate plot id {} (first on line {prev})", vals[0]),
            });
        }
        out.push(DesignRow {
            plot_id: vals[0].clone(),
            treatment: vals[1].clone(),
            block: vals[2].clone(),
            field: vals[3].clone(),
            row: line,
        });
    }
    if out.is_empty() {
        return Err(IngestError::Unusable {
            file: name.to_string(),
            message: "design table has no rows".into(),
        });
    }
    Ok(out)
}

/// Everything `plotsieve check` can find without writing: returns every problem.
pub fn check(cfg: &TrialConfig, base: &Path) -> Vec<String> {
    let mut problems = Vec::new();
    if let Err(e) = cfg.crop() {
        problems.push(e.to_string());
    }
    match monitor_files(cfg, base) {
        Err(e) => problems.push(e.to_string()),
        Ok(files) => {
            for p in files {
                let name = display(base, &p);
                let rdr = csv::ReaderBuilder::new()
                    .delimiter(cfg.columns.delimiter.as_bytes()[0])
                    .flexible(true)
                    .from_path(&p);
                match rdr {
                    Err(e) => problems.push(format!("{name}: cannot read: {e}")),
                    Ok(mut r) => match r.headers() {
                        Err(e) => problems.push(format!("{name}: header is not readable: {e}")),
                        Ok(h) => {
                            if let Err(e) = column_index(cfg, &h.clone(), &name) {
                                problems.push(e.to_string());
                            }
                        }
                    },
                }
            }
        }
    }
    let design = read_design(&base.join(&cfg.inputs.design), &cfg.inputs.design);
    let polys = if cfg.layout.is_empty() {
        read_geojson(
            &base.join(&cfg.inputs.plots),
            &cfg.inputs.plots,
            &cfg.inputs.plot_id_property,
        )
        .map(|p| (p, cfg.inputs.plots.clone()))
    } else {
        // Ids do not depend on where the grid lies.
        Ok((
            cfg.layout
                .iter()
                .flat_map(|l| l.polygons(0.0, 0.0))
                .collect(),
            "[[layout]]".to_string(),
        ))
    };
    match (polys, design) {
        (Ok((p, name)), Ok(d)) => match reconcile(cfg, &name, p, d) {
            Err(e) => problems.push(e.to_string()),
            Ok((_, _, warnings)) => {
                problems.extend(warnings.into_iter().map(|w| format!("warning: {w}")))
            }
        },
        (p, d) => {
            if let Err(e) = p {
                problems.push(e.to_string());
            }
            if let Err(e) = d {
                problems.push(e.to_string());
            }
        }
    }
    problems
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn iso8601_by_hand() {
        // 2000-01-01T00:00:00Z is 946 684 800 s after the epoch (known constant).
        assert_eq!(parse_iso8601("2000-01-01T00:00:00Z"), Some(946_684_800.0));
        assert_eq!(parse_iso8601("2000-01-01 00:00:01.5"), Some(946_684_801.5));
        assert_eq!(
            parse_iso8601("2000-01-01T02:00:00+02:00"),
            Some(946_684_800.0)
        );
        assert_eq!(parse_iso8601("1970-01-01T00:00:00Z"), Some(0.0));
        assert_eq!(parse_iso8601("2000-13-01T00:00:00Z"), None);
        assert_eq!(parse_iso8601("yesterday"), None);
    }

    #[test]
    fn unit_factors_are_exact_definitions() {
        assert_eq!(flow_factor(FlowUnit::LbS), 0.45359237);
        assert_eq!(speed_factor(SpeedUnit::Mph), 0.44704);
        assert!((speed_factor(SpeedUnit::KmH) * 3.6 - 1.0).abs() < 1e-15);
        assert_eq!(width_factor(WidthUnit::Ft), 0.3048);
    }
}
