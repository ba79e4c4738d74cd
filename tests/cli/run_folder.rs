//! The run folder: every stage accounts for every point, reruns give the same bytes, one stage reruns alone, a missing upstream stage is named.

use crate::common::*;

#[test]
fn sample_input_runs_end_to_end_and_accounts_for_every_point() {
    let w = Workdir::new("sample");
    let sample = repo().join("sample-input");
    let before = all_files(&sample);
    let out = w.path("run");
    ok(&plotsieve(
        &w.0,
        &[
            "run",
            sample.join("trial.toml").to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
            "--quiet",
        ],
    ));
    assert_eq!(before, all_files(&sample), "inputs must never be modified");
    for f in [
        "manifest.json",
        "1-ingest/points.parquet",
        "1-ingest/plots.geojson",
        "2-clean/points.parquet",
        "3-plots/plots.csv",
        "3-plots/points.parquet",
        "4-adjust/adjusted_plots.csv",
        "4-adjust/treatments.csv",
        "4-adjust/hyperparameters.csv",
        "5-report/report.md",
    ] {
        assert!(out.join(f).is_file(), "missing {f}");
    }
    let mut prev_kept = None;
    for s in STAGES {
        let sum = json(&out.join(s).join("summary.json"));
        let (cin, kept, rej) = (
            sum["count_in"].as_u64().unwrap(),
            sum["kept"].as_u64().unwrap(),
            sum["rejected"].as_u64().unwrap(),
        );
        assert_eq!(cin, kept + rej, "{s}: count in = kept + rejected");
        let by_rule: u64 = sum["by_rule"]
            .as_object()
            .unwrap()
            .values()
            .map(|v| v.as_u64().unwrap())
            .sum();
        assert_eq!(by_rule, rej, "{s}: rules add up");
        let rows = csv_rows(&out.join(s).join("rejected.csv"));
        let plot_rows = sum
            .get("plots")
            .and_then(|p| p["set_aside"].as_u64())
            .unwrap_or(0);
        assert_eq!(rows.len() as u64, rej + plot_rows, "{s}: rejected.csv rows");
        if s == "4-adjust" {
            assert_eq!(
                Some(cin),
                prev_kept,
                "adjust takes the plots stage's kept plots"
            );
        } else if let Some(k) = prev_kept {
            assert_eq!(cin, k, "{s} takes the previous stage's kept points");
        }
        prev_kept = Some(match sum.get("plots") {
            Some(p) => {
                let (pi, pk, ps) = (
                    p["count_in"].as_u64().unwrap(),
                    p["kept"].as_u64().unwrap(),
                    p["set_aside"].as_u64().unwrap(),
                );
                assert_eq!(pi, pk + ps, "plots: plots in = kept + set aside");
                pk
            }
            None => kept,
        });
    }
    // The ingest count equals the data lines of the exports.
    let lines: u64 = std::fs::read_dir(sample.join("monitor"))
        .unwrap()
        .map(|e| {
            std::fs::read_to_string(e.unwrap().path())
                .unwrap()
                .lines()
                .count() as u64
                - 1
        })
        .sum();
    assert_eq!(
        json(&out.join("1-ingest/summary.json"))["count_in"]
            .as_u64()
            .unwrap(),
        lines
    );
    // Plot points: every kept clean point is in exactly one plot or rejected.
    let pp = parquet(&out.join("3-plots/points.parquet"));
    let plots_sum = json(&out.join("3-plots/summary.json"));
    assert_eq!(pp.height() as u64, plots_sum["kept"].as_u64().unwrap());
    let manifest = json(&out.join("manifest.json"));
    for s in ["ingest", "clean", "plots", "adjust", "report"] {
        assert_eq!(manifest["stages"][s]["status"], "done", "{s}");
    }
    assert_eq!(
        manifest["inputs"].as_array().unwrap().len(),
        5,
        "trial, two exports, plots, design"
    );
    assert_eq!(manifest["inputs"][0]["sha256"].as_str().unwrap().len(), 64);
    let treatments = csv_rows(&out.join("4-adjust/treatments.csv"));
    for field in ["A", "B", "all"] {
        let n = treatments.iter().filter(|r| r["field"] == field).count();
        assert_eq!(n, 6, "six treatments in field {field}");
    }
    for r in treatments.iter().filter(|r| r["treatment"] != "check") {
        let p: f64 = r["p_uplift_gt0"].parse().unwrap();
        assert!((0.0..=1.0).contains(&p));
        let (lo, up, hi): (f64, f64, f64) = (
            r["uplift_lo95_t_ha"].parse().unwrap(),
            r["uplift_t_ha"].parse().unwrap(),
            r["uplift_hi95_t_ha"].parse().unwrap(),
        );
        assert!(lo < up && up < hi);
    }
    let report = std::fs::read_to_string(out.join("5-report/report.md")).unwrap();
    assert!(
        report.contains("statistical estimates") && report.contains("licensed agronomic advice")
    );
    assert!(
        report.contains("| clean | pass_start |"),
        "removals by rule listed"
    );
}

#[test]
fn rerun_gives_identical_tables_run_or_stage_by_stage() {
    let w = Workdir::new("rerun");
    let trial = simulate(&w, "trial", &["--seed", "5"]);
    let t = trial.to_str().unwrap();
    ok(&plotsieve(&w.0, &["run", t, "--out", "a", "--quiet"]));
    ok(&plotsieve(&w.0, &["run", t, "--out", "b", "--quiet"]));
    let mut a = all_files(&w.path("a"));
    let mut b = all_files(&w.path("b"));
    a.remove("manifest.json");
    b.remove("manifest.json");
    assert_eq!(a.keys().collect::<Vec<_>>(), b.keys().collect::<Vec<_>>());
    for (k, v) in &a {
        assert!(v == &b[k], "{k} differs between reruns");
    }
    // Inside `run` ingest hands its records and clean its points to the next stage in
    // memory; rerun alone, each stage reads the files instead. Both give the same bytes.
    for stage in ["clean", "plots", "adjust", "report"] {
        ok(&plotsieve(
            &w.0,
            &["stage", stage, t, "--out", "b", "--quiet"],
        ));
    }
    let mut b = all_files(&w.path("b"));
    b.remove("manifest.json");
    assert_eq!(a.keys().collect::<Vec<_>>(), b.keys().collect::<Vec<_>>());
    for (k, v) in &a {
        assert!(
            v == &b[k],
            "{k} differs between run and stages rerun one by one"
        );
    }
}

#[test]
fn stage_clean_with_set_changes_clean_and_leaves_ingest_untouched() {
    let w = Workdir::new("stage");
    let trial = simulate(&w, "trial", &["--seed", "2"]);
    let t = trial.to_str().unwrap();
    ok(&plotsieve(&w.0, &["run", t, "--out", "run", "--quiet"]));
    let ingest_before = all_files(&w.path("run/1-ingest"));
    let mtime = std::fs::metadata(w.path("run/1-ingest/points.parquet"))
        .unwrap()
        .modified()
        .unwrap();
    let clean_before = json(&w.path("run/2-clean/summary.json"));
    let clean_pts_before = std::fs::read(w.path("run/2-clean/points.parquet")).unwrap();
    ok(&plotsieve(
        &w.0,
        &[
            "stage",
            "clean",
            t,
            "--out",
            "run",
            "--quiet",
            "--set",
            "clean.speed.min_m_s=2.1",
        ],
    ));
    let clean_after = json(&w.path("run/2-clean/summary.json"));
    assert!(
        clean_after["by_rule"]["speed_min"].as_u64().unwrap()
            > clean_before["by_rule"]["speed_min"].as_u64().unwrap_or(0) + 100,
        "raising the speed minimum removes more points: {} -> {}",
        clean_before["by_rule"]["speed_min"],
        clean_after["by_rule"]["speed_min"]
    );
    assert_ne!(
        clean_pts_before,
        std::fs::read(w.path("run/2-clean/points.parquet")).unwrap()
    );
    assert_eq!(
        ingest_before,
        all_files(&w.path("run/1-ingest")),
        "ingest outputs untouched"
    );
    assert_eq!(
        mtime,
        std::fs::metadata(w.path("run/1-ingest/points.parquet"))
            .unwrap()
            .modified()
            .unwrap()
    );
    let m = json(&w.path("run/manifest.json"));
    assert_eq!(m["stages"]["ingest"]["status"], "done");
    assert_eq!(m["stages"]["clean"]["status"], "done");
    assert_eq!(
        m["stages"]["clean"]["settings"]["clean"]["speed"]["min_m_s"],
        2.1
    );
    for s in ["plots", "adjust", "report"] {
        assert_eq!(m["stages"][s]["status"], "stale", "{s}");
    }
    // A stale upstream must be rerun before the stage after it.
    let o = plotsieve(&w.0, &["stage", "adjust", t, "--out", "run", "--quiet"]);
    assert_eq!(o.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&o.stderr).contains("rerun stage plots first"));
    ok(&plotsieve(
        &w.0,
        &["stage", "plots", t, "--out", "run", "--quiet"],
    ));
}

#[test]
fn missing_upstream_output_says_which_stage_to_run() {
    let w = Workdir::new("upstream");
    let trial = simulate(&w, "trial", &["--seed", "3"]);
    let t = trial.to_str().unwrap();
    let o = plotsieve(&w.0, &["stage", "plots", t, "--out", "run"]);
    assert_eq!(o.status.code(), Some(1));
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("run stage ingest first"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    ok(&plotsieve(
        &w.0,
        &["stage", "ingest", t, "--out", "run", "--quiet"],
    ));
    let o = plotsieve(&w.0, &["stage", "plots", t, "--out", "run"]);
    assert_eq!(o.status.code(), Some(1));
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("run stage clean first"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
}

#[test]
fn a_run_folder_never_shows_outputs_that_no_longer_hold() {
    let w = Workdir::new("honest");
    let a = simulate(&w, "a", &["--seed", "4"]);
    let b = simulate(&w, "b", &["--seed", "6"]);
    let (a, b) = (a.to_str().unwrap(), b.to_str().unwrap());
    // Without --out, trial files of the same name in different folders get their own
    // run folders.
    ok(&plotsieve(&w.0, &["run", a, "--quiet"]));
    ok(&plotsieve(&w.0, &["run", b, "--quiet"]));
    let run_a = w.path("runs/a-trial");
    assert!(run_a.join("5-report/report.html").exists());
    assert!(w.path("runs/b-trial/5-report/report.html").exists());
    // A stage that fails removes its own outputs and every later stage's, and the
    // manifest says which failed and why.
    let o = plotsieve(
        &w.0,
        &[
            "stage",
            "adjust",
            a,
            "--out",
            "runs/a-trial",
            "--quiet",
            "--set",
            "adjust.plot_table=\"nope.csv\"",
        ],
    );
    assert_eq!(o.status.code(), Some(1));
    for gone in ["4-adjust", "5-report"] {
        assert!(
            !run_a.join(gone).exists(),
            "{gone} must not survive a failed rerun"
        );
    }
    assert!(
        run_a.join("3-plots/plots.csv").exists(),
        "upstream outputs stay"
    );
    let m = json(&run_a.join("manifest.json"));
    assert_eq!(m["stages"]["adjust"]["status"], "failed");
    assert!(
        m["stages"]["adjust"]["error"]
            .as_str()
            .unwrap()
            .contains("nope.csv"),
        "{m}"
    );
    assert_eq!(m["stages"]["report"]["status"], "stale");
    assert_eq!(m["stages"]["plots"]["status"], "done");
    let o = plotsieve(
        &w.0,
        &["stage", "report", a, "--out", "runs/a-trial", "--quiet"],
    );
    assert_eq!(o.status.code(), Some(1));
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("which is failed: rerun stage adjust first"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    // Another trial's file in this run folder is refused.
    let o = plotsieve(
        &w.0,
        &["stage", "clean", b, "--out", "runs/a-trial", "--quiet"],
    );
    assert_eq!(o.status.code(), Some(1));
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(e.contains("holds a run of trial file"), "{e}");
    // Inputs changed since ingest read them: a later stage refuses to mix the two.
    let design = w.path("a/design.csv");
    let mut text = std::fs::read_to_string(&design).unwrap();
    text.push('\n');
    std::fs::write(&design, text).unwrap();
    let o = plotsieve(
        &w.0,
        &["stage", "clean", a, "--out", "runs/a-trial", "--quiet"],
    );
    assert_eq!(o.status.code(), Some(1));
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("design.csv (changed)") && e.contains("rerun from stage ingest"),
        "{e}"
    );
    // A full run starts over and ends clean, and a temporary file a killed write left
    // behind goes.
    std::fs::write(run_a.join(".manifest.json.999999.tmp"), "half").unwrap();
    ok(&plotsieve(&w.0, &["run", a, "--quiet"]));
    assert!(!run_a.join(".manifest.json.999999.tmp").exists());
    let m = json(&run_a.join("manifest.json"));
    for s in ["ingest", "clean", "plots", "adjust", "report"] {
        assert_eq!(m["stages"][s]["status"], "done", "{s}");
    }
}

#[test]
fn the_report_summary_counts_the_plots_it_reports() {
    let w = Workdir::new("reportsummary");
    let trial = simulate(&w, "t", &["--seed", "16"]);
    run_trial(&w, &trial, "run", &[]);
    let adjust = json(&w.path("run/4-adjust/summary.json"));
    let report = json(&w.path("run/5-report/summary.json"));
    assert!(adjust["kept"].as_u64().unwrap() > 0);
    assert_eq!(report["count_in"], adjust["kept"]);
    assert_eq!(report["kept"], adjust["kept"]);
    assert_eq!(report["rejected"], 0);
    assert_eq!(
        report["details"]["files"],
        serde_json::json!(["report.md", "report.html"])
    );
    assert_eq!(report["details"]["warnings_shown"], 0);
}

#[cfg(unix)]
#[test]
fn one_process_at_a_time_per_run_folder_and_a_killed_holder_is_taken_over() {
    // Before: two processes in one run folder at once raced (a rename error; one trial's
    // adjust fitting the other's plots; both exiting 0 with one trial's results). The
    // first process here waits, holding the folder, on a design table that is a named pipe
    // nothing writes to yet.
    let w = Workdir::new("lock");
    let t = simulate(&w, "trial", &["--seed", "2", "--quiet"]);
    let t = t.to_str().unwrap();
    let design = w.path("trial/design.csv");
    let text = std::fs::read(&design).unwrap();
    std::fs::remove_file(&design).unwrap();
    ok(&Command::new("mkfifo").arg(&design).output().unwrap());
    let mut first = Command::new(BIN)
        .args(["run", t, "--out", "run", "--quiet"])
        .current_dir(&w.0)
        .spawn()
        .unwrap();
    let lock = w.path(".run.lock");
    let holder = format!("pid {}", first.id());
    let start = std::time::Instant::now();
    while !std::fs::read_to_string(&lock).is_ok_and(|s| s.starts_with(&holder)) {
        assert!(
            start.elapsed().as_secs() < 30,
            "the first run never took the lock"
        );
        std::thread::sleep(std::time::Duration::from_millis(20));
    }
    for args in [
        vec!["run", t, "--out", "run", "--quiet"],
        vec!["stage", "report", t, "--out", "run", "--quiet"],
    ] {
        let o = plotsieve(&w.0, &args);
        assert_eq!(o.status.code(), Some(1), "{args:?}");
        let e = String::from_utf8_lossy(&o.stderr);
        assert!(
            e.contains("run folder run is in use by another plotsieve process")
                && e.contains(&format!("{holder}, command "))
                && e.contains("started "),
            "{e}"
        );
    }
    // Killed while holding it: the next run takes the folder over and says so.
    first.kill().unwrap();
    first.wait().unwrap();
    assert!(lock.exists());
    std::fs::remove_file(&design).unwrap();
    std::fs::write(&design, &text).unwrap();
    let o = plotsieve(&w.0, &["run", t, "--out", "run", "--quiet"]);
    ok(&o);
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("took over the lock of run folder run"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    // Released when done: no lock file is left beside the folder.
    assert!(!lock.exists());
    assert_eq!(
        json(&w.path("run/manifest.json"))["stages"]["report"]["status"],
        "done"
    );
}
