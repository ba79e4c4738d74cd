//! Nothing drops out silently: a field or export that drops out of a result is a warning on
//! the terminal, in summary.json and at the top of both reports, and a field missing from the
//! pooled result is an error unless the trial accepts it.

use crate::common::*;

/// Zero the mass flow of every record of one export (a dead sensor).
fn kill_flow(path: &Path) {
    set_col(path, "mass_flow_lb_s", |_| "0.0000".into());
}

#[test]
fn a_field_that_drops_out_is_loud_and_stops_the_pooled_result() {
    let w = Workdir::new("dropout");
    let trial = simulate(&w, "t", &["--seed", "8"]);
    let t = trial.to_str().unwrap();
    kill_flow(&w.path("t/monitor/field-B.csv"));
    let o = plotsieve(&w.0, &["run", t, "--out", "run", "--quiet"]);
    assert_eq!(
        o.status.code(),
        Some(1),
        "a field missing from the pooled rows is an error"
    );
    let e = String::from_utf8_lossy(&o.stderr);
    for want in [
        "warning: stage clean: export monitor/field-B.csv: all",
        "warning: stage plots: field B: all 24 plots set aside (min_points: 24)",
        "1 of the trial's fields cannot be in the result",
        "field B: no kept plot",
        "adjust.allow_missing_fields = true",
    ] {
        assert!(e.contains(want), "expected {want:?} in:\n{e}");
    }
    assert!(!w.path("run/4-adjust").exists() && !w.path("run/5-report").exists());
    let clean = json(&w.path("run/2-clean/summary.json"));
    assert!(clean["details"]["warnings"][0]
        .as_str()
        .unwrap()
        .starts_with("export monitor/field-B.csv: all"));
    // Accepted in the trial's settings: the result comes without field B, and says so at the
    // top of both reports.
    run_trial(&w, &trial, "run", &["adjust.allow_missing_fields=true"]);
    let md = std::fs::read_to_string(w.path("run/5-report/report.md")).unwrap();
    let warn = md.find("## Warnings").expect("a warnings section");
    assert!(
        warn < md.find("## Points and plots through the stages").unwrap(),
        "warnings first"
    );
    assert!(
        md.contains("plots: field B: all 24 plots set aside"),
        "{md}"
    );
    assert!(md.contains("missing from the pooled rows"), "{md}");
    let html = std::fs::read_to_string(w.path("run/5-report/report.html")).unwrap();
    let warn = html.find("<h2>Warnings</h2>").expect("a warnings section");
    assert!(warn < html.find("Points and plots through the stages").unwrap());
    let rows = csv_rows(&w.path("run/4-adjust/treatments.csv"));
    assert!(rows.iter().all(|r| r["field"] != "B"));
    // Both fields dead: the error names each field's cause.
    kill_flow(&w.path("t/monitor/field-A.csv"));
    let o = plotsieve(&w.0, &["run", t, "--out", "run", "--quiet"]);
    assert_eq!(o.status.code(), Some(1));
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("no field could be adjusted")
            && e.contains("field A: no kept plot")
            && e.contains("field B: no kept plot"),
        "{e}"
    );
}

#[test]
fn a_rule_that_takes_much_of_an_export_is_a_warning() {
    let w = Workdir::new("share");
    let trial = simulate(&w, "t", &["--seed", "9"]);
    let o = run_trial(&w, &trial, "run", &["clean.speed.min_m_s=2.2"]);
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("warning: stage clean: export monitor/field-A.csv: rule speed_min removed")
            && e.contains("above clean.warn_rule_share = 0.5"),
        "{e}"
    );
    let md = std::fs::read_to_string(w.path("run/5-report/report.md")).unwrap();
    assert!(md.contains("rule speed_min removed"));
}

#[test]
fn a_rule_that_takes_far_more_of_one_export_than_of_the_others_is_a_warning() {
    // Three exports; one's moisture sensor reads 45 % for the first 30 % of its records (a
    // sensor fault): moisture_max takes about that share of the export (under the 0.5
    // share) and none of the others', which is unusual and said, with the median share.
    let w = Workdir::new("share-unusual");
    let trial = simulate(&w, "t", &["--seed", "9", "--fields", "3", "--quiet"]);
    let f = w.path("t/monitor/field-B.csv");
    let text = read(&f);
    let lines: Vec<&str> = text.lines().collect();
    let header = lines[0].to_string();
    let k = header.split(',').position(|c| c == "moisture_pct").unwrap();
    let n = lines.len() - 1;
    let mut out = vec![header];
    for (i, l) in lines[1..].iter().enumerate() {
        let mut v: Vec<String> = l.split(',').map(String::from).collect();
        if i < n * 3 / 10 {
            v[k] = "45.0".into();
        }
        out.push(v.join(","));
    }
    std::fs::write(&f, out.join("\n") + "\n").unwrap();
    let o = plotsieve(
        &w.0,
        &["run", trial.to_str().unwrap(), "--out", "run", "--quiet"],
    );
    ok(&o);
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("warning: stage clean: export monitor/field-B.csv: rule moisture_max removed")
            && e.contains("against a median of 0 % over the trial's 3 exports"),
        "{e}"
    );
    assert!(
        !e.contains("export monitor/field-A.csv: rule moisture_max"),
        "{e}"
    );
}

#[test]
fn degenerate_data_gives_no_confident_answer() {
    let w = Workdir::new("degenerate");
    let trial = simulate(&w, "t", &["--seed", "11"]);
    let t = trial.to_str().unwrap();
    ok(&plotsieve(&w.0, &["run", t, "--out", "run", "--quiet"]));
    // A plot table whose yields differ only by rounding noise: no field can be fitted, and
    // the error says why, rather than printing P(uplift > 0) near 1 for a few grams.
    let plots = csv_rows(&w.path("run/3-plots/plots.csv"));
    let mut table = String::from("plot_id,field,treatment,block,yield_t_ha,x_m,y_m\n");
    for (k, p) in plots.iter().enumerate() {
        table.push_str(&format!(
            "{},{},{},{},{:.12},{},{}\n",
            p["plot_id"],
            p["field"],
            p["treatment"],
            p["block"],
            10.0 + 1e-9 * ((k * 7919) % 13) as f64,
            p["centroid_x_m"],
            p["centroid_y_m"]
        ));
    }
    std::fs::write(w.path("t/flat.csv"), table).unwrap();
    let o = plotsieve(
        &w.0,
        &[
            "stage",
            "adjust",
            t,
            "--out",
            "flat",
            "--quiet",
            "--set",
            "adjust.plot_table=\"flat.csv\"",
        ],
    );
    assert_eq!(o.status.code(), Some(1));
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(e.contains("field A: all plot yields are equal (SD"), "{e}");
    assert!(!w.path("flat/4-adjust/treatments.csv").exists());
    // A treatment name mistyped on one plot: a product on a single plot is flagged.
    replace(&w.path("t/design.csv"), ",prod-a,", ",prod-aa,", 1);
    let o = plotsieve(&w.0, &["run", t, "--out", "run", "--quiet"]);
    ok(&o);
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("treatment prod-aa has a single kept plot"),
        "{e}"
    );
    let md = std::fs::read_to_string(w.path("run/5-report/report.md")).unwrap();
    assert!(md.contains("prod-aa has a single kept plot"));
}

#[test]
fn a_check_put_at_one_end_of_every_block_is_a_design_warning() {
    // The treatments randomised within each block except the check, put in the first column
    // of every block (a shortcut that ties the check to one side of the field). Before: no
    // word. Now check and the ingest summary say the check lies toward one side of its blocks.
    let w = Workdir::new("design-confounded");
    let t = simulate(&w, "t", &["--seed", "2", "--blocks", "6", "--quiet"]);
    let p = w.path("t/design.csv");
    let text = read(&p);
    let mut rows: Vec<Vec<String>> = text
        .lines()
        .skip(1)
        .map(|l| l.split(',').map(String::from).collect())
        .collect();
    // Within each (field, block): swap labels so that the check is in column 01.
    let keys: std::collections::BTreeSet<(String, String)> =
        rows.iter().map(|r| (r[3].clone(), r[2].clone())).collect();
    for (field, block) in keys {
        let idx: Vec<usize> = (0..rows.len())
            .filter(|&i| rows[i][3] == field && rows[i][2] == block)
            .collect();
        let first = *idx.iter().find(|&&i| rows[i][0].ends_with("01")).unwrap();
        let check = *idx.iter().find(|&&i| rows[i][1] == "check").unwrap();
        let (a, b) = (rows[first][1].clone(), rows[check][1].clone());
        rows[first][1] = b;
        rows[check][1] = a;
    }
    let out: Vec<String> = std::iter::once("plot_id,treatment,block,field".to_string())
        .chain(rows.iter().map(|r| r.join(",")))
        .collect();
    std::fs::write(&p, out.join("\n") + "\n").unwrap();
    let o = plotsieve(&w.0, &["check", t.to_str().unwrap()]);
    let s = printed(&o);
    for field in ["A", "B"] {
        assert!(
            s.contains(&format!(
                "field {field}: treatment check lies toward one side of its blocks"
            )),
            "{s}"
        );
    }
    // The untouched design: no such warning.
    let u = simulate(&w, "u", &["--seed", "2", "--blocks", "6", "--quiet"]);
    let o = plotsieve(&w.0, &["check", u.to_str().unwrap()]);
    assert!(!String::from_utf8_lossy(&o.stdout).contains("toward one side"));
}
