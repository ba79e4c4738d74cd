//! Point tables as Parquet: `1-ingest/points.parquet` (records in SI units, projected),
//! `2-clean/` and `3-plots/points.parquet` (clean points with what clean derived, the yield in
//! the output unit and, for plots, the plot id).

use super::write_atomic_with;
use anyhow::{Context, Result};
use plotsieve_stages::table::{CleanPoint, Point, PointSet};
use polars::prelude::{
    Column, DataFrame, ParquetCompression, ParquetReader, ParquetWriter, SerReader,
};
use std::path::Path;

/// Rows per row group of a point table: polars' own default, so that a table of up to this
/// many rows is written exactly as one `finish` writes it.
const ROW_GROUP: usize = 512 * 512;

/// A point table of `n` rows as Parquet, its columns made by `group` for one run of rows at a
/// time: a table of up to [`ROW_GROUP`] rows in one frame, a longer one a row group at a
/// time, so that no copy of the whole table is held beside the records it comes from (on
/// the 2.07 M-point harvest the writer of clean's table, running beside the plots stage,
/// held the whole run's peak memory).
fn write_parquet(
    path: &Path,
    n: usize,
    group: impl Fn(std::ops::Range<usize>) -> Vec<Column>,
) -> Result<()> {
    let frame = |rows: std::ops::Range<usize>| -> Result<DataFrame> {
        let height = rows.len();
        Ok(DataFrame::new(height, group(rows))?)
    };
    // LZ4 (the Parquet codec LZ4_RAW): on the 2.07 M-point harvest the front half inside
    // `run` took 15.0 s against 17.9 s with zstd (medians of alternating runs), for files
    // 38 % larger; the tables read back are the same (docs/benchmarks.md).
    fn writer<W: std::io::Write>(w: W) -> ParquetWriter<W> {
        ParquetWriter::new(w)
            .with_compression(ParquetCompression::Lz4Raw)
            .set_parallel(true)
    }
    write_atomic_with(path, |w| {
        if n <= ROW_GROUP {
            writer(w).finish(&mut frame(0..n)?)?;
            return Ok(());
        }
        let first = frame(0..ROW_GROUP)?;
        let mut batched = writer(w).batched(first.schema())?;
        batched.write_batch(&first)?;
        drop(first);
        for start in (ROW_GROUP..n).step_by(ROW_GROUP) {
            batched.write_batch(&frame(start..(start + ROW_GROUP).min(n))?)?;
        }
        batched.finish()?;
        Ok(())
    })
}

/// One record's values appended to their columns.
fn push_row<const N: usize>(cols: &mut [Vec<f64>; N], row: [f64; N]) {
    for (v, x) in cols.iter_mut().zip(row) {
        v.push(x);
    }
}

/// Named f64 columns.
fn f64_columns<const N: usize>(
    names: [&str; N],
    vals: [Vec<f64>; N],
) -> impl Iterator<Item = Column> + '_ {
    names
        .into_iter()
        .zip(vals)
        .map(|(name, v)| Column::new(name.into(), v))
}

/// Which of the optional base columns a table has: yields given by a yield-point export and
/// as-applied rates, each only where some record has one (decided over the whole table, so
/// that every row group has the same columns).
#[derive(Clone, Copy)]
struct Optional {
    given: bool,
    applied: bool,
}

impl Optional {
    fn of<'a>(mut pts: impl Iterator<Item = &'a Point> + Clone) -> Optional {
        Optional {
            given: pts.clone().any(|p| p.yield_kg_ha.is_finite()),
            applied: pts.any(|p| p.applied_rate.is_finite()),
        }
    }
}

fn base_columns<'a>(
    files: &[String],
    pts: impl Iterator<Item = &'a Point>,
    optional: Optional,
) -> Vec<Column> {
    // One pass over the records into every column (a record is 128 bytes: a pass per column
    // would stream the whole table once per column).
    let n = pts.size_hint().0;
    let mut ids: Vec<u64> = Vec::with_capacity(n);
    let mut names: Vec<&str> = Vec::with_capacity(n);
    let mut file_index: Vec<u32> = Vec::with_capacity(n);
    let mut rows: Vec<u64> = Vec::with_capacity(n);
    const F64: [&str; 12] = [
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
    ];
    let mut vals: [Vec<f64>; 12] = std::array::from_fn(|_| Vec::with_capacity(n));
    let mut given: Vec<f64> = Vec::with_capacity(n);
    let mut applied: Vec<f64> = Vec::with_capacity(n);
    for p in pts {
        ids.push(p.id);
        names.push(files[p.file as usize].as_str());
        file_index.push(p.file);
        rows.push(p.row);
        push_row(
            &mut vals,
            [
                p.time_s,
                p.lon,
                p.lat,
                p.x_m,
                p.y_m,
                p.flow_kg_s,
                p.speed_m_s,
                p.width_m,
                p.moisture_pct,
                p.work_state,
                p.hdop,
                p.fix_quality,
            ],
        );
        given.push(p.yield_kg_ha);
        applied.push(p.applied_rate);
    }
    let mut cols = vec![
        Column::new("point_id".into(), ids),
        Column::new("source_file".into(), names),
        Column::new("file_index".into(), file_index),
        Column::new("source_row".into(), rows),
    ];
    cols.extend(f64_columns(F64, vals));
    // Yields given by a yield-point export (the column only where there are some).
    if optional.given {
        cols.push(Column::new("yield_given_kg_ha".into(), given));
    }
    // As-applied rates (base units per hectare; the column only where there are some).
    if optional.applied {
        cols.push(Column::new("applied_rate_per_ha".into(), applied));
    }
    cols
}

/// Ingest's `points.parquet`.
pub fn write_points(path: &Path, set: &PointSet) -> Result<()> {
    let optional = Optional::of(set.points.iter());
    write_parquet(path, set.points.len(), |rows| {
        base_columns(&set.files, set.points[rows].iter(), optional)
    })
}

/// Clean's (and, with plot ids, plots') `points.parquet`: `yield_out` and `plot_ids` hold a
/// value per point.
pub fn write_clean_points(
    path: &Path,
    files: &[String],
    pts: &[CleanPoint],
    yield_out: Option<(&str, Vec<f64>)>,
    plot_ids: Option<Vec<&str>>,
) -> Result<()> {
    let optional = Optional::of(pts.iter().map(|p| &p.base));
    write_parquet(path, pts.len(), |rows| {
        clean_columns(files, pts, rows, optional, &yield_out, &plot_ids)
    })
}

/// The columns of rows `rows` of a clean point table (see [`write_clean_points`]).
fn clean_columns(
    files: &[String],
    pts: &[CleanPoint],
    rows: std::ops::Range<usize>,
    optional: Optional,
    yield_out: &Option<(&str, Vec<f64>)>,
    plot_ids: &Option<Vec<&str>>,
) -> Vec<Column> {
    let pts = &pts[rows.clone()];
    let mut cols = base_columns(files, pts.iter().map(|p| &p.base), optional);
    let n = pts.len();
    let mut pass: Vec<u32> = Vec::with_capacity(n);
    let mut vals: [Vec<f64>; 4] = std::array::from_fn(|_| Vec::with_capacity(n));
    for p in pts {
        pass.push(p.pass);
        push_row(
            &mut vals,
            [
                p.flow_shifted_kg_s,
                p.moisture_shifted_pct,
                p.yield_wet_kg_ha,
                p.yield_std_kg_ha,
            ],
        );
    }
    cols.push(Column::new("pass".into(), pass));
    cols.extend(f64_columns(
        [
            "flow_shifted_kg_s",
            "moisture_shifted_pct",
            "yield_wet_kg_ha",
            "yield_std_kg_ha",
        ],
        vals,
    ));
    if let Some((name, v)) = yield_out {
        cols.push(Column::new((*name).into(), &v[rows.clone()]));
    }
    if let Some(ids) = plot_ids {
        cols.push(Column::new("plot_id".into(), &ids[rows]));
    }
    cols
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

/// Take a column out of the frame (its memory goes as soon as it has been copied).
fn take(df: &mut DataFrame, name: &str, path: &Path) -> Result<Column> {
    df.drop_in_place(name)
        .with_context(|| format!("{}: no column {name}", path.display()))
}

/// Copy an f64 column into the rows (missing values as NaN), then drop it.
fn fill_f64<T>(
    df: &mut DataFrame,
    name: &str,
    path: &Path,
    rows: &mut [T],
    set: impl Fn(&mut T, f64),
) -> Result<()> {
    let c = take(df, name, path)?;
    let ca = c
        .f64()
        .with_context(|| format!("{}: column {name} is not f64", path.display()))?;
    // Chunk by chunk from the value slices (a missing value reads as NaN), not value by
    // value through options.
    let mut rest = rows;
    for arr in ca.downcast_iter() {
        let vals = arr.values().as_slice();
        let (now, later) = rest.split_at_mut(vals.len().min(rest.len()));
        match arr.validity().filter(|v| v.unset_bits() > 0) {
            None => {
                for (r, v) in now.iter_mut().zip(vals) {
                    set(r, *v);
                }
            }
            Some(valid) => {
                for ((r, v), ok) in now.iter_mut().zip(vals).zip(valid.iter()) {
                    set(r, if ok { *v } else { f64::NAN });
                }
            }
        }
        rest = later;
    }
    Ok(())
}

fn col_u64(df: &mut DataFrame, name: &str, path: &Path) -> Result<Vec<u64>> {
    let c = take(df, name, path)?;
    let ca = c
        .u64()
        .with_context(|| format!("{}: column {name} is not u64", path.display()))?;
    Ok(ca.iter().map(|v| v.unwrap_or(0)).collect())
}

fn col_u32(df: &mut DataFrame, name: &str, path: &Path) -> Result<Vec<u32>> {
    let c = take(df, name, path)?;
    let ca = c
        .u32()
        .with_context(|| format!("{}: column {name} is not u32", path.display()))?;
    Ok(ca.iter().map(|v| v.unwrap_or(0)).collect())
}

/// The point columns of the frame into `rows` (one per frame row, made by `new`), each
/// column dropped from the frame once copied; returns the file names by index.
fn read_base<T>(
    df: &mut DataFrame,
    path: &Path,
    new: impl Fn(Point) -> T,
    base: fn(&mut T) -> &mut Point,
) -> Result<(Vec<String>, Vec<T>)> {
    let idx = col_u32(df, "file_index", path)?;
    let mut files: Vec<String> = Vec::new();
    {
        let c = take(df, "source_file", path)?;
        let names = c
            .str()
            .with_context(|| format!("{}: column source_file is not text", path.display()))?;
        for (i, n) in idx.iter().zip(names.iter()) {
            let i = *i as usize;
            if files.len() <= i {
                files.resize(i + 1, String::new());
            }
            if files[i] != n.unwrap_or("") {
                files[i] = n.unwrap_or("").to_string();
            }
        }
    }
    let id = col_u64(df, "point_id", path)?;
    let row = col_u64(df, "source_row", path)?;
    let mut rows: Vec<T> = (0..idx.len())
        .map(|i| new(blank_point(id[i], idx[i], row[i])))
        .collect();
    drop((id, row, idx));
    for (name, set) in point_values() {
        // Yields given by a yield-point export and as-applied rates: their columns only
        // where some record has one.
        if OPTIONAL.contains(&name) && df.column(name).is_err() {
            continue;
        }
        fill_f64(df, name, path, &mut rows, |r, v| set(base(r), v))?;
    }
    Ok((files, rows))
}

/// The value columns a point table may lack (written only where some record has a value).
const OPTIONAL: [&str; 2] = ["yield_given_kg_ha", "applied_rate_per_ha"];

/// Every value column of a point table and the field of a record it fills.
fn point_values() -> [(&'static str, fn(&mut Point, f64)); 14] {
    [
        ("time_s", |p, v| p.time_s = v),
        ("lon_deg", |p, v| p.lon = v),
        ("lat_deg", |p, v| p.lat = v),
        ("x_m", |p, v| p.x_m = v),
        ("y_m", |p, v| p.y_m = v),
        ("flow_kg_s", |p, v| p.flow_kg_s = v),
        ("speed_m_s", |p, v| p.speed_m_s = v),
        ("width_m", |p, v| p.width_m = v),
        ("moisture_pct", |p, v| p.moisture_pct = v),
        ("work_state", |p, v| p.work_state = v),
        ("hdop", |p, v| p.hdop = v),
        ("fix_quality", |p, v| p.fix_quality = v),
        ("yield_given_kg_ha", |p, v| p.yield_kg_ha = v),
        ("applied_rate_per_ha", |p, v| p.applied_rate = v),
    ]
}

/// Read ingest's points back.
pub fn read_points(path: &Path, epsg: u32) -> Result<PointSet> {
    let mut df = read_df(path, "ingest")?;
    let (files, points) = read_base(&mut df, path, |p| p, |p| p)?;
    Ok(PointSet {
        files,
        points,
        epsg,
    })
}

/// A record with its id, file and row and every value missing.
fn blank_point(id: u64, file: u32, row: u64) -> Point {
    Point {
        id,
        file,
        row,
        time_s: f64::NAN,
        lon: f64::NAN,
        lat: f64::NAN,
        x_m: f64::NAN,
        y_m: f64::NAN,
        flow_kg_s: f64::NAN,
        speed_m_s: f64::NAN,
        width_m: f64::NAN,
        moisture_pct: f64::NAN,
        work_state: f64::NAN,
        hdop: f64::NAN,
        fix_quality: f64::NAN,
        applied_rate: f64::NAN,
        yield_kg_ha: f64::NAN,
    }
}

/// A record as the report's maps take it: id, position and yield.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct MapRecord {
    pub id: u64,
    pub x_m: f64,
    pub y_m: f64,
    pub yield_kg_ha: f64,
}

/// Ingest's records as the report's maps take them, the yield of each by `yield_of` from a
/// record holding only the values a yield comes from (every other value missing, file and
/// row 0). Only those columns are read, and no whole record is held.
pub fn read_map_points(path: &Path, yield_of: impl Fn(&Point) -> f64) -> Result<Vec<MapRecord>> {
    let f = std::fs::File::open(path).with_context(|| {
        format!(
            "{} is missing: run stage ingest first (plotsieve stage ingest ...)",
            path.display()
        )
    })?;
    let mut reader = ParquetReader::new(f);
    let schema = reader
        .schema()
        .with_context(|| format!("reading {}", path.display()))?;
    let wanted = [
        "x_m",
        "y_m",
        "flow_kg_s",
        "speed_m_s",
        "width_m",
        "moisture_pct",
        "yield_given_kg_ha",
    ];
    let values: Vec<_> = point_values()
        .into_iter()
        .filter(|(n, _)| wanted.contains(n) && (!OPTIONAL.contains(n) || schema.contains(n)))
        .collect();
    let mut names = vec!["point_id".to_string()];
    names.extend(values.iter().map(|(n, _)| n.to_string()));
    let mut df = reader
        .with_columns(Some(names))
        .finish()
        .with_context(|| format!("reading {}", path.display()))?;
    let id = col_u64(&mut df, "point_id", path)?;
    let mut cols: Vec<Vec<f64>> = Vec::with_capacity(values.len());
    for (name, _) in &values {
        let mut v = vec![f64::NAN; id.len()];
        fill_f64(&mut df, name, path, &mut v, |r, x| *r = x)?;
        cols.push(v);
    }
    drop(df);
    Ok(id
        .iter()
        .enumerate()
        .map(|(i, &id)| {
            let mut p = blank_point(id, 0, 0);
            for (c, (_, set)) in cols.iter().zip(&values) {
                set(&mut p, c[i]);
            }
            MapRecord {
                id,
                x_m: p.x_m,
                y_m: p.y_m,
                yield_kg_ha: yield_of(&p),
            }
        })
        .collect())
}

/// What reading a point table back gives for `files` and for the records' given yields, made
/// in memory: the file list up to the last file with a record, with the names of files
/// without one left blank (as `read_base` rebuilds it from the columns), and no given yield
/// where none is finite (the column is then not written). A stage handed its input in memory
/// inside one `run` sees exactly what it would read back when rerun alone.
pub fn as_read_back<T>(
    files: &[String],
    rows: &mut [T],
    base: fn(&mut T) -> &mut Point,
) -> Vec<String> {
    let mut used = vec![false; files.len()];
    let mut any_given = false;
    for r in rows.iter_mut() {
        let p = base(r);
        used[p.file as usize] = true;
        any_given |= p.yield_kg_ha.is_finite();
    }
    if !any_given {
        for r in rows.iter_mut() {
            base(r).yield_kg_ha = f64::NAN;
        }
    }
    let last = used.iter().rposition(|u| *u).map_or(0, |i| i + 1);
    (0..last)
        .map(|i| {
            if used[i] {
                files[i].clone()
            } else {
                String::new()
            }
        })
        .collect()
}

/// Read clean's points back.
pub fn read_clean_points(path: &Path) -> Result<(Vec<String>, Vec<CleanPoint>)> {
    let mut df = read_df(path, "clean")?;
    let (files, mut pts) = read_base(
        &mut df,
        path,
        |base| CleanPoint {
            base,
            pass: 0,
            flow_shifted_kg_s: f64::NAN,
            moisture_shifted_pct: f64::NAN,
            yield_wet_kg_ha: f64::NAN,
            yield_std_kg_ha: f64::NAN,
        },
        |p| &mut p.base,
    )?;
    let pass = col_u32(&mut df, "pass", path)?;
    for (p, v) in pts.iter_mut().zip(pass) {
        p.pass = v;
    }
    let fields: [(&str, fn(&mut CleanPoint, f64)); 4] = [
        ("flow_shifted_kg_s", |p, v| p.flow_shifted_kg_s = v),
        ("moisture_shifted_pct", |p, v| p.moisture_shifted_pct = v),
        ("yield_wet_kg_ha", |p, v| p.yield_wet_kg_ha = v),
        ("yield_std_kg_ha", |p, v| p.yield_std_kg_ha = v),
    ];
    for (name, set) in fields {
        fill_f64(&mut df, name, path, &mut pts, set)?;
    }
    Ok((files, pts))
}

#[cfg(test)]
mod tests;
