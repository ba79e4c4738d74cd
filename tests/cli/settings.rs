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
