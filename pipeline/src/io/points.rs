//! Point tables as Parquet: `1-ingest/points.parquet` (records in SI units, projected),
//! `2-clean/` and `3-plots/points.parquet` (clean points with what clean derived, the yield in
//! the output unit and, for plots, the plot id).

use super::write_atomic;
use anyhow::{Context, Result};
use plotsieve_stages::table::{CleanPoint, Point, PointSet};
use polars::prelude::{
    Column, DataFrame, ParquetCompression, ParquetReader, ParquetWriter, SerReader,
};
use std::path::Path;

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
    let mut cols = vec![
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
    ];
    // Yields given by a yield-point export (the column only where there are some).
    if pts.clone().any(|p| p.yield_kg_ha.is_finite()) {
        cols.push(f("yield_given_kg_ha", |p| p.yield_kg_ha));
    }
    cols
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
    let given = if df.column("yield_given_kg_ha").is_ok() {
        col_f64(df, "yield_given_kg_ha", path)?
    } else {
        vec![f64::NAN; df.height()]
    };
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
            yield_kg_ha: given[i],
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
