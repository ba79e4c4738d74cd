//! Cleaning through the binary: worked yield and moisture examples, the automatic flow delay, artifacts removed and clean points spared.

use crate::common::*;

#[test]
fn worked_yield_and_moisture_examples_through_the_binary() {
    // ../shared/CHECKS.md, arithmetic: 20 kg/s at 1.8 m/s with a 9.144 m (30 ft) header is
    // 12,151.26 kg/ha wet; at 15.5 % moisture that is also the corn standard-moisture yield.
    let w = Workdir::new("worked1");
    let t = tiny_trial(&w, 20.0, 1.8, 30.0, 15.5, "t_ha", "", &[]);
    run_stages(&w, &t, "run", &["ingest", "clean"]);
    let df = parquet(&w.path("run/2-clean/points.parquet"));
    assert!(df.height() >= 90, "kept {}", df.height());
    for (wet, std, t_ha) in f64s(&df, "yield_wet_kg_ha")
        .iter()
        .zip(f64s(&df, "yield_std_kg_ha"))
        .zip(f64s(&df, "yield_t_ha"))
        .map(|((a, b), c)| (*a, b, c))
    {
        assert!((wet - 12_151.26).abs() < 0.01, "{wet}");
        assert!((std - 12_151.26).abs() < 0.01, "{std}");
        assert!((t_ha - 12.15126).abs() < 1e-5, "{t_ha}");
    }
    drop(w);
    // UF/IFAS EDIS AG442: 10,000 lb/ac wet at 20 % moisture is 9,467.46 lb/ac at 15.5 %,
    // i.e. 169.06 bu/ac of corn at 56 lb/bu (USDA ERS AH-697). 10,000 lb/ac = 11,208.51 kg/ha
    // (1 lb/ac = 1.120851 kg/ha), so the flow is 11,208.51 x 1.8 x 9.144 / 10,000 kg/s.
    let w = Workdir::new("worked2");
    let lb_ac = 0.45359237 / 0.40468564224;
    let flow = 10_000.0 * lb_ac * 1.8 * 9.144 / 10_000.0;
    let t = tiny_trial(&w, flow, 1.8, 30.0, 20.0, "bu_ac", "", &[]);
    run_stages(&w, &t, "run", &["ingest", "clean"]);
    let df = parquet(&w.path("run/2-clean/points.parquet"));
    for (std, bu) in f64s(&df, "yield_std_kg_ha")
        .iter()
        .zip(f64s(&df, "yield_bu_ac"))
    {
        assert!((std / lb_ac - 9_467.46).abs() < 0.01, "{}", std / lb_ac);
        assert!((bu - 169.0618).abs() < 1e-3, "{bu}");
    }
}

#[test]
fn automatic_flow_delay_is_within_one_second_of_the_truth() {
    // Known-truth simulation: true delays across the typical 8-14 s range (Beal & Tian 2001),
    // on fields of eight blocks (passes of about 530 m), two exports each.
    let mut worst: f64 = 0.0;
    for (delay, seed) in [(8.0, 41u64), (9.5, 42), (11.0, 43), (12.5, 44), (14.0, 45)] {
        let w = Workdir::new("delay");
        let d = delay.to_string();
        let trial = simulate(
            &w,
            "trial",
            &[
                "--seed",
                &seed.to_string(),
                "--blocks",
                "8",
                "--flow-delay",
                &d,
            ],
        );
        let t = trial.to_str().unwrap();
        ok(&plotsieve(
            &w.0,
            &["stage", "ingest", t, "--out", "run", "--quiet"],
        ));
        ok(&plotsieve(
            &w.0,
            &["stage", "clean", t, "--out", "run", "--quiet"],
        ));
        let sum = json(&w.path("run/2-clean/summary.json"));
        let exports = sum["details"]["exports"].as_object().unwrap();
        assert_eq!(exports.len(), 2);
        for (f, e) in exports {
            assert_eq!(e["flow_delay_source"], "estimated", "{f}");
            let est = e["flow_delay_s"].as_f64().unwrap();
            assert!(
                e["flow_delay_estimate"]["curve"].as_array().unwrap().len() == 21,
                "curve 0..20 s"
            );
            let err = (est - delay).abs();
            worst = worst.max(err);
            assert!(
                err < 1.0,
                "seed {seed} {f}: estimated {est:.2} s, true {delay} s"
            );
        }
    }
    eprintln!("largest flow-delay error over 10 exports: {worst:.2} s");
}

#[test]
fn cleaning_removes_injected_artifacts_and_spares_clean_points() {
    // Truth labels from the simulator say which records carry which artifact.
    let mut art_total = 0usize;
    let mut art_removed = 0usize;
    let mut clean_total = 0usize;
    let mut clean_removed = 0usize;
    let mut by_label: BTreeMap<String, (usize, usize)> = BTreeMap::new();
    let mut clean_by_rule: BTreeMap<String, usize> = BTreeMap::new();
    for seed in [51u64, 52, 53] {
        let w = Workdir::new("artifacts");
        let trial = simulate(&w, "trial", &["--seed", &seed.to_string()]);
        let t = trial.to_str().unwrap();
        ok(&plotsieve(
            &w.0,
            &["stage", "ingest", t, "--out", "run", "--quiet"],
        ));
        ok(&plotsieve(
            &w.0,
            &["stage", "clean", t, "--out", "run", "--quiet"],
        ));
        let truth = json(&w.path("trial/truth.json"));
        let rejected: BTreeMap<(String, u64), String> =
            csv_rows(&w.path("run/2-clean/rejected.csv"))
                .into_iter()
                .map(|r| {
                    (
                        (r["source_file"].clone(), r["source_row"].parse().unwrap()),
                        r["rule"].clone(),
                    )
                })
                .collect();
        for (file, labels) in truth["artifacts"].as_object().unwrap() {
            let lines = std::fs::read_to_string(w.path("trial").join(file))
                .unwrap()
                .lines()
                .count() as u64;
            let mut labelled = std::collections::BTreeSet::new();
            for (label, rows) in labels.as_object().unwrap() {
                let e = by_label.entry(label.clone()).or_default();
                for r in rows.as_array().unwrap() {
                    let r = r.as_u64().unwrap();
                    labelled.insert(r);
                    e.0 += 1;
                    e.1 += usize::from(rejected.contains_key(&(file.clone(), r)));
                }
            }
            for row in 2..=lines {
                let gone = rejected.get(&(file.clone(), row));
                if labelled.contains(&row) {
                    art_total += 1;
                    art_removed += usize::from(gone.is_some());
                } else {
                    clean_total += 1;
                    if let Some(rule) = gone {
                        clean_removed += 1;
                        *clean_by_rule.entry(rule.clone()).or_default() += 1;
                    }
                }
            }
        }
    }
    eprintln!("artifact label: removed / labelled");
    for (l, (n, r)) in &by_label {
        eprintln!("  {l:14} {r:5} / {n:5}");
    }
    eprintln!("clean records removed, by rule: {clean_by_rule:?}");
    let art = art_removed as f64 / art_total as f64;
    let clean = clean_removed as f64 / clean_total as f64;
    eprintln!(
        "artifact records removed {:.1} %, clean records removed {:.1} %",
        100.0 * art,
        100.0 * clean
    );
    assert!(
        art >= 0.90,
        "only {:.1} % of artifact records removed",
        100.0 * art
    );
    assert!(
        clean < 0.05,
        "{:.1} % of clean records removed",
        100.0 * clean
    );
    for (l, (n, r)) in &by_label {
        if l != "spike" {
            assert!(*r as f64 >= 0.9 * *n as f64, "{l}: {r} of {n} removed");
        }
    }
}

#[test]
fn a_delay_at_the_edge_of_its_scan_is_a_warning_and_the_applied_delay_is_reported() {
    let w = Workdir::new("delayedge");
    let trial = simulate(&w, "t", &["--seed", "12", "--flow-delay", "12"]);
    let t = trial.to_str().unwrap();
    // A scan that stops at 5 s, not widened, cannot reach the true 12 s: the estimate sits
    // at its edge.
    let o = run_trial(
        &w,
        &trial,
        "run",
        &["clean.delay.max_s=5", "clean.delay.widen=false"],
    );
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("warning: stage clean: export monitor/field-A.csv: the flow delay estimate 4.61 s sits at the edge of the scan (0-5 s)")
            && e.contains("export monitor/field-B.csv: the flow delay estimate 5.00 s sits at the edge"),
        "{e}"
    );
    // Both reports show the delay applied per export (not only the fallback setting).
    let md = std::fs::read_to_string(w.path("run/5-report/report.md")).unwrap();
    assert!(md.contains("## Delays applied per export"), "{md}");
    assert!(
        md.contains("| monitor/field-B.csv | 5.00 | estimated |"),
        "{md}"
    );
    let html = std::fs::read_to_string(w.path("run/5-report/report.html")).unwrap();
    assert!(html.contains("<h3>Delays applied per export</h3>"));
    // With the default scan the estimate is inside it and there is no such warning.
    let o = plotsieve(&w.0, &["run", t, "--out", "run2", "--quiet"]);
    ok(&o);
    assert!(!String::from_utf8_lossy(&o.stderr).contains("edge of the scan"));
}

/// The pooled uplift of `treatment` (field `all`) and its SD from a run folder.
fn pooled_uplift(run: &std::path::Path, treatment: &str) -> (f64, f64) {
    let rows = csv_rows(&run.join("4-adjust/treatments.csv"));
    let r = rows
        .iter()
        .find(|r| r["field"] == "all" && r["treatment"] == treatment)
        .expect("a pooled row");
    (
        r["uplift_t_ha"].parse().unwrap(),
        r["uplift_sd_t_ha"].parse().unwrap(),
    )
}

#[test]
fn a_strip_trial_keeps_its_uplift_and_its_uncertainty_with_the_local_outlier_rule_on() {
    // Strips one header (9.1 m) wide, every check strip between two product strips, so the
    // rule's 15 m neighbourhood of a check record is mostly product records; a strong
    // effect (4.8 t/ha) and little record noise. Compared across treatments (before the
    // rule knew the plots) it removed a fifth of the records, the high and low ends of each
    // strip, and the uplift's SD fell from 0.54 to 0.37 t/ha: a surer answer from less data.
    // Within a treatment it removes only records unlike their own treatment's neighbours.
    let w = Workdir::new("strips");
    let t = simulate(
        &w,
        "sim",
        &[
            "--strips",
            "--seed",
            "21",
            "--trend-sd",
            "400",
            "--point-noise",
            "100",
            "--effect-scale",
            "8",
            "--quiet",
        ],
    );
    let truth = json(&w.path("sim/truth.json"));
    let true_uplift = truth["effects_t_ha"]["prod-d"].as_f64().unwrap();
    let design = read(&w.path("sim/design.csv"));
    assert!(design.contains(",check,") && design.contains(",prod-d,"));
    assert!(
        !design.contains(",prod-a,"),
        "a strip trial has two treatments"
    );
    run_trial(&w, &t, "on", &[]);
    ok(&plotsieve(
        &w.0,
        &[
            "run",
            t.to_str().unwrap(),
            "--out",
            "off",
            "--quiet",
            "--set",
            "clean.disabled_rules=[\"yield_local_outlier\"]",
        ],
    ));
    let (on, sd_on) = pooled_uplift(&w.path("on"), "prod-d");
    let (off, sd_off) = pooled_uplift(&w.path("off"), "prod-d");
    assert!(
        (on - off).abs() < 0.25 * sd_off,
        "uplift {on} with the rule, {off} without (SD {sd_off}); truth {true_uplift}"
    );
    assert!(
        sd_on > 0.85 * sd_off,
        "SD {sd_on} with the rule, {sd_off} without"
    );
    assert!(
        (on - true_uplift).abs() < 3.0 * sd_on,
        "{on} vs truth {true_uplift}"
    );
    let summary = json(&w.path("on/2-clean/summary.json"));
    assert_eq!(summary["details"]["neighbours_within_treatment"], true);
    let removed = summary["by_rule"]["yield_local_outlier"]
        .as_u64()
        .unwrap_or(0);
    let records = summary["count_in"].as_u64().unwrap();
    assert!(
        (removed as f64) < 0.05 * records as f64,
        "{removed} of {records} records removed by yield_local_outlier"
    );
}

#[test]
fn gps_time_stepping_back_keeps_the_records_in_logged_order() {
    // Field A's clock steps back 45 s a third of the way through its export (and stays
    // behind), and one stamp of field B is out of sequence. Sorted by time, the later
    // records fell among earlier ones and were split off as passes and jumps; in logged
    // order with repaired stamps, the plots come out as from the clean export.
    let w = Workdir::new("timeback");
    let t = simulate(&w, "sim", &["--seed", "5", "--quiet"]);
    run_trial(&w, &t, "clean", &[]);
    let fix = |p: &std::path::Path, f: &dyn Fn(usize, &str) -> String| {
        map_lines(p, |i, l| {
            if i == 0 {
                return l.to_string();
            }
            let (time, rest) = l.split_once(',').unwrap();
            format!("{},{rest}", f(i, time))
        });
    };
    // 2026-09-18T09:MM:SSZ stamps: shift by seconds.
    fn shifted(stamp: &str, by: i64) -> String {
        let hms = &stamp[11..19];
        let s: i64 = hms[0..2].parse::<i64>().unwrap() * 3600
            + hms[3..5].parse::<i64>().unwrap() * 60
            + hms[6..8].parse::<i64>().unwrap()
            + by;
        format!(
            "{}{:02}:{:02}:{:02}Z",
            &stamp[..11],
            s / 3600,
            (s / 60) % 60,
            s % 60
        )
    }
    let a = w.path("sim/monitor/field-A.csv");
    let n = read(&a).lines().count();
    fix(&a, &|i, time| {
        if i > n / 3 {
            shifted(time, -45)
        } else {
            time.to_string()
        }
    });
    fix(&w.path("sim/monitor/field-B.csv"), &|i, time| {
        if i == 500 {
            shifted(time, -600)
        } else {
            time.to_string()
        }
    });
    run_trial(&w, &t, "stepped", &[]);
    let clean = csv_rows(&w.path("clean/3-plots/plots.csv"));
    let stepped = csv_rows(&w.path("stepped/3-plots/plots.csv"));
    assert_eq!(clean.len(), stepped.len());
    for (c, s) in clean.iter().zip(&stepped) {
        assert_eq!(c["status"], s["status"], "{}", c["plot_id"]);
        if c["status"] == "kept" {
            let (yc, ys): (f64, f64) = (
                c["yield_mean_t_ha"].parse().unwrap(),
                s["yield_mean_t_ha"].parse().unwrap(),
            );
            assert!(
                (yc - ys).abs() < 0.005 * yc,
                "{}: {yc} vs {ys}",
                c["plot_id"]
            );
        }
    }
    let summary = json(&w.path("stepped/2-clean/summary.json"));
    let ex = &summary["details"]["exports"];
    assert_eq!(ex["monitor/field-A.csv"]["time_steps_back"], 1);
    assert_eq!(ex["monitor/field-B.csv"]["time_steps_back"], 1);
    let warnings = summary["details"]["warnings"].to_string();
    assert!(warnings.contains("GPS time stepped back"), "{warnings}");
}

#[test]
fn the_delay_scan_widens_past_its_edge_and_takes_negative_lags() {
    // The best lag at the upper edge of a 0-5 s scan: widened (to 0-10, then 0-20 s) it
    // finds the true 12 s, and there is no edge warning.
    let w = Workdir::new("delaywiden");
    let trial = simulate(&w, "t", &["--seed", "12", "--flow-delay", "12"]);
    let o = run_trial(&w, &trial, "run", &["clean.delay.max_s=5"]);
    assert!(!String::from_utf8_lossy(&o.stderr).contains("edge of the scan"));
    let s = json(&w.path("run/2-clean/summary.json"));
    for (name, d) in s["details"]["exports"].as_object().unwrap() {
        let lag = d["flow_delay_s"].as_f64().unwrap();
        assert!((lag - 12.0).abs() < 1.0, "{name}: {lag}");
        let curve = d["flow_delay_estimate"]["curve"].as_array().unwrap();
        assert_eq!(curve.last().unwrap()[0].as_f64(), Some(20.0), "{name}");
    }
    // An export already delay-corrected (true delay 0): the best lag sat at the scan's lower
    // edge, 0 s, with a warning; widened below 0 the estimate is within a second of 0 and
    // inside the scan.
    let trial = simulate(&w, "c", &["--seed", "12", "--flow-delay", "0"]);
    let t = trial.to_str().unwrap();
    let o = plotsieve(&w.0, &["run", t, "--out", "corrected", "--quiet"]);
    ok(&o);
    assert!(
        !String::from_utf8_lossy(&o.stderr).contains("edge of the scan"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let s = json(&w.path("corrected/2-clean/summary.json"));
    for (name, d) in s["details"]["exports"].as_object().unwrap() {
        let lag = d["flow_delay_s"].as_f64().unwrap();
        assert!(lag.abs() < 1.0, "{name}: {lag}");
        let curve = d["flow_delay_estimate"]["curve"].as_array().unwrap();
        assert!(
            curve[0][0].as_f64().unwrap() < -5.0,
            "{name}: the scan went below 0"
        );
    }
    // The report says what a delay of about zero means, in plain words.
    let md = read(&w.path("corrected/5-report/report.md"));
    assert!(
        md.contains("The flow delay estimate is about zero")
            || md.contains("The flow delay estimate is negative"),
        "{md}"
    );
    // Negative lags may be asked for directly, within -20 to 40 s.
    ok(&plotsieve(
        &w.0,
        &["check", t, "--set", "clean.delay.min_s=-5"],
    ));
    let o = plotsieve(&w.0, &["check", t, "--set", "clean.delay.min_s=-50"]);
    assert_eq!(o.status.code(), Some(1));
    let e = printed(&o);
    assert!(
        e.contains("clean.delay.min_s must be between -20 and 40 s (got -50)"),
        "{e}"
    );
}

#[test]
fn a_work_state_that_flickers_off_while_cutting_keeps_its_records() {
    // A header-height switch that flicks off for two records now and then in mid-pass (as
    // real forage-harvester logs do, hundreds of times a day). Before: every such record was
    // removed as work_state_off. Now a spell of "off" records between working records at most
    // clean.work_state_bridge_s (4 s) apart is kept and counted: the plot table is the same
    // byte for byte as the harvest without flicker; with the bridge at 0 they go again.
    let w = Workdir::new("clean-flicker");
    let sim = simulate(&w, "sim", &["--seed", "2", "--quiet"]);
    run_trial(&w, &sim, "r-base", &[]);
    let p = w.path("sim/monitor/field-A.csv");
    let text = read(&p);
    let mut lines: Vec<String> = text.lines().map(String::from).collect();
    let k = lines[0]
        .split(',')
        .position(|c| c == "header_state")
        .unwrap();
    let on = |l: &str| l.split(',').nth(k) == Some("1");
    let mut flipped = 0;
    let mut i = 100;
    while i + 3 < lines.len() {
        // Two "off" records with a working record on each side.
        if (i - 1..=i + 2).all(|j| on(&lines[j])) {
            for line in lines.iter_mut().skip(i).take(2) {
                let mut v: Vec<&str> = line.split(',').collect();
                v[k] = "0";
                *line = v.join(",");
            }
            flipped += 2;
        }
        i += 61;
    }
    assert!(flipped >= 40, "{flipped}");
    std::fs::write(&p, lines.join("\n") + "\n").unwrap();
    run_trial(&w, &sim, "r-flicker", &[]);
    assert_eq!(
        read(&w.path("r-base/3-plots/plots.csv")),
        read(&w.path("r-flicker/3-plots/plots.csv"))
    );
    let (base, flick) = (
        json(&w.path("r-base/2-clean/summary.json")),
        json(&w.path("r-flicker/2-clean/summary.json")),
    );
    assert_eq!(base["by_rule"], flick["by_rule"]);
    let bridged = &flick["details"]["exports"]["monitor/field-A.csv"]["work_state_bridged"];
    assert_eq!(bridged.as_u64(), Some(flipped as u64));
    ok(&plotsieve(
        &w.0,
        &[
            "run",
            sim.to_str().unwrap(),
            "--out",
            "r-nobridge",
            "--quiet",
            "--set",
            "clean.work_state_bridge_s=0",
        ],
    ));
    let nob = json(&w.path("r-nobridge/2-clean/summary.json"));
    assert_eq!(
        nob["by_rule"]["work_state_off"].as_u64().unwrap(),
        base["by_rule"]["work_state_off"].as_u64().unwrap() + flipped as u64
    );
}
