//! Settings and check: every problem listed, bad settings name their key.

use crate::common::*;

#[test]
fn check_lists_every_problem_and_writes_nothing() {
    let w = Workdir::new("check");
    let trial = simulate(&w, "trial", &["--seed", "6"]);
    let t = trial.to_str().unwrap();
    let o = plotsieve(&w.0, &["check", t]);
    ok(&o);
    // Break two things: a mapped column and the design.
    let design = w.path("trial/design.csv");
    let text = std::fs::read_to_string(&design).unwrap();
    let kept: Vec<&str> = text.lines().filter(|l| !l.starts_with("A-101,")).collect();
    std::fs::write(&design, kept.join("\n") + "\n").unwrap();
    let before = all_files(&w.0);
    let o = plotsieve(&w.0, &["check", t, "--set", "columns.flow.name=grain_kg"]);
    assert_eq!(o.status.code(), Some(1));
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(
        out.contains("\"grain_kg\"")
            && out.contains("monitor/field-A.csv")
            && out.contains("monitor/field-B.csv"),
        "{out}"
    );
    assert!(
        out.contains("A-101"),
        "the plot missing from the design is named: {out}"
    );
    assert_eq!(before, all_files(&w.0), "check writes nothing");
}

#[test]
fn bad_settings_name_the_key() {
    let w = Workdir::new("settings");
    let trial = simulate(&w, "trial", &["--seed", "7"]);
    let t = trial.to_str().unwrap();
    let cases = [
        ("clean.speed.bogus=1", "unknown key clean.speed.bogus"),
        (
            "clean.speed.min_m_s=fast",
            "clean.speed.min_m_s expects a number",
        ),
        (
            "clean.speed.min_m_s=5",
            "clean.speed.min_m_s must be below clean.speed.max_m_s (got 5 and 4)",
        ),
        ("plots.min_points=0", "plots.min_points must be at least 1"),
        (
            "clean.disabled_rules=[\"no_such_rule\"]",
            "clean.disabled_rules: unknown rule \"no_such_rule\"",
        ),
        (
            "clean.speed.settle_s=-1",
            "clean.speed.settle_s must be a finite number >= 0 (got -1)",
        ),
        (
            "clean.delay.min_s=25",
            "clean.delay.min_s must not be above clean.delay.max_s (got 25 and 20)",
        ),
        (
            "adjust.product_prior_mean.prod-a=0.3",
            "adjust.product_prior_mean.prod-a has no adjust.product_prior_sd.prod-a",
        ),
        (
            "adjust.product_prior_sd.prod-a=0",
            "adjust.product_prior_sd.prod-a must be above 0 (got 0)",
        ),
        (
            "adjust.pooling=\"together\"",
            "adjust.pooling must be \"joint\" or \"separate\" (got \"together\")",
        ),
        (
            "adjust.range_grid_points=2",
            "adjust.range_grid_points must be between 3 and 40 (got 2)",
        ),
    ];
    for (set, msg) in cases {
        let o = plotsieve(&w.0, &["run", t, "--out", "run", "--set", set]);
        assert_eq!(o.status.code(), Some(1), "{set}");
        let e = String::from_utf8_lossy(&o.stderr);
        assert!(e.contains(msg), "--set {set}: expected {msg:?} in {e}");
    }
    assert!(!w.path("run").exists(), "a bad setting writes nothing");
}

#[test]
fn check_reads_every_export_as_run_would() {
    let w = Workdir::new("dryrun");
    let trial = simulate(&w, "t", &["--seed", "13"]);
    let t = trial.to_str().unwrap();
    let mon = w.path("t/monitor");
    let a: Vec<String> = std::fs::read_to_string(mon.join("field-A.csv"))
        .unwrap()
        .lines()
        .map(String::from)
        .collect();
    // A header-only export, an export with lon and lat swapped, an export from 1 degree
    // east (another place), and a treatment name mistyped on one plot.
    std::fs::write(mon.join("header-only.csv"), format!("{}\n", a[0])).unwrap();
    let swapped = a[0]
        .replace("lon_deg", "TMP")
        .replace("lat_deg", "lon_deg")
        .replace("TMP", "lat_deg");
    let mut b = vec![swapped];
    b.extend(a[1..].iter().cloned());
    std::fs::write(mon.join("swapped.csv"), b.join("\n") + "\n").unwrap();
    std::fs::write(
        mon.join("elsewhere.csv"),
        shift_east(&a, 1.0).join("\n") + "\n",
    )
    .unwrap();
    replace(&w.path("t/design.csv"), ",prod-b,", ",prod-bb,", 1);
    let o = plotsieve(&w.0, &["check", t]);
    assert_eq!(o.status.code(), Some(1));
    let out = String::from_utf8_lossy(&o.stdout);
    for want in [
        "problem: monitor/header-only.csv: no data rows after the header",
        "problem: export monitor/swapped.csv: none of its",
        "coordinate_range",
        "problem: monitor/elsewhere.csv: none of its",
        "lies within plots.far_m = 100 m of the plots",
        "warning: field A: treatment prod-bb has a single plot in the design",
    ] {
        assert!(out.contains(want), "expected {want:?} in:\n{out}");
    }
    assert!(!w.path("runs").exists(), "check writes nothing");
}

#[test]
fn help_output_and_rejections_say_what_they_are() {
    let w = Workdir::new("rough");
    for cmd in ["stage", "check"] {
        let o = plotsieve(&w.0, &[cmd, "--help"]);
        ok(&o);
        let h = String::from_utf8_lossy(&o.stdout);
        assert!(
            h.contains("Trial configuration (TOML)"),
            "{cmd} --help: {h}"
        );
        assert!(h.contains("Override a setting"), "{cmd} --help: {h}");
        if cmd == "stage" {
            assert!(
                h.contains("Run folder holding the earlier stages' output"),
                "{h}"
            );
        }
    }
    let trial = simulate(&w, "t", &["--seed", "14"]);
    let t = trial.to_str().unwrap();
    // One unreadable row, so ingest has a rejection.
    let mon = w.path("t/monitor/field-A.csv");
    let text = std::fs::read_to_string(&mon).unwrap();
    let mut lines: Vec<String> = text.lines().map(String::from).collect();
    lines[5] = lines[5].replacen(',', ",x", 1);
    std::fs::write(&mon, lines.join("\n") + "\n").unwrap();
    ok(&plotsieve(&w.0, &["run", t, "--out", "run", "--quiet"]));
    let rej = csv_rows(&w.path("run/1-ingest/rejected.csv"));
    assert!(!rej.is_empty());
    assert!(
        rej.iter()
            .all(|r| r["id"] == format!("line {}", r["source_row"])),
        "{rej:?}"
    );
    // stage says where it wrote, like run.
    let o = plotsieve(&w.0, &["stage", "report", t, "--out", "run"]);
    ok(&o);
    assert!(String::from_utf8_lossy(&o.stderr).contains("done: stage report in run"));
    let md = std::fs::read_to_string(w.path("run/5-report/report.md")).unwrap();
    assert!(md.contains("## Products against the check, per field\n"));
    let html = std::fs::read_to_string(w.path("run/5-report/report.html")).unwrap();
    assert!(html.contains("<h2>Products against the check, per field</h2>"));
}

#[test]
fn check_finds_what_cleaning_and_the_plots_would_lose() {
    // Exports that parse but that cleaning empties: speed all zero on field A's export and
    // moisture at 200 % on field B's. Each field then loses every plot, which run refuses;
    // check says so before any run, naming the field and the rules.
    let w = Workdir::new("dryrun-clean");
    let trial = simulate(&w, "t", &["--seed", "14"]);
    let t = trial.to_str().unwrap();
    ok(&plotsieve(&w.0, &["check", t]));
    set_col(&w.path("t/monitor/field-A.csv"), "speed_mph", |_| {
        "0".into()
    });
    set_col(&w.path("t/monitor/field-B.csv"), "moisture_pct", |_| {
        "200".into()
    });
    let o = plotsieve(&w.0, &["check", t]);
    assert_eq!(o.status.code(), Some(1));
    let out = String::from_utf8_lossy(&o.stdout);
    for want in [
        "problem: adjust: field A: no kept plot",
        "problem: adjust: field B: no kept plot",
        "adjust.allow_missing_fields",
        "warning: clean: export monitor/field-A.csv",
        "speed_min",
        "warning: clean: export monitor/field-B.csv",
        "moisture_max",
    ] {
        assert!(out.contains(want), "expected {want:?} in:\n{out}");
    }
    // And run agrees: it fails on the same inputs.
    let o = plotsieve(&w.0, &["run", t, "--out", "r", "--quiet"]);
    assert_ne!(o.status.code(), Some(0));
    assert!(!w.path("runs").exists(), "check writes nothing");
}

#[test]
fn prices_in_bushels_and_acres_give_the_decisions_of_tonnes_and_hectares() {
    // Before: grain_price_per_t and product_cost_per_ha were per tonne and per hectare even
    // in a bu_ac trial, so a bushel price and an acre cost gave break-even wrong by about
    // 39x for corn and nothing could notice. Now each price carries its unit. Corn: 1 bu =
    // 56 lb = 25.40117272 kg; 1 ac = 0.40468564224 ha (definitions; ../shared/CHECKS.md).
    let w = Workdir::new("money-units");
    let t = repo().join("sample-input/trial.toml");
    let t = t.to_str().unwrap();
    let per_bu = 180.0 * 56.0 * 0.45359237 / 1000.0;
    let per_ac = 30.0 * 0.40468564224;
    let metric = [
        "adjust.grain_price=180".to_string(),
        "adjust.grain_price_unit=t".into(),
        "adjust.product_cost.prod-a=30".into(),
        "adjust.product_cost.prod-b=30".into(),
    ];
    let bushel_prices = [
        format!("adjust.grain_price={per_bu}"),
        "adjust.grain_price_unit=bu".into(),
        format!("adjust.product_cost.prod-a={per_ac}"),
        format!("adjust.product_cost.prod-b={per_ac}"),
        "adjust.product_cost_unit=ac".into(),
    ];
    let mut imperial = bushel_prices.to_vec();
    imperial.push("trial.output_unit=bu_ac".into());
    for (out, sets) in [
        ("metric", &metric[..]),
        ("mixed", &bushel_prices[..]),
        ("imperial", &imperial[..]),
    ] {
        let mut args = vec!["run", t, "--out", out, "--quiet"];
        for s in sets.iter() {
            args.extend(["--set", s.as_str()]);
        }
        ok(&plotsieve(&w.0, &args));
    }
    let rows = |run: &str| csv_rows(&w.path(&format!("{run}/4-adjust/treatments.csv")));
    let f = |r: &BTreeMap<String, String>, k: &str| r[k].parse::<f64>().unwrap_or(f64::NAN);
    let (a, m, b) = (rows("metric"), rows("mixed"), rows("imperial"));
    assert_eq!((a.len(), m.len()), (b.len(), b.len()));
    // The same trial priced in $/bu and $/ac: the same break-even, odds and net returns.
    let mut priced = 0;
    for (x, y) in a.iter().zip(&m) {
        for k in [
            "break_even_t_ha",
            "p_uplift_gt_break_even",
            "expected_net_return_per_ha",
        ] {
            let (u, v) = (f(x, k), f(y, k));
            assert!(
                u.is_nan() && v.is_nan() || (u - v).abs() <= 1e-6 * u.abs().max(1.0),
                "{k}: {u} {v}"
            );
        }
        priced += usize::from(f(x, "p_uplift_gt_break_even").is_finite());
    }
    assert!(priced >= 2, "{priced}");
    // Reported in bu/ac: break-even is the same yield in bu/ac, and the odds the same within
    // 0.005 (the fit itself, priced or not, moves P(uplift > 0) by up to 0.002 between
    // output units: measured on this trial, a property of the fit, not of the prices).
    let bu_ac_per_t_ha = 1000.0 / (0.45359237 / 0.40468564224 * 56.0);
    for (x, y) in a.iter().zip(&b) {
        assert_eq!(
            (&x["field"], &x["treatment"]),
            (&y["field"], &y["treatment"])
        );
        let (pa, pb) = (
            f(x, "p_uplift_gt_break_even"),
            f(y, "p_uplift_gt_break_even"),
        );
        if pa.is_nan() {
            assert!(pb.is_nan(), "{x:?} {y:?}");
            continue;
        }
        assert!((pa - pb).abs() < 0.005, "{pa} {pb}");
        let (ba, bb) = (f(x, "break_even_t_ha"), f(y, "break_even_bu_ac"));
        // (to the six decimals the tables print; a product without a cost breaks even at 0)
        assert!(
            ba == 0.0 && bb == 0.0 || (ba * bu_ac_per_t_ha / bb - 1.0).abs() < 1e-5,
            "{ba} t/ha, {bb} bu/ac"
        );
    }
    // The report says the units and shows net returns per acre.
    let md = read(&w.path("imperial/5-report/report.md"));
    assert!(
        md.contains("per bu at standard moisture; product costs and net returns per ac")
            && md.contains("expected net return per ac"),
        "{md}"
    );
    // The old keys are refused with the new spelling, never read in another unit.
    let o = plotsieve(&w.0, &["check", t, "--set", "adjust.grain_price_per_t=180"]);
    assert_eq!(o.status.code(), Some(1));
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("adjust.grain_price_per_t is no longer read")
            && e.contains("adjust.grain_price with adjust.grain_price_unit"),
        "{e}"
    );
    let old = format!(
        "{}\n[adjust]\nproduct_cost_per_ha = {{ \"prod-a\" = 30.0 }}\n",
        read(&repo().join("sample-input/trial.toml"))
    );
    std::fs::create_dir_all(w.path("old")).unwrap();
    copy_dir(&repo().join("sample-input"), &w.path("old"));
    std::fs::write(w.path("old/trial.toml"), old).unwrap();
    let o = plotsieve(&w.0, &["check", "old/trial.toml"]);
    assert_eq!(o.status.code(), Some(1));
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("adjust.product_cost_per_ha is no longer read")
            && e.contains("adjust.product_cost with adjust.product_cost_unit"),
        "{e}"
    );
}
