//! Reading inputs: malformed export rows land in rejected.csv; UTM coordinates against pyproj.

use crate::common::*;

#[test]
fn malformed_rows_land_in_rejected_csv() {
    let w = Workdir::new("malformed");
    let trial = simulate(&w, "trial", &["--seed", "4"]);
    let export = w.path("trial/monitor/field-A.csv");
    let text = std::fs::read_to_string(&export).unwrap();
    let mut lines: Vec<String> = text.lines().map(String::from).collect();
    let n_before = lines.len() - 1;
    // Line 11: a flow that is not a number; line 21: a truncated record; line 31: a bad time.
    let mut f: Vec<String> = lines[10].split(',').map(String::from).collect();
    f[3] = "abc".into();
    lines[10] = f.join(",");
    lines[20] = lines[20].split(',').take(4).collect::<Vec<_>>().join(",");
    let mut g: Vec<String> = lines[30].split(',').map(String::from).collect();
    g[0] = "2026-09-18 noon".into();
    lines[30] = g.join(",");
    std::fs::write(&export, lines.join("\n") + "\n").unwrap();
    let t = trial.to_str().unwrap();
    ok(&plotsieve(
        &w.0,
        &["stage", "ingest", t, "--out", "run", "--quiet"],
    ));
    let rej = csv_rows(&w.path("run/1-ingest/rejected.csv"));
    let find = |line: &str| {
        rej.iter()
            .find(|r| r["source_file"] == "monitor/field-A.csv" && r["source_row"] == line)
            .cloned()
    };
    let r = find("11").expect("line 11 rejected");
    assert_eq!(
        (
            r["rule"].as_str(),
            r["column"].as_str(),
            r["value"].as_str()
        ),
        ("unparseable", "mass_flow_lb_s", "abc")
    );
    let r = find("21").expect("line 21 rejected");
    assert_eq!(
        (r["rule"].as_str(), r["value"].as_str(), r["limit"].as_str()),
        ("wrong_field_count", "4 fields", "10 fields")
    );
    let r = find("31").expect("line 31 rejected");
    assert_eq!(
        (
            r["rule"].as_str(),
            r["column"].as_str(),
            r["value"].as_str()
        ),
        ("unparseable", "time_utc", "2026-09-18 noon")
    );
    let sum = json(&w.path("run/1-ingest/summary.json"));
    assert_eq!(sum["by_file"]["monitor/field-A.csv"]["unparseable"], 2);
    let pts = parquet(&w.path("run/1-ingest/points.parquet"));
    let from_a = pts
        .column("file_index")
        .unwrap()
        .u32()
        .unwrap()
        .iter()
        .filter(|v| *v == Some(0))
        .count();
    assert_eq!(from_a, n_before - 3);
}

#[test]
fn utm_coordinates_match_pyproj_to_the_millimetre() {
    let text = std::fs::read_to_string(repo().join("tests/fixtures/utm_pyproj.csv")).unwrap();
    let mut groups: BTreeMap<(String, String), Vec<(f64, f64, f64, f64)>> = BTreeMap::new();
    for line in text.lines().filter(|l| !l.starts_with('#')).skip(1) {
        let f: Vec<&str> = line.split(',').collect();
        let v: Vec<f64> = f[2..].iter().map(|x| x.parse().unwrap()).collect();
        groups
            .entry((f[0].into(), f[1].into()))
            .or_default()
            .push((v[0], v[1], v[2], v[3]));
    }
    assert!(groups.len() >= 2);
    for ((zone, hemi), rows) in groups {
        let w = Workdir::new("utm");
        let ll: Vec<(f64, f64)> = rows.iter().map(|r| (r.0, r.1)).collect();
        let t = tiny_trial(&w, 10.0, 2.0, 30.0, 15.5, "t_ha", "", &ll);
        let zs = format!("ingest.utm_zone={zone}");
        let hs = format!("ingest.hemisphere={hemi}");
        ok(&plotsieve(
            &w.0,
            &[
                "stage",
                "ingest",
                t.to_str().unwrap(),
                "--out",
                "run",
                "--quiet",
                "--set",
                &zs,
                "--set",
                &hs,
            ],
        ));
        let df = parquet(&w.path("run/1-ingest/points.parquet"));
        let (x, y) = (f64s(&df, "x_m"), f64s(&df, "y_m"));
        assert_eq!(x.len(), rows.len());
        for (i, r) in rows.iter().enumerate() {
            assert!(
                (x[i] - r.2).abs() < 1e-3 && (y[i] - r.3).abs() < 1e-3,
                "zone {zone}{hemi} lon {} lat {}: ours ({}, {}) pyproj ({}, {})",
                r.0,
                r.1,
                x[i],
                y[i],
                r.2,
                r.3
            );
        }
    }
}
