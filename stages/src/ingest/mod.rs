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
//!
//! Layout: [`formats`] (one file per monitor export format, registered in
//! [`formats::FORMATS`]), [`geojson`] (plot polygons), [`design`] (design table and its
//! agreement with the geometry), [`time`] (time stamps).

mod check;
pub mod design;
pub mod formats;
pub mod geojson;
pub mod geopackage;
pub mod grid;
pub mod layer;
pub mod layers;
pub mod layout_checks;
pub mod memory;
pub mod plot_checks;
pub mod plot_table;
pub mod rate_column;
#[cfg(test)]
mod robustness;
pub mod settings;
pub mod shapefile_plots;
pub mod strips;
pub mod time;
pub mod wkt;

pub use design::{read_design, reconcile};
pub use geojson::read_geojson;
pub use time::parse_iso8601;

use crate::ingest::settings::IngestConfig;
use crate::projection::{zone_of, Utm};
use crate::table::{DesignRow, PlotPolygon, Point, PointSet, Rejection, StageSummary};
pub use check::check;
use rayon::prelude::*;
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
    #[error("plot geometry is not usable:\n  {}", .0.join("\n  "))]
    BadPlots(Vec<String>),
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
pub fn display(base: &Path, p: &Path) -> String {
    p.strip_prefix(base)
        .unwrap_or(p)
        .to_string_lossy()
        .replace('\\', "/")
}

/// Open a delimited table and read its header; errors name the file.
pub(crate) fn open_table(
    path: &Path,
    name: &str,
    delimiter: u8,
) -> Result<(csv::Reader<std::fs::File>, csv::StringRecord), IngestError> {
    let mut rdr = csv::ReaderBuilder::new()
        .delimiter(delimiter)
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
    Ok((rdr, header))
}

/// A task-data set as one export per time log (`TASKDATA.XML#TLG00001`, ...); any other
/// file (or a set whose logs cannot be listed, for its reader to name the problem) as is.
fn by_time_log(p: PathBuf) -> Vec<PathBuf> {
    if formats::for_file(&p).name() != "iso11783_taskdata" {
        return vec![p];
    }
    match formats::taskdata::time_logs(&p) {
        Ok(logs) if !logs.is_empty() => logs
            .into_iter()
            .map(|l| PathBuf::from(format!("{}#{l}", p.display())))
            .collect(),
        _ => vec![p],
    }
}

/// The monitor export files named by `inputs.monitor` (folders give every file a format
/// claims, and the TASKDATA.XML of a task-data folder inside them, sorted).
pub fn monitor_files(cfg: &IngestConfig, base: &Path) -> Result<Vec<PathBuf>, IngestError> {
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
                .filter_map(|p| {
                    if p.is_dir() {
                        // A task-data folder copied in whole: its TASKDATA.XML.
                        std::fs::read_dir(&p)
                            .ok()?
                            .filter_map(|e| e.ok())
                            .map(|e| e.path())
                            .find(|f| {
                                f.file_name()
                                    .and_then(|n| n.to_str())
                                    .is_some_and(|n| n.eq_ignore_ascii_case("TASKDATA.XML"))
                            })
                    } else {
                        formats::is_export(&p).then_some(p)
                    }
                })
                .collect();
            v.sort();
            let v = v.into_iter().flat_map(by_time_log).collect::<Vec<_>>();
            if v.is_empty() {
                return Err(IngestError::Unusable {
                    file: entry.clone(),
                    message: "folder holds no .csv export".into(),
                });
            }
            out.extend(v);
        } else if p.is_file() {
            out.extend(by_time_log(p));
        } else {
            return Err(IngestError::Read {
                file: entry.clone(),
                message: "no such file or folder (inputs.monitor)".into(),
            });
        }
    }
    Ok(out)
}

/// The projection the settings ask for, or the zone of the median point.
pub fn choose_projection(
    cfg: &IngestConfig,
    lons: &[f64],
    lats: &[f64],
) -> Result<Utm, IngestError> {
    let zone = if cfg.ingest.utm_zone > 0 {
        cfg.ingest.utm_zone
    } else {
        zone_of(crate::util::median(lons)) as i64
    };
    let south = match cfg.ingest.hemisphere {
        settings::Hemisphere::North => false,
        settings::Hemisphere::South => true,
        settings::Hemisphere::Auto => crate::util::median(lats) < 0.0,
    };
    Ok(Utm::new(zone, south)?)
}

/// "export X: none of its N rows could be read (...)" for each export with no usable row.
fn unread_exports(
    names: &[String],
    raw: &[formats::RawPoint],
    rejections: &[Rejection],
) -> Vec<String> {
    let mut read = vec![0u64; names.len()];
    for r in raw {
        read[r.file as usize] += 1;
    }
    let mut out = Vec::new();
    for (_, name) in names.iter().enumerate().filter(|(i, _)| read[*i] == 0) {
        let mut by: std::collections::BTreeMap<&str, u64> = Default::default();
        for r in rejections.iter().filter(|r| *r.source_file == **name) {
            *by.entry(&*r.rule).or_default() += 1;
        }
        let n: u64 = by.values().sum();
        let why: Vec<String> = by.iter().map(|(r, k)| format!("{r}: {k}")).collect();
        out.push(format!(
            "export {name}: none of its {n} rows could be read ({}); it contributes nothing",
            why.join(", ")
        ));
    }
    out
}

/// Run ingest.
pub fn run(cfg: &IngestConfig, base: &Path) -> Result<IngestOutput, IngestError> {
    run_with(cfg, base, &crate::progress::Progress::none())
}

/// [`run`], reporting each export read to `progress`.
pub fn run_with(
    cfg: &IngestConfig,
    base: &Path,
    progress: &crate::progress::Progress,
) -> Result<IngestOutput, IngestError> {
    let files = monitor_files(cfg, base)?;
    let names: Vec<String> = files.iter().map(|p| display(base, p)).collect();
    formats::columns_needed(cfg, &files, &names)?;
    memory::check(
        &files,
        &names,
        cfg.ingest.max_memory_share,
        memory::machine_bytes(),
    )?;
    let Exports {
        raw,
        rejections,
        tags,
        count_in,
        zero_moisture,
        mut how,
    } = read_exports(cfg, &files, &names, progress)?;
    let labelled = cfg.plots_from_labels();
    let prescription = if cfg.inputs.prescription.is_empty() {
        Vec::new()
    } else {
        read_prescription(cfg, base)?
    };
    let design = if labelled {
        Vec::new()
    } else {
        read_design(&base.join(&cfg.inputs.design), &cfg.inputs.design)?
    };
    let polygons_ll = if cfg.layout.is_empty() && !labelled {
        cfg.read_plot_input(base)?
    } else {
        Vec::new()
    };
    let bad = plot_checks::problems(&polygons_ll, &cfg.inputs.plots);
    if !bad.is_empty() {
        return Err(IngestError::BadPlots(bad));
    }
    let utm = projection_for(cfg, &raw, &polygons_ll)?;
    let points = project_points(&raw, &utm)?;
    let mut strip_details = None;
    let mut strip_warnings = Vec::new();
    let (polygons, design) = if labelled {
        let (labels, tags) = if cfg.inputs.prescription.is_empty() {
            (raw.iter().map(|r| r.label).collect(), tags)
        } else {
            strips::label_by_polygons(&points, &project_polygons(&utm, prescription)?)
        };
        let built = strips::build(
            &points,
            &labels,
            &tags,
            &names,
            &strips::StripSettings {
                plot_length_m: cfg.ingest.strip_plot_length_m,
                min_records: cfg.ingest.strip_min_records,
                fallback_width_m: cfg
                    .columns
                    .width
                    .value
                    .map(|v| v * formats::column_map::width_factor(cfg.columns.width.unit)),
                source: label_source(cfg),
            },
        )
        .map_err(|message| IngestError::Unusable {
            file: label_source(cfg),
            message,
        })?;
        strip_details = Some(built.details);
        strip_warnings = built.warnings;
        (built.polygons, built.design)
    } else if cfg.layout.is_empty() {
        (project_polygons(&utm, polygons_ll)?, design)
    } else {
        let mut v = Vec::new();
        for l in &cfg.layout {
            let (ox, oy) = utm.forward(l.origin_lon, l.origin_lat)?;
            v.extend(l.polygons(ox, oy));
        }
        (v, design)
    };
    let plots_name = if labelled {
        format!("the treatment labels ({})", label_source(cfg))
    } else if cfg.layout.is_empty() {
        cfg.inputs.plots.clone()
    } else {
        "[[layout]]".to_string()
    };
    let (polygons, design, mut warnings) = reconcile(cfg, &plots_name, polygons, design)?;
    warnings.extend(strip_warnings);
    warnings.extend(unread_exports(&names, &raw, &rejections));
    warnings.extend(design_layout_warnings(&polygons, &design));
    warnings.extend(zero_moisture);
    if let Some(d) = &strip_details {
        how.insert("(plots)".into(), strips_words(cfg, d));
    }
    let mut summary = StageSummary::from_rejections("ingest", "points", count_in, &rejections);
    for (key, value) in [
        ("epsg", serde_json::json!(utm.epsg())),
        ("files", serde_json::json!(names.len())),
        ("read_as", serde_json::json!(how)),
        ("plots", serde_json::json!(polygons.len())),
        ("warnings", serde_json::json!(warnings)),
    ] {
        summary.details.insert(key.into(), value);
    }
    if let Some(d) = strip_details {
        summary.details.insert("plots_from_labels".into(), d);
    }
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

/// The records as points, projected (in parallel).
fn project_points(raw: &[formats::RawPoint], utm: &Utm) -> Result<Vec<Point>, IngestError> {
    let projected: Result<Vec<(f64, f64)>, _> =
        raw.par_iter().map(|r| utm.forward(r.lon, r.lat)).collect();
    let projected = projected?;
    Ok(raw
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
            applied_rate: r.optional[3],
            yield_kg_ha: r.yield_kg_ha,
        })
        .collect())
}

/// Every export as read, in the trial's order, with the labels of all of them.
struct Exports {
    raw: Vec<formats::RawPoint>,
    rejections: Vec<Rejection>,
    /// Treatment, strip and replicate labels of the records, over all exports (0: none).
    tags: Vec<[String; 3]>,
    count_in: u64,
    /// Exports whose moisture read 0 (no reading) in some records.
    zero_moisture: Vec<String>,
    /// How each export was read (format and mapping), for the summary and the report.
    how: std::collections::BTreeMap<String, String>,
}

/// Read every export (in parallel, each on its own), then take them in order.
fn read_exports(
    cfg: &IngestConfig,
    files: &[PathBuf],
    names: &[String],
    progress: &crate::progress::Progress,
) -> Result<Exports, IngestError> {
    progress.start(files.len() as u64, "exports read");
    let mut raw: Vec<formats::RawPoint> = Vec::new();
    let mut rejections = Vec::new();
    // Treatment, strip and replicate labels of the records, over all exports (0: none).
    let mut tags: Vec<[String; 3]> = vec![Default::default()];
    let mut count_in = 0;
    // Exports whose moisture read 0 (no reading) in some records.
    let mut zero_moisture: Vec<String> = Vec::new();
    // How each export was read (format and mapping), for the summary and the report.
    let mut how: std::collections::BTreeMap<String, String> = Default::default();
    // Exports are read in parallel (each on its own), then taken in order.
    let reads: Vec<Result<(String, formats::ExportRead), IngestError>> = files
        .par_iter()
        .zip(names)
        .enumerate()
        .map(|(i, (p, name))| {
            let format = formats::for_file(p);
            let described = format!("{}: {}", format.name(), format.describe_file(cfg, p));
            let read = format.read(cfg, p, name, i as u32)?;
            progress.step();
            Ok((described, read))
        })
        .collect();
    for (read, name) in reads.into_iter().zip(names) {
        let (described, read) = read?;
        how.insert(name.clone(), described);
        count_in += read.rows;
        // The export's label indices to the trial's (its entry 0, no label, stays 0).
        let global: Vec<u32> = read
            .labels
            .iter()
            .map(|l| strips::intern(&mut tags, l))
            .collect();
        raw.extend(read.points.into_iter().map(|mut p| {
            p.label = global.get(p.label as usize).copied().unwrap_or(0);
            p
        }));
        rejections.extend(read.rejections);
        zero_moisture.extend(read.zero_moisture.iter().filter_map(|z| z.warning()));
    }
    Ok(Exports {
        raw,
        rejections,
        tags,
        count_in,
        zero_moisture,
        how,
    })
}

/// The trial's projection, from the records' positions, else the grid layouts' origins,
/// else (no readable record at all) the plots'.
fn projection_for(
    cfg: &IngestConfig,
    raw: &[formats::RawPoint],
    polygons_ll: &[PlotPolygon],
) -> Result<Utm, IngestError> {
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
    choose_projection(cfg, &lons, &lats)
}

/// How the plots were made from the treatment labels, per field, in words (beside how each
/// export was read: the report shows both).
fn strips_words(cfg: &IngestConfig, d: &serde_json::Value) -> String {
    let fields: Vec<String> = d["fields"]
        .as_object()
        .map(|m| {
            m.iter()
                .map(|(f, x)| {
                    format!(
                        "{f}: {} plots in {} strips (travel {} degrees, swath {} m)",
                        x["plots"], x["strips"], x["bearing_deg"], x["swath_m"]
                    )
                })
                .collect()
        })
        .unwrap_or_default();
    format!(
        "built from the treatment labels ({}): {}",
        label_source(cfg),
        fields.join("; ")
    )
}

/// Where a trial's treatment labels come from, in words with the setting.
fn label_source(cfg: &IngestConfig) -> String {
    if cfg.inputs.prescription.is_empty() {
        format!("column {:?}, columns.treatment", cfg.columns.treatment)
    } else {
        format!(
            "the prescription polygons of {} by their {:?}, inputs.prescription",
            cfg.inputs.prescription, cfg.inputs.prescription_property
        )
    }
}

/// The prescription polygons in WGS84 lon/lat, named by their treatment, checked as plots
/// are.
fn read_prescription(cfg: &IngestConfig, base: &Path) -> Result<Vec<PlotPolygon>, IngestError> {
    let name = &cfg.inputs.prescription;
    let polys = geojson::read_polygon_layer(
        &base.join(name),
        name,
        &cfg.inputs.prescription_property,
        "inputs.prescription_property",
        &cfg.inputs.crs,
        &cfg.inputs.layer,
    )?;
    let bad = plot_checks::problems(&polys, name);
    if !bad.is_empty() {
        return Err(IngestError::BadPlots(bad));
    }
    Ok(polys)
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

/// Exports none of whose readable points lies within `far_m` of the plots' extent (lon/lat
/// swapped, projected coordinates read as degrees, another trial's export).
fn far_exports(
    exports: &[(String, u64, Vec<(f64, f64)>)],
    polys: &[PlotPolygon],
    far_m: f64,
) -> Vec<String> {
    let (mut a, mut b, mut c, mut d) = (f64::MAX, f64::MAX, f64::MIN, f64::MIN);
    for (lon, lat) in polys.iter().flat_map(|p| p.exterior.iter()) {
        a = a.min(*lon);
        b = b.min(*lat);
        c = c.max(*lon);
        d = d.max(*lat);
    }
    // Degrees of latitude and longitude that far_m spans at the plots (111,195 m per degree).
    let dlat = far_m / 111_195.0;
    let dlon = dlat / (0.5 * (b + d)).to_radians().cos().max(0.01);
    let mut out = Vec::new();
    for (name, _, pos) in exports.iter().filter(|e| !e.2.is_empty()) {
        let near = pos
            .iter()
            .filter(|(lon, lat)| {
                *lon >= a - dlon && *lon <= c + dlon && *lat >= b - dlat && *lat <= d + dlat
            })
            .count();
        if near == 0 {
            out.push(format!(
                "{name}: none of its {} readable points lies within plots.far_m = {far_m} m of the plots (lon/lat swapped, projected coordinates, or another trial's export?)",
                pos.len()
            ));
        }
    }
    out
}

/// "field F: treatment T has a single plot" for each such pair of the design table.
fn single_plot_treatments(design: &[DesignRow]) -> Vec<String> {
    let mut n: std::collections::BTreeMap<(&str, &str), u64> = Default::default();
    for r in design {
        *n.entry((r.field.as_str(), r.treatment.as_str()))
            .or_default() += 1;
    }
    n.into_iter()
        .filter(|(_, k)| *k == 1)
        .map(|((f, t), _)| {
            format!(
                "field {f}: treatment {t} has a single plot in the design (a typo in its name?)"
            )
        })
        .collect()
}

/// Warnings about how the design lies on the plots ([`layout_checks`]): blocks that repeat
/// one treatment order.
fn design_layout_warnings(polygons: &[PlotPolygon], design: &[DesignRow]) -> Vec<String> {
    let centre: std::collections::HashMap<&str, (f64, f64)> = polygons
        .iter()
        .map(|p| {
            let ring = &p.exterior[..p.exterior.len().saturating_sub(1).max(1)];
            let n = ring.len() as f64;
            let (x, y) = ring
                .iter()
                .fold((0.0, 0.0), |(a, b), (x, y)| (a + x, b + y));
            (p.plot_id.as_str(), (x / n, y / n))
        })
        .collect();
    let placed: Vec<layout_checks::Placed> = design
        .iter()
        .filter_map(|d| {
            centre
                .get(d.plot_id.as_str())
                .map(|&(x, y)| layout_checks::Placed {
                    field: &d.field,
                    block: &d.block,
                    treatment: &d.treatment,
                    x,
                    y,
                })
        })
        .collect();
    layout_checks::design_warnings(&placed)
}
