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

fn write_parquet(path: &Path, columns: Vec<Column>) -> Result<()> {
    let height = columns.first().map(|c| c.len()).unwrap_or(0);
    let mut df = DataFrame::new(height, columns)?;
    // LZ4 (the Parquet codec LZ4_RAW): on the 2.07 M-point harvest the front half inside
    // `run` took 15.0 s against 17.9 s with zstd (medians of alternating runs), for files
    // 38 % larger; the tables read back are the same (docs/benchmarks.md).
    write_atomic_with(path, |w| {
        ParquetWriter::new(w)
            .with_compression(ParquetCompression::Lz4Raw)
            .set_parallel(true)
            .finish(&mut df)?;
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

fn base_columns<'a>(files: &[String], pts: impl Iterator<Item = &'a Point>) -> Vec<Column> {
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
    if given.iter().any(|v| v.is_finite()) {
        cols.push(Column::new("yield_given_kg_ha".into(), given));
    }
    // As-applied rates (base units per hectare; the column only where there are some).
    if applied.iter().any(|v| v.is_finite()) {
        cols.push(Column::new("applied_rate_per_ha".into(), applied));
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
mod tests {
    use super::*;
    use polars::prelude::{ChunkedArray, Float64Type, IntoColumn, IntoSeries, NamedFrom};

    #[test]
    fn f64_columns_are_copied_chunk_by_chunk_with_missing_values_as_nan() {
        // Three chunks (as row groups read back give), nulls in the second, against the
        // value-by-value reading.
        let a: ChunkedArray<Float64Type> =
            ChunkedArray::new("v".into(), &[Some(1.5), Some(-0.0), Some(f64::NAN)]);
        let b: ChunkedArray<Float64Type> =
            ChunkedArray::new("v".into(), &[None, Some(2.0), None, Some(f64::INFINITY)]);
        let c: ChunkedArray<Float64Type> = ChunkedArray::new("v".into(), &[Some(7.0)]);
        let mut ca = a;
        ca.append(&b).unwrap();
        ca.append(&c).unwrap();
        assert_eq!(ca.chunks().len(), 3);
        let expected: Vec<f64> = ca.iter().map(|v| v.unwrap_or(f64::NAN)).collect();
        let mut df = DataFrame::new(8, vec![ca.into_series().into_column()]).unwrap();
        let mut rows = vec![0.25f64; 8];
        fill_f64(&mut df, "v", Path::new("t.parquet"), &mut rows, |r, v| {
            *r = v
        })
        .unwrap();
        let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<u64>>();
        assert_eq!(bits(&rows), bits(&expected));
        assert!(rows[3].is_nan() && rows[5].is_nan() && rows[1].is_sign_negative());
        // The column is gone from the frame once copied.
        assert!(df.column("v").is_err());
    }

    fn point(id: u64, file: u32, given: f64) -> Point {
        Point {
            id,
            file,
            row: id + 2,
            time_s: 1.0e9 + id as f64,
            lon: -97.8 + 1e-7 * id as f64,
            lat: 40.6,
            x_m: 601_551.696_9 + 0.1 * id as f64,
            y_m: 4_495_092.999_9,
            flow_kg_s: if id == 1 { -0.0 } else { 1.0 / 3.0 },
            speed_m_s: 2.0,
            width_m: 9.144,
            moisture_pct: f64::NAN,
            work_state: 1.0,
            hdop: f64::NAN,
            fix_quality: 4.0,
            applied_rate: f64::NAN,
            yield_kg_ha: given,
        }
    }

    #[test]
    fn a_table_handed_on_in_memory_is_the_table_read_back() {
        // Four exports: the first and third without records, the last without records; a
        // given yield that is infinite (not finite: the column is not written).
        let dir = std::env::temp_dir().join(format!("plotsieve-handoff-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("points.parquet");
        let files: Vec<String> = ["a.csv", "b.csv", "c.csv", "d.csv", "e.csv"]
            .map(String::from)
            .to_vec();
        let points: Vec<Point> = (0..5)
            .map(|i| point(i, [1, 3, 1, 3, 1][i as usize], f64::INFINITY))
            .collect();
        let set = PointSet {
            files: files.clone(),
            points,
            epsg: 32614,
        };
        write_points(&path, &set).unwrap();
        let back = read_points(&path, 32614).unwrap();
        let mut mem = set.points.clone();
        let mem_files = as_read_back(&set.files, &mut mem, |p| p);
        assert_eq!(mem_files, ["", "b.csv", "", "d.csv"]);
        assert_eq!(back.files, mem_files);
        // Debug text: NaN equals NaN there, and -0.0 differs from 0.0.
        assert_eq!(format!("{:?}", back.points), format!("{:?}", mem));
        assert!(mem.iter().all(|p| p.yield_kg_ha.is_nan()));
        // Clean's table, with its derived columns, likewise.
        let mut clean: Vec<CleanPoint> = mem
            .iter()
            .map(|p| CleanPoint {
                base: Point {
                    yield_kg_ha: 7.5,
                    ..p.clone()
                },
                pass: p.id as u32 * 3,
                flow_shifted_kg_s: 0.1,
                moisture_shifted_pct: f64::NAN,
                yield_wet_kg_ha: 1e4 / 3.0,
                yield_std_kg_ha: -0.0,
            })
            .filter(|c| c.base.file != 3)
            .collect();
        write_clean_points(
            &path,
            &back.files,
            &clean,
            Some(("yield_t_ha", vec![1.0; 3])),
            None,
        )
        .unwrap();
        let (cf, cp) = read_clean_points(&path).unwrap();
        let mem_files = as_read_back(&back.files, &mut clean, |c| &mut c.base);
        assert_eq!(mem_files, ["", "b.csv"]);
        assert_eq!(cf, mem_files);
        assert_eq!(format!("{cp:?}"), format!("{clean:?}"));
        std::fs::remove_dir_all(&dir).ok();
    }

    #[test]
    fn map_points_carry_the_full_reads_ids_positions_and_yield_values() {
        let dir = std::env::temp_dir().join(format!("plotsieve-mappts-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("points.parquet");
        // With given yields on some records, and without the column at all.
        for given in [[2500.5, f64::NAN, 7.0], [f64::NAN; 3]] {
            let set = PointSet {
                files: vec!["a.csv".into(), "b.csv".into()],
                points: (0..3)
                    .map(|i| point(i, i as u32 % 2, given[i as usize]))
                    .collect(),
                epsg: 32614,
            };
            write_points(&path, &set).unwrap();
            let full = read_points(&path, 32614).unwrap().points;
            // The yield from the values a record's yield comes from (a made-up formula
            // that uses each of them).
            let yield_of = |p: &Point| {
                if p.yield_kg_ha.is_finite() {
                    p.yield_kg_ha
                } else {
                    p.flow_kg_s / (p.speed_m_s * p.width_m) * (100.0 - p.moisture_pct)
                }
            };
            let map = read_map_points(&path, yield_of).unwrap();
            let want: Vec<MapRecord> = full
                .iter()
                .map(|p| MapRecord {
                    id: p.id,
                    x_m: p.x_m,
                    y_m: p.y_m,
                    yield_kg_ha: yield_of(p),
                })
                .collect();
            assert_eq!(format!("{map:?}"), format!("{want:?}"));
            assert_eq!(map[0].yield_kg_ha == 2500.5, given[0].is_finite());
        }
        std::fs::remove_dir_all(&dir).ok();
    }
}
