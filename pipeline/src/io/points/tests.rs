//! Tests of the point tables' Parquet writers and readers.

use super::*;
use polars::prelude::{ChunkedArray, Float64Type, IntoColumn, IntoSeries, NamedFrom};

#[test]
fn a_table_longer_than_a_row_group_reads_back_as_one_written_whole() {
    // 2.3 row groups of records (optional columns set in the last group only, a value
    // missing now and then): written a row group at a time, the table reads back equal to
    // the records, and equal, frame for frame, to the same table written in one frame by
    // polars itself (its own row groups).
    let n = 2 * ROW_GROUP + ROW_GROUP / 3;
    let files = vec!["a.csv".to_string(), "b.csv".to_string()];
    let points: Vec<Point> = (0..n)
        .map(|i| {
            let x = i as f64;
            let mut p = blank_point(i as u64, (i % 2) as u32, 2 + i as u64 / 2);
            p.time_s = 1.7e9 + x;
            p.lon = -0.5 + x * 1e-7;
            p.lat = 52.0 + x * 1e-7;
            p.x_m = 600_000.0 + x;
            p.y_m = 5_760_000.0 - x;
            p.flow_kg_s = if i % 97 == 0 {
                f64::NAN
            } else {
                8.0 + (x * 0.1).sin()
            };
            p.speed_m_s = 2.0;
            p.width_m = 9.1;
            p.moisture_pct = 17.5;
            if i > n - 10 {
                p.yield_kg_ha = 9000.0 + x;
                p.applied_rate = 150.0;
            }
            p
        })
        .collect();
    let set = PointSet {
        files: files.clone(),
        points,
        epsg: 32630,
    };
    let dir = std::env::temp_dir().join(format!("plotsieve-groups-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let grouped = dir.join("grouped.parquet");
    write_points(&grouped, &set).unwrap();
    let back = read_points(&grouped, 32630).unwrap();
    assert_eq!(back.files, files);
    assert_eq!(back.points.len(), n);
    for (a, b) in back.points.iter().zip(&set.points) {
        // NaN != NaN: compare bit patterns of the whole record's debug form.
        assert_eq!(format!("{a:?}"), format!("{b:?}"));
    }
    let whole = dir.join("whole.parquet");
    let optional = Optional::of(set.points.iter());
    let mut df = DataFrame::new(n, base_columns(&set.files, set.points.iter(), optional)).unwrap();
    write_atomic_with(&whole, |w| {
        ParquetWriter::new(w)
            .with_compression(ParquetCompression::Lz4Raw)
            .finish(&mut df)?;
        Ok(())
    })
    .unwrap();
    let (a, b) = (
        read_df(&grouped, "ingest").unwrap(),
        read_df(&whole, "ingest").unwrap(),
    );
    assert!(a.equals_missing(&b));
    assert!(a.column("yield_given_kg_ha").is_ok() && a.column("applied_rate_per_ha").is_ok());
    std::fs::remove_dir_all(&dir).ok();
}

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
