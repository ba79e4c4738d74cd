//! The task-data reader against the golden reading of an independent implementation:
//! `tests/fixtures/taskdata/` (written by `make_taskdata_fixture.py` from the standard's
//! layout, read by the npm package isoxml 1.11.2 through `read_taskdata_fixture.mjs` into
//! `isoxml_js.json`).

use super::*;
use crate::config::{TrialConfig, TEST_TRIAL};
use std::path::PathBuf;

fn fixtures() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../tests/fixtures/taskdata")
}

fn golden() -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(fixtures().join("isoxml_js.json")).unwrap())
        .unwrap()
}

/// A fresh temporary folder holding these files of the fixture set.
fn fixture_copy(tag: &str, files: &[&str]) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("plotsieve-{tag}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    let src = fixtures().join("TASKDATA");
    for f in files {
        std::fs::copy(src.join(f), dir.join(f)).unwrap();
    }
    dir
}

fn cfg() -> crate::ingest::settings::IngestConfig {
    TrialConfig::from_toml(TEST_TRIAL, "t.toml", &[])
        .unwrap()
        .for_ingest()
}

/// Checks our reading of `path` against the golden records: every record, in order, with
/// its time, position and the values in force (carried forward as isoxml-js fills them).
fn same_as_isoxml_js(path: &Path) {
    let g = golden();
    assert_eq!(g["version"], "1.11.2");
    let out = TaskData.read(&cfg(), path, "TASKDATA.XML", 0).unwrap();
    let mut points = out.points.iter();
    let mut rejected = out.rejections.iter();
    let mut total = 0;
    for (log, ddi_flow) in [("TLG00001", "0057_DET-1"), ("TLG00002", "0057_DET-1")] {
        let recs = g["time_logs"][log]["records"].as_array().unwrap();
        assert!(g["time_logs"][log]["parsing_errors"]
            .as_array()
            .unwrap()
            .is_empty());
        let mut state: BTreeMap<String, f64> = BTreeMap::new();
        for (k, r) in recs.iter().enumerate() {
            for (key, v) in r["values"].as_object().unwrap() {
                state.insert(key.clone(), v.as_f64().unwrap());
            }
            total += 1;
            if !r["valid"].as_bool().unwrap() {
                let j = rejected.next().unwrap();
                assert_eq!((j.source_row, &*j.rule), (k as u64 + 1, "no_position"));
                assert_eq!(&*j.source_file, format!("TASKDATA.XML#{log}"));
                continue;
            }
            let p = points.next().unwrap();
            assert_eq!(p.row, k as u64 + 1);
            assert!((p.time_s * 1000.0 - r["time_ms"].as_f64().unwrap()).abs() < 1e-3);
            assert!(
                (p.lat - r["north"].as_f64().unwrap()).abs() < 1e-12,
                "{log} {k}"
            );
            assert!(
                (p.lon - r["east"].as_f64().unwrap()).abs() < 1e-12,
                "{log} {k}"
            );
            assert_eq!(p.optional[2], r["status"].as_f64().unwrap());
            assert!((p.optional[1] - r["hdop"].as_f64().unwrap()).abs() < 1e-12);
            let v = |key: &str| state[key];
            assert!((p.flow_kg_s - v(ddi_flow) * 1e-6).abs() < 1e-12);
            assert!((p.moisture_pct - v("0063_DET-1") * 1e-4).abs() < 1e-12);
            assert!((p.speed_m_s - v("018D_DET-1") * 1e-3).abs() < 1e-12);
            assert!((p.width_m - v("0043_DET-2") * 1e-3).abs() < 1e-12);
            assert_eq!(p.optional[0], v("008D_DET-1"));
            assert!(p.yield_kg_ha.is_nan());
        }
    }
    assert!(points.next().is_none() && rejected.next().is_none());
    assert_eq!(out.rows, total as u64);
    assert_eq!(out.rows, (out.points.len() + out.rejections.len()) as u64);
    assert_eq!((total, out.rejections.len()), (100, 1));
}

#[test]
fn a_task_data_folder_reads_as_isoxml_js_reads_it() {
    same_as_isoxml_js(&fixtures().join("TASKDATA/TASKDATA.XML"));
}

#[test]
fn a_zipped_task_data_set_reads_the_same() {
    same_as_isoxml_js(&fixtures().join("TASKDATA.zip"));
}

#[test]
fn the_format_claims_task_data_and_says_what_it_maps() {
    let xml = fixtures().join("TASKDATA/TASKDATA.XML");
    let head = std::fs::read(&xml).unwrap();
    assert_eq!(
        crate::ingest::formats::for_bytes(&xml, &head).name(),
        "iso11783_taskdata"
    );
    assert!(crate::ingest::formats::is_export(&xml));
    // Time-log headers beside it are not exports of their own.
    assert!(!crate::ingest::formats::is_export(
        &fixtures().join("TASKDATA/TLG00001.XML")
    ));
    let m = describe_file(&cfg(), &xml).unwrap();
    assert_eq!(m.len(), 2);
    assert!(
        m[0].contains("mass flow 0057 of DET-1 (Combine)"),
        "{}",
        m[0]
    );
    assert!(m[0].contains("width 0043 of DET-2 (Header)"), "{}", m[0]);
}

#[test]
fn a_cut_or_incomplete_task_data_set_is_a_located_error_or_rejection() {
    let dir = fixture_copy(
        "taskdata",
        &[
            "TASKDATA.XML",
            "TLG00001.XML",
            "TLG00001.BIN",
            "TLG00002.XML",
        ],
    );
    let src = fixtures().join("TASKDATA");
    // The second log's records are missing: an error naming the file.
    let e = TaskData
        .check(&cfg(), &dir.join("TASKDATA.XML"), "TASKDATA.XML")
        .unwrap_err();
    assert!(e.contains("TLG00002.BIN is missing"), "{e}");
    // A binary cut inside a record: the records before it are read, the cut one is a
    // rejection, and records = points + rejections.
    let bin = std::fs::read(src.join("TLG00002.BIN")).unwrap();
    std::fs::write(dir.join("TLG00002.BIN"), &bin[..bin.len() - 3]).unwrap();
    let out = TaskData
        .read(&cfg(), &dir.join("TASKDATA.XML"), "T", 0)
        .unwrap();
    let last = out.rejections.last().unwrap();
    assert_eq!(
        (&*last.source_file, last.source_row, &*last.rule),
        ("T#TLG00002", 40, "unreadable_row")
    );
    assert_eq!(out.rows, 100);
    assert_eq!(out.rows, (out.points.len() + out.rejections.len()) as u64);
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_log_without_speed_or_width_takes_speed_from_positions_and_the_stated_width() {
    // A combine that logs no speed (018D) or working width (0043): speed is the distance
    // between successive positions over the time between them, and the width the trial
    // file's columns.width.value; check says both. Checked on a straight run north at
    // 2 m/s logged every 2 s: every speed within 6 mm/s of 2 m/s (positions are stored to
    // 1e-7 degrees, 1.1 cm of latitude, so a 4 m step is known to 2.2 cm at worst).
    let dir = std::env::temp_dir().join(format!("plotsieve-td-nospeed-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    let mut csv =
        String::from("time_utc,lon_deg,lat_deg,mass_flow_lb_s,moisture_pct,header_state,hdop\n");
    // 2 m/s north: 4 m per 2 s record is 4 / 111,194.93 degrees on the 6,371,008.8 m sphere.
    let per_deg = 6_371_008.8f64.to_radians();
    for i in 0..20 {
        csv += &format!(
            "2026-10-27T10:00:{:02}Z,-97.8,{:.9},5.0,18.5,1,0.9\n",
            2 * i,
            40.6 + 4.0 * i as f64 / per_deg
        );
    }
    write_set(&dir, &[("run north".into(), csv)]).unwrap();
    let mut c = cfg();
    c.columns.width.value = Some(30.0);
    c.columns.width.unit = crate::ingest::settings::WidthUnit::Ft;
    let out = TaskData
        .read(&c, &dir.join("TASKDATA.XML"), "T", 0)
        .unwrap();
    assert_eq!(out.points.len(), 20);
    for p in &out.points {
        assert!((p.speed_m_s - 2.0).abs() < 6e-3, "{}", p.speed_m_s);
        assert!((p.width_m - 9.144).abs() < 1e-9);
    }
    let m = describe_file(&c, &dir.join("TASKDATA.XML")).unwrap();
    assert!(
        m[0].contains("speed not logged: from positions and times"),
        "{}",
        m[0]
    );
    assert!(
        m[0].contains("width not logged: 9.144 m (columns.width.value)"),
        "{}",
        m[0]
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_time_log_of_zeros_is_refused_after_an_hour_of_records_and_a_zero_time_is_no_time() {
    // A time log of zero bytes (each record at 1980-01-01 00:00 and at 0,0): before, every
    // record was read and rejected, however long the log; now the log is refused once its
    // first 3600 records have given nothing, naming it.
    let dir = fixture_copy(
        "td-zeros",
        &[
            "TASKDATA.XML",
            "TLG00001.XML",
            "TLG00002.XML",
            "TLG00002.BIN",
        ],
    );
    std::fs::write(dir.join("TLG00001.BIN"), vec![0u8; 400_000]).unwrap();
    let e = TaskData
        .read(&cfg(), &dir.join("TASKDATA.XML"), "T", 0)
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("T#TLG00001: none of its first 3600 records has both a time and a position"),
        "{e}"
    );
    // A short run of zeros is read and rejected, record by record: no_time first.
    std::fs::write(dir.join("TLG00001.BIN"), vec![0u8; 3000]).unwrap();
    let out = TaskData
        .read(&cfg(), &dir.join("TASKDATA.XML"), "T", 0)
        .unwrap();
    let first = &out.rejections[0];
    assert_eq!(
        (&*first.source_file, &*first.rule),
        ("T#TLG00001", "no_time")
    );
    assert_eq!(out.rows, (out.points.len() + out.rejections.len()) as u64);
    std::fs::remove_dir_all(&dir).unwrap();
}
