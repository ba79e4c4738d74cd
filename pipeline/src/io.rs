//! Reading and writing the run folder's tables. Every write goes to a temporary file in the
//! same folder and is renamed into place, so a reader never sees half a table. Floats are
//! written with fixed decimals and tables in a fixed order, so the same inputs and settings
//! give the same bytes.

use anyhow::{anyhow, bail, Context, Result};
use plotsieve_stages::adjust::{AdjustedPlot, Comparison, FieldHyper, Summary, TreatmentRow};
use plotsieve_stages::plots::PlotStats;
use plotsieve_stages::table::{CleanPoint, DesignRow, PlotPolygon, Point, PointSet, Rejection};
use plotsieve_stages::util::fmt;
use polars::prelude::{
    Column, DataFrame, ParquetCompression, ParquetReader, ParquetWriter, SerReader,
};
use std::io::Write;
use std::path::Path;

/// Write bytes atomically: temporary file in the same folder, flushed, then renamed.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    let dir = path
        .parent()
        .ok_or_else(|| anyhow!("{} has no parent folder", path.display()))?;
    std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    let name = path.file_name().and_then(|n| n.to_str()).unwrap_or("out");
    let tmp = dir.join(format!(".{name}.{}.tmp", std::process::id()));
    {
        let mut f =
            std::fs::File::create(&tmp).with_context(|| format!("creating {}", tmp.display()))?;
        f.write_all(bytes)
            .with_context(|| format!("writing {}", tmp.display()))?;
        f.sync_all().ok();
    }
    std::fs::rename(&tmp, path)
        .with_context(|| format!("renaming {} to {}", tmp.display(), path.display()))?;
    Ok(())
}

/// JSON, pretty, newline-terminated, atomically.
pub fn write_json<T: serde::Serialize>(path: &Path, v: &T) -> Result<()> {
    let mut s = serde_json::to_string_pretty(v)?;
    s.push('\n');
    write_atomic(path, s.as_bytes())
}

fn csv_bytes(header: &[&str], rows: impl Iterator<Item = Vec<String>>) -> Result<Vec<u8>> {
    let mut w = csv::Writer::from_writer(Vec::new());
    w.write_record(header)?;
    for r in rows {
        w.write_record(&r)?;
    }
    Ok(w.into_inner().map_err(|e| anyhow!("{e}"))?)
}

/// Open a CSV the run folder should hold; a missing file says what to run.
fn open_csv(path: &Path, hint: &str) -> Result<csv::Reader<std::fs::File>> {
    csv::Reader::from_path(path).with_context(|| format!("{} is missing: {hint}", path.display()))
}

/// Every record of such a CSV.
fn records(path: &Path, hint: &str) -> Result<Vec<csv::StringRecord>> {
    open_csv(path, hint)?
        .records()
        .collect::<Result<Vec<_>, _>>()
        .with_context(|| format!("reading {}", path.display()))
}

/// `rejected.csv`.
pub fn write_rejections(path: &Path, rows: &[Rejection]) -> Result<()> {
    let bytes = csv_bytes(
        &[
            "source_file",
            "source_row",
            "id",
            "rule",
            "column",
            "value",
            "limit",
        ],
        rows.iter().map(|r| {
            vec![
                r.source_file.clone(),
                r.source_row.to_string(),
                r.id.clone(),
                r.rule.clone(),
                r.column.clone(),
                r.value.clone(),
                r.limit.clone(),
            ]
        }),
    )?;
    write_atomic(path, &bytes)
}

fn write_parquet(path: &Path, columns: Vec<Column>) -> Result<()> {
    let height = columns.first().map(|c| c.len()).unwrap_or(0);
    let mut df = DataFrame::new(height, columns)?;
    let mut buf = Vec::new();
    ParquetWriter::new(&mut buf)
        .with_compression(ParquetCompression::Zstd(None))
        .set_parallel(false)
        .finish(&mut df)?;
    write_atomic(path, &buf)
}

fn base_columns<'a>(files: &[String], pts: impl Iterator<Item = &'a Point> + Clone) -> Vec<Column> {
    let f = |name: &str, g: fn(&Point) -> f64| {
        Column::new(name.into(), pts.clone().map(g).collect::<Vec<f64>>())
    };
    vec![
        Column::new(
            "point_id".into(),
            pts.clone().map(|p| p.id).collect::<Vec<u64>>(),
        ),
        Column::new(
            "source_file".into(),
            pts.clone()
                .map(|p| files[p.file as usize].as_str())
                .collect::<Vec<&str>>(),
        ),
        Column::new(
            "file_index".into(),
            pts.clone().map(|p| p.file).collect::<Vec<u32>>(),
        ),
        Column::new(
            "source_row".into(),
            pts.clone().map(|p| p.row).collect::<Vec<u64>>(),
        ),
        f("time_s", |p| p.time_s),
        f("lon_deg", |p| p.lon),
        f("lat_deg", |p| p.lat),
        f("x_m", |p| p.x_m),
        f("y_m", |p| p.y_m),
        f("flow_kg_s", |p| p.flow_kg_s),
        f("speed_m_s", |p| p.speed_m_s),
        f("width_m", |p| p.width_m),
        f("moisture_pct", |p| p.moisture_pct),
        f("work_state", |p| p.work_state),
        f("hdop", |p| p.hdop),
        f("fix_quality", |p| p.fix_quality),
    ]
}

/// Ingest's `points.parquet`.
pub fn write_points(path: &Path, set: &PointSet) -> Result<()> {
    write_parquet(path, base_columns(&set.files, set.points.iter()))
}

/// Clean's (and, with plot ids, plots') `points.parquet`.
pub fn write_clean_points(
    path: &Path,
    files: &[String],
    pts: &[CleanPoint],
    yield_out: Option<(&str, Vec<f64>)>,
    plot_ids: Option<Vec<&str>>,
) -> Result<()> {
    let mut cols = base_columns(files, pts.iter().map(|p| &p.base));
    let f = |name: &str, g: fn(&CleanPoint) -> f64| {
        Column::new(name.into(), pts.iter().map(g).collect::<Vec<f64>>())
    };
    cols.push(Column::new(
        "pass".into(),
        pts.iter().map(|p| p.pass).collect::<Vec<u32>>(),
    ));
    cols.push(f("flow_shifted_kg_s", |p| p.flow_shifted_kg_s));
    cols.push(f("moisture_shifted_pct", |p| p.moisture_shifted_pct));
    cols.push(f("yield_wet_kg_ha", |p| p.yield_wet_kg_ha));
    cols.push(f("yield_std_kg_ha", |p| p.yield_std_kg_ha));
    if let Some((name, v)) = yield_out {
        cols.push(Column::new(name.into(), v));
    }
    if let Some(ids) = plot_ids {
        cols.push(Column::new("plot_id".into(), ids));
    }
    write_parquet(path, cols)
}

fn read_df(path: &Path, upstream: &str) -> Result<DataFrame> {
    let f = std::fs::File::open(path).with_context(|| {
        format!(
            "{} is missing: run stage {upstream} first (plotsieve stage {upstream} ...)",
            path.display()
        )
    })?;
    ParquetReader::new(f)
        .finish()
        .with_context(|| format!("reading {}", path.display()))
}

fn col_f64(df: &DataFrame, name: &str, path: &Path) -> Result<Vec<f64>> {
    let c = df
        .column(name)
        .with_context(|| format!("{}: no column {name}", path.display()))?;
    let ca = c
        .f64()
        .with_context(|| format!("{}: column {name} is not f64", path.display()))?;
    Ok(ca.iter().map(|v| v.unwrap_or(f64::NAN)).collect())
}

fn col_u64(df: &DataFrame, name: &str, path: &Path) -> Result<Vec<u64>> {
    let c = df
        .column(name)
        .with_context(|| format!("{}: no column {name}", path.display()))?;
    let ca = c
        .u64()
        .with_context(|| format!("{}: column {name} is not u64", path.display()))?;
    Ok(ca.iter().map(|v| v.unwrap_or(0)).collect())
}

fn col_u32(df: &DataFrame, name: &str, path: &Path) -> Result<Vec<u32>> {
    let c = df
        .column(name)
        .with_context(|| format!("{}: no column {name}", path.display()))?;
    let ca = c
        .u32()
        .with_context(|| format!("{}: column {name} is not u32", path.display()))?;
    Ok(ca.iter().map(|v| v.unwrap_or(0)).collect())
}

fn col_str(df: &DataFrame, name: &str, path: &Path) -> Result<Vec<String>> {
    let c = df
        .column(name)
        .with_context(|| format!("{}: no column {name}", path.display()))?;
    let ca = c
        .str()
        .with_context(|| format!("{}: column {name} is not text", path.display()))?;
    Ok(ca.iter().map(|v| v.unwrap_or("").to_string()).collect())
}

fn read_base(df: &DataFrame, path: &Path, epsg: u32) -> Result<PointSet> {
    let names = col_str(df, "source_file", path)?;
    let idx = col_u32(df, "file_index", path)?;
    let mut files: Vec<String> = Vec::new();
    for (i, n) in idx.iter().zip(&names) {
        let i = *i as usize;
        if files.len() <= i {
            files.resize(i + 1, String::new());
        }
        files[i] = n.clone();
    }
    let id = col_u64(df, "point_id", path)?;
    let row = col_u64(df, "source_row", path)?;
    let cols: Vec<Vec<f64>> = [
        "time_s",
        "lon_deg",
        "lat_deg",
        "x_m",
        "y_m",
        "flow_kg_s",
        "speed_m_s",
        "width_m",
        "moisture_pct",
        "work_state",
        "hdop",
        "fix_quality",
    ]
    .iter()
    .map(|c| col_f64(df, c, path))
    .collect::<Result<_>>()?;
    let points = (0..df.height())
        .map(|i| Point {
            id: id[i],
            file: idx[i],
            row: row[i],
            time_s: cols[0][i],
            lon: cols[1][i],
            lat: cols[2][i],
            x_m: cols[3][i],
            y_m: cols[4][i],
            flow_kg_s: cols[5][i],
            speed_m_s: cols[6][i],
            width_m: cols[7][i],
            moisture_pct: cols[8][i],
            work_state: cols[9][i],
            hdop: cols[10][i],
            fix_quality: cols[11][i],
        })
        .collect();
    Ok(PointSet {
        files,
        points,
        epsg,
    })
}

/// Read ingest's points back.
pub fn read_points(path: &Path, epsg: u32) -> Result<PointSet> {
    let df = read_df(path, "ingest")?;
    read_base(&df, path, epsg)
}

/// Read clean's points back.
pub fn read_clean_points(path: &Path) -> Result<(Vec<String>, Vec<CleanPoint>)> {
    let df = read_df(path, "clean")?;
    let set = read_base(&df, path, 0)?;
    let pass = col_u32(&df, "pass", path)?;
    let v: Vec<Vec<f64>> = [
        "flow_shifted_kg_s",
        "moisture_shifted_pct",
        "yield_wet_kg_ha",
        "yield_std_kg_ha",
    ]
    .iter()
    .map(|c| col_f64(&df, c, path))
    .collect::<Result<_>>()?;
    let pts = set
        .points
        .into_iter()
        .enumerate()
        .map(|(i, base)| CleanPoint {
            base,
            pass: pass[i],
            flow_shifted_kg_s: v[0][i],
            moisture_shifted_pct: v[1][i],
            yield_wet_kg_ha: v[2][i],
            yield_std_kg_ha: v[3][i],
        })
        .collect();
    Ok((set.files, pts))
}

/// Projected plot polygons as GeoJSON with the EPSG code as a named CRS (the 2008 GeoJSON
/// form; RFC 7946 readers that want lon/lat should use the input file instead).
pub fn write_projected_plots(path: &Path, polys: &[PlotPolygon], epsg: u32) -> Result<()> {
    let r = |ring: &[(f64, f64)]| -> Vec<serde_json::Value> {
        ring.iter()
            .map(|(x, y)| serde_json::json!([(x * 1e4).round() / 1e4, (y * 1e4).round() / 1e4]))
            .collect()
    };
    let features: Vec<serde_json::Value> = polys
        .iter()
        .map(|p| {
            let mut rings = vec![r(&p.exterior)];
            rings.extend(p.holes.iter().map(|h| r(h)));
            serde_json::json!({"type": "Feature", "properties": {"plot_id": p.plot_id},
                "geometry": {"type": "Polygon", "coordinates": rings}})
        })
        .collect();
    let v = serde_json::json!({
        "type": "FeatureCollection",
        "crs": {"type": "name", "properties": {"name": format!("urn:ogc:def:crs:EPSG::{epsg}")}},
        "features": features,
    });
    write_json(path, &v)
}

/// Design table as validated by ingest.
pub fn write_design(path: &Path, rows: &[DesignRow]) -> Result<()> {
    let bytes = csv_bytes(
        &["plot_id", "treatment", "block", "field", "source_row"],
        rows.iter().map(|d| {
            vec![
                d.plot_id.clone(),
                d.treatment.clone(),
                d.block.clone(),
                d.field.clone(),
                d.row.to_string(),
            ]
        }),
    )?;
    write_atomic(path, &bytes)
}

/// Read the design table written by [`write_design`].
pub fn read_design(path: &Path) -> Result<Vec<DesignRow>> {
    let mut rdr = csv::Reader::from_path(path)
        .with_context(|| format!("{} is missing: run stage ingest first", path.display()))?;
    let mut out = Vec::new();
    for r in rdr.records() {
        let r = r.with_context(|| format!("reading {}", path.display()))?;
        out.push(DesignRow {
            plot_id: r[0].to_string(),
            treatment: r[1].to_string(),
            block: r[2].to_string(),
            field: r[3].to_string(),
            row: r[4]
                .parse()
                .with_context(|| format!("{}: bad source_row", path.display()))?,
        });
    }
    Ok(out)
}

const PLOT_COLUMNS: [&str; 23] = [
    "plot_id",
    "field",
    "treatment",
    "block",
    "status",
    "reason",
    "points",
    "yield_mean",
    "yield_median",
    "yield_trimmed_mean",
    "yield_sd",
    "moisture_mean_pct",
    "centroid_x_m",
    "centroid_y_m",
    "area_m2",
    "net_area_m2",
    "harvested_m2",
    "coverage",
    "grid_range",
    "grid_row",
    "along_m",
    "across_m",
    "source",
];

fn plot_header(unit: &str) -> Vec<String> {
    PLOT_COLUMNS
        .iter()
        .map(|c| {
            if c.starts_with("yield_") {
                format!("{c}_{unit}")
            } else {
                c.to_string()
            }
        })
        .collect()
}

fn plot_values(p: &PlotStats) -> Vec<String> {
    vec![
        p.plot_id.clone(),
        p.field.clone(),
        p.treatment.clone(),
        p.block.clone(),
        p.status.clone(),
        p.reason.clone(),
        p.points.to_string(),
        fmt(p.yield_mean, 6),
        fmt(p.yield_median, 6),
        fmt(p.yield_trimmed_mean, 6),
        fmt(p.yield_sd, 6),
        fmt(p.moisture_mean_pct, 4),
        fmt(p.centroid_x_m, 4),
        fmt(p.centroid_y_m, 4),
        fmt(p.area_m2, 4),
        fmt(p.net_area_m2, 4),
        fmt(p.harvested_m2, 4),
        fmt(p.coverage, 6),
        p.grid_range.to_string(),
        p.grid_row.to_string(),
        fmt(p.along_m, 4),
        fmt(p.across_m, 4),
        "monitor".into(),
    ]
}

/// The plot's statistics as GeoJSON properties (same names as `plots.csv`).
pub fn plot_properties(p: &PlotStats, unit: &str) -> serde_json::Map<String, serde_json::Value> {
    plot_header(unit)
        .into_iter()
        .zip(plot_values(p))
        .map(|(k, v)| {
            let val = match v.parse::<f64>() {
                Ok(x) if !["plot_id", "field", "treatment", "block"].contains(&k.as_str()) => {
                    serde_json::json!(x)
                }
                _ => serde_json::json!(v),
            };
            (k, val)
        })
        .collect()
}

/// Polygons back in WGS84 lon/lat (RFC 7946: counterclockwise exterior, 8 decimals).
pub fn write_plots_wgs84<'a>(
    path: &Path,
    utm: &plotsieve_stages::projection::Utm,
    items: impl Iterator<
        Item = (
            &'a str,
            &'a [(f64, f64)],
            serde_json::Map<String, serde_json::Value>,
        ),
    >,
) -> Result<()> {
    let mut features = Vec::new();
    for (id, ring, mut props) in items {
        let mut ll: Vec<(f64, f64)> = ring
            .iter()
            .map(|&(x, y)| utm.inverse(x, y))
            .collect::<Result<_, _>>()?;
        if ll.first() != ll.last() {
            ll.push(ll[0]);
        }
        let area2: f64 = ll
            .windows(2)
            .map(|w| w[0].0 * w[1].1 - w[1].0 * w[0].1)
            .sum();
        if area2 < 0.0 {
            ll.reverse();
        }
        props.insert("plot_id".into(), serde_json::json!(id));
        let coords: Vec<serde_json::Value> = ll
            .iter()
            .map(|(x, y)| serde_json::json!([(x * 1e8).round() / 1e8, (y * 1e8).round() / 1e8]))
            .collect();
        features.push(serde_json::json!({"type": "Feature", "properties": props,
            "geometry": {"type": "Polygon", "coordinates": [coords]}}));
    }
    write_json(
        path,
        &serde_json::json!({"type": "FeatureCollection", "features": features}),
    )
}

/// `plots.csv`; yield columns carry the unit, e.g. `yield_mean_t_ha`.
pub fn write_plots(path: &Path, plots: &[PlotStats], unit: &str) -> Result<()> {
    let header = plot_header(unit);
    let h: Vec<&str> = header.iter().map(|s| s.as_str()).collect();
    let bytes = csv_bytes(&h, plots.iter().map(plot_values))?;
    write_atomic(path, &bytes)
}

/// Read `plots.csv` back (this run's or an analyst's own table with the same columns).
pub fn read_plots(path: &Path, unit: &str) -> Result<Vec<PlotStats>> {
    let mut rdr = csv::Reader::from_path(path)
        .with_context(|| format!("{} is missing: run stage plots first", path.display()))?;
    let header = rdr.headers()?.clone();
    let want = plot_header(unit);
    let idx: Vec<usize> = want
        .iter()
        .map(|w| {
            header.iter().position(|h| h == w).ok_or_else(|| {
                anyhow!(
                    "{}: no column {w} (found: {})",
                    path.display(),
                    header.iter().collect::<Vec<_>>().join(", ")
                )
            })
        })
        .collect::<Result<_>>()?;
    let mut out = Vec::new();
    for r in rdr.records() {
        let r = r.with_context(|| format!("reading {}", path.display()))?;
        let line = r.position().map(|p| p.line()).unwrap_or(0);
        let num = |k: usize| -> Result<f64> {
            let t = &r[idx[k]];
            if t.is_empty() {
                return Ok(f64::NAN);
            }
            t.parse().with_context(|| {
                format!(
                    "{}, line {line}, column {}: expected a number, found {t:?}",
                    path.display(),
                    want[k]
                )
            })
        };
        let s = |k: usize| r[idx[k]].to_string();
        out.push(PlotStats {
            plot_id: s(0),
            field: s(1),
            treatment: s(2),
            block: s(3),
            status: s(4),
            reason: s(5),
            points: num(6)? as u64,
            yield_mean: num(7)?,
            yield_median: num(8)?,
            yield_trimmed_mean: num(9)?,
            yield_sd: num(10)?,
            moisture_mean_pct: num(11)?,
            centroid_x_m: num(12)?,
            centroid_y_m: num(13)?,
            area_m2: num(14)?,
            net_area_m2: num(15)?,
            harvested_m2: num(16)?,
            coverage: num(17)?,
            grid_range: num(18)? as u32,
            grid_row: num(19)? as u32,
            along_m: num(20)?,
            across_m: num(21)?,
            net_ring: Vec::new(),
        });
    }
    if out.is_empty() {
        bail!("{}: no plots", path.display());
    }
    Ok(out)
}

/// An analyst's plot table for plot-table entry: plot_id, field, treatment, block,
/// `yield_<unit>`, and x_m and y_m, or row and range (times the spacings).
pub fn read_plot_table(
    path: &Path,
    shown: &str,
    unit: &str,
    row_spacing: f64,
    range_spacing: f64,
) -> Result<Vec<PlotStats>> {
    let mut rdr = csv::Reader::from_path(path)
        .with_context(|| format!("{shown}: cannot read the plot table (adjust.plot_table)"))?;
    let header = rdr.headers()?.clone();
    let col = |name: &str| header.iter().position(|h| h.trim() == name);
    let ycol = format!("yield_{unit}");
    let need = ["plot_id", "field", "treatment", "block", ycol.as_str()];
    let mut idx = Vec::new();
    for n in need {
        idx.push(col(n).ok_or_else(|| {
            anyhow!(
                "{shown}: no column {n} (found: {})",
                header.iter().collect::<Vec<_>>().join(", ")
            )
        })?);
    }
    let coords = match (col("x_m"), col("y_m"), col("row"), col("range")) {
        (Some(x), Some(y), _, _) => (x, y, 1.0, 1.0),
        (_, _, Some(r), Some(g)) => {
            if !(row_spacing > 0.0 && range_spacing > 0.0) {
                bail!("{shown}: a table with row and range needs adjust.row_spacing_m and adjust.range_spacing_m above 0");
            }
            (r, g, row_spacing, range_spacing)
        }
        _ => bail!("{shown}: needs columns x_m and y_m, or row and range"),
    };
    let mut out = Vec::new();
    for rec in rdr.records() {
        let rec = rec.with_context(|| format!("reading {shown}"))?;
        let line = rec.position().map(|p| p.line()).unwrap_or(0);
        let num = |k: usize, name: &str| -> Result<f64> {
            let t = rec.get(k).unwrap_or("").trim();
            t.parse::<f64>()
                .ok()
                .filter(|v| v.is_finite())
                .ok_or_else(|| {
                    anyhow!("{shown}, line {line}, column {name}: expected a number, found {t:?}")
                })
        };
        let s = |k: usize| rec.get(idx[k]).unwrap_or("").trim().to_string();
        let (cx, cy) = (
            num(coords.0, "x_m/row")? * coords.2,
            num(coords.1, "y_m/range")? * coords.3,
        );
        out.push(PlotStats::from_yield(
            &s(0),
            &s(1),
            &s(2),
            &s(3),
            num(idx[4], &ycol)?,
            cx,
            cy,
        ));
    }
    if out.is_empty() {
        bail!("{shown}: no plots");
    }
    Ok(out)
}

/// `adjusted_plots.csv`.
pub fn write_adjusted(path: &Path, rows: &[AdjustedPlot], unit: &str) -> Result<()> {
    let h = [
        "plot_id".to_string(),
        "field".into(),
        "treatment".into(),
        "block".into(),
        format!("raw_yield_{unit}"),
        format!("spatial_effect_{unit}"),
        format!("spatial_effect_sd_{unit}"),
        format!("adjusted_yield_{unit}"),
        format!("adjusted_yield_sd_{unit}"),
    ];
    let h: Vec<&str> = h.iter().map(|s| s.as_str()).collect();
    let bytes = csv_bytes(
        &h,
        rows.iter().map(|r| {
            vec![
                r.plot_id.clone(),
                r.field.clone(),
                r.treatment.clone(),
                r.block.clone(),
                fmt(r.raw, 6),
                fmt(r.spatial_mean, 6),
                fmt(r.spatial_sd, 6),
                fmt(r.adjusted, 6),
                fmt(r.adjusted_sd, 6),
            ]
        }),
    )?;
    write_atomic(path, &bytes)
}

/// Read `adjusted_plots.csv` back for the report.
pub fn read_adjusted(path: &Path) -> Result<Vec<AdjustedPlot>> {
    let mut out = Vec::new();
    for r in records(path, "run stage adjust first")? {
        let n = |k: usize| -> f64 { r[k].parse().unwrap_or(f64::NAN) };
        out.push(AdjustedPlot {
            plot_id: r[0].to_string(),
            field: r[1].to_string(),
            treatment: r[2].to_string(),
            block: r[3].to_string(),
            raw: n(4),
            spatial_mean: n(5),
            spatial_sd: n(6),
            adjusted: n(7),
            adjusted_sd: n(8),
        });
    }
    Ok(out)
}

/// Read a stage's `rejected.csv` back.
pub fn read_rejections(path: &Path) -> Result<Vec<Rejection>> {
    let mut out = Vec::new();
    for r in records(path, "rerun its stage")? {
        out.push(Rejection {
            source_file: r[0].to_string(),
            source_row: r[1].parse().unwrap_or(0),
            id: r[2].to_string(),
            rule: r[3].to_string(),
            column: r[4].to_string(),
            value: r[5].to_string(),
            limit: r[6].to_string(),
        });
    }
    Ok(out)
}

/// `treatments.csv`.
pub fn write_treatments(path: &Path, rows: &[TreatmentRow], unit: &str) -> Result<()> {
    let h: Vec<String> = ["field", "treatment", "plots"]
        .iter()
        .map(|s| s.to_string())
        .chain(
            [
                "estimate",
                "sd",
                "lo95",
                "hi95",
                "uplift",
                "uplift_sd",
                "uplift_lo90",
                "uplift_hi90",
                "uplift_lo95",
                "uplift_hi95",
            ]
            .iter()
            .map(|c| format!("{c}_{unit}")),
        )
        .chain([
            "p_uplift_gt0".to_string(),
            format!("break_even_{unit}"),
            "p_uplift_gt_break_even".into(),
            "expected_net_return_per_ha".into(),
            format!("prior_mean_{unit}"),
            format!("prior_sd_{unit}"),
        ])
        .collect();
    let h: Vec<&str> = h.iter().map(|s| s.as_str()).collect();
    let bytes = csv_bytes(
        &h,
        rows.iter().map(|r| {
            vec![
                r.field.clone(),
                r.treatment.clone(),
                r.plots.to_string(),
                fmt(r.estimate, 6),
                fmt(r.sd, 6),
                fmt(r.lo95, 6),
                fmt(r.hi95, 6),
                fmt(r.uplift, 6),
                fmt(r.uplift_sd, 6),
                fmt(r.uplift_lo90, 6),
                fmt(r.uplift_hi90, 6),
                fmt(r.uplift_lo95, 6),
                fmt(r.uplift_hi95, 6),
                fmt(r.p_uplift_gt0, 6),
                fmt(r.break_even, 6),
                fmt(r.p_uplift_gt_break_even, 6),
                fmt(r.expected_net_return_per_ha, 2),
                fmt(r.prior_mean, 6),
                fmt(r.prior_sd, 6),
            ]
        }),
    )?;
    write_atomic(path, &bytes)
}

/// Read `treatments.csv` back for the report.
pub fn read_treatments(path: &Path, unit: &str) -> Result<Vec<TreatmentRow>> {
    let mut rdr = csv::Reader::from_path(path)
        .with_context(|| format!("{} is missing: run stage adjust first", path.display()))?;
    let header = rdr.headers()?.clone();
    if header.get(3) != Some(&format!("estimate_{unit}")) {
        bail!(
            "{}: columns are not in {unit}; rerun stage adjust",
            path.display()
        );
    }
    let mut out = Vec::new();
    for r in rdr.records() {
        let r = r?;
        let n = |k: usize| -> f64 { r.get(k).and_then(|v| v.parse().ok()).unwrap_or(f64::NAN) };
        out.push(TreatmentRow {
            field: r[0].to_string(),
            treatment: r[1].to_string(),
            plots: r[2].parse().unwrap_or(0),
            estimate: n(3),
            sd: n(4),
            lo95: n(5),
            hi95: n(6),
            uplift: n(7),
            uplift_sd: n(8),
            uplift_lo90: n(9),
            uplift_hi90: n(10),
            uplift_lo95: n(11),
            uplift_hi95: n(12),
            p_uplift_gt0: n(13),
            break_even: n(14),
            p_uplift_gt_break_even: n(15),
            expected_net_return_per_ha: n(16),
            prior_mean: n(17),
            prior_sd: n(18),
        });
    }
    Ok(out)
}

/// `comparison.csv`: the spatial model against the model without the spatial field.
pub fn write_comparison(path: &Path, rows: &[Comparison]) -> Result<()> {
    let bytes = csv_bytes(
        &[
            "field",
            "log_ml_spatial",
            "log_ml_rcbd",
            "efficiency",
            "moran_i_rcbd",
            "moran_i_spatial",
            "rank_changes",
        ],
        rows.iter().map(|c| {
            vec![
                c.field.clone(),
                fmt(c.log_ml_spatial, 6),
                fmt(c.log_ml_rcbd, 6),
                fmt(c.efficiency, 6),
                fmt(c.moran_rcbd, 6),
                fmt(c.moran_spatial, 6),
                c.rank_changes.join(" "),
            ]
        }),
    )?;
    write_atomic(path, &bytes)
}

/// Read `comparison.csv` back for the report.
pub fn read_comparison(path: &Path) -> Result<Vec<Comparison>> {
    let mut out = Vec::new();
    for r in records(path, "run stage adjust first")? {
        let n = |k: usize| -> f64 { r[k].parse().unwrap_or(f64::NAN) };
        out.push(Comparison {
            field: r[0].to_string(),
            log_ml_spatial: n(1),
            log_ml_rcbd: n(2),
            efficiency: n(3),
            moran_rcbd: n(4),
            moran_spatial: n(5),
            rank_changes: r[6].split_whitespace().map(String::from).collect(),
        });
    }
    Ok(out)
}

/// `hyperparameters.csv`.
pub fn write_hyper(path: &Path, rows: &[FieldHyper], unit: &str) -> Result<()> {
    let mut h: Vec<String> = vec!["field".into(), "plots".into()];
    let trio = |h: &mut Vec<String>, name: &str, suffix: &str| {
        h.push(format!("{name}{suffix}"));
        h.push(format!("{name}_lo95{suffix}"));
        h.push(format!("{name}_hi95{suffix}"));
    };
    trio(&mut h, "range", "_m");
    trio(&mut h, "range_across", "_m");
    trio(&mut h, "spatial_sd", &format!("_{unit}"));
    trio(&mut h, "noise_sd", &format!("_{unit}"));
    trio(&mut h, "spatial_share", "");
    trio(&mut h, "interaction_sd", &format!("_{unit}"));
    h.extend([
        "log_marginal_likelihood".into(),
        "method".into(),
        "warning".into(),
    ]);
    let h: Vec<&str> = h.iter().map(|s| s.as_str()).collect();
    let bytes = csv_bytes(
        &h,
        rows.iter().map(|r| {
            let mut v = vec![r.field.clone(), r.plots.to_string()];
            let mut put = |s: Summary, d: usize| {
                v.push(fmt(s.mean, d));
                v.push(fmt(s.lo95, d));
                v.push(fmt(s.hi95, d));
            };
            put(
                Summary {
                    mean: r.range_m,
                    lo95: r.range_lo95_m,
                    hi95: r.range_hi95_m,
                },
                4,
            );
            put(r.range_across, 4);
            put(r.spatial_sd_ci, 6);
            put(r.noise_sd_ci, 6);
            put(r.spatial_share_ci, 6);
            put(r.interaction_sd, 6);
            v.push(fmt(r.log_marginal_likelihood, 6));
            v.push(r.method.clone());
            v.push(r.warning.clone());
            v
        }),
    )?;
    write_atomic(path, &bytes)
}

/// Read `hyperparameters.csv` back for the report.
pub fn read_hyper(path: &Path) -> Result<Vec<FieldHyper>> {
    let mut out = Vec::new();
    for r in records(path, "run stage adjust first")? {
        let n = |k: usize| -> f64 { r[k].parse().unwrap_or(f64::NAN) };
        let s = |k: usize| Summary {
            mean: n(k),
            lo95: n(k + 1),
            hi95: n(k + 2),
        };
        out.push(FieldHyper {
            field: r[0].to_string(),
            plots: r[1].parse().unwrap_or(0),
            range_m: n(2),
            range_lo95_m: n(3),
            range_hi95_m: n(4),
            range_across: s(5),
            spatial_sd: n(8),
            spatial_sd_ci: s(8),
            noise_sd: n(11),
            noise_sd_ci: s(11),
            spatial_share: n(14),
            spatial_share_ci: s(14),
            interaction_sd: s(17),
            log_marginal_likelihood: n(20),
            method: r[21].to_string(),
            warning: r[22].to_string(),
        });
    }
    Ok(out)
}
