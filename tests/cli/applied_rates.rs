//! As-applied rates through the binary: `simulate --rates --applied` (a spreader that logs
//! its rate on every record and under-applies N120 by 15 %) run as a user would, each plot's
//! rate against the simulator's truth, the treatments against their targets, the warning,
//! the curve at the as-applied means, the same rates logged in lb/ac, and what is refused.

use crate::common::*;
use std::collections::BTreeMap;

/// The simulator's true gain (t/ha) at `rate` kg N/ha: rise 1.8 t/ha, join 150 kg N/ha.
fn true_gain(rate: f64) -> f64 {
    let v = 1.0 - rate.min(150.0) / 150.0;
    1.8 * (1.0 - v * v)
}

fn num(r: &BTreeMap<String, String>, k: &str) -> f64 {
    r[k].parse()
        .unwrap_or_else(|_| panic!("{k} = {:?} in {r:?}", r[k]))
}

#[test]
fn as_applied_rates_are_summarised_per_plot_and_set_against_their_targets() {
    let w = Workdir::new("applied-sim");
    let t = simulate(&w, "sim", &["--rates", "--applied", "--seed", "3"]);
    let said = checked(&w, t.to_str().unwrap());
    assert!(
        said.contains("read: as-applied rates from column applied_n_kg_ha in kg_ha; the curves place each treatment at its target rate"),
        "{said}"
    );
    run_trial(&w, &t, "run", &[]);
    // Each kept plot's as-applied mean against the truth: the records carry the plot's
    // rate with 1 % noise each (measured: within 0.9 kg/ha, 0.5 %).
    let truth = json(&w.path("sim/truth.json"));
    let applied_truth = truth_by_plot(&truth, "applied_kg_ha");
    let plots = csv_rows(&w.path("run/3-plots/applied_rates.csv"));
    assert_eq!(plots.len(), 48);
    let mut kept_n120 = Vec::new();
    for p in &plots {
        if p["status"] != "kept" {
            continue;
        }
        let want = applied_truth[&p["plot_id"]];
        let got = num(p, "applied_mean_kg_ha");
        assert!(num(p, "rate_points") > 5.0, "{p:?}");
        assert!((got - want).abs() <= 0.01 * want, "{p:?}: true {want}");
        if p["treatment"] == "N120" {
            kept_n120.push(want);
        }
    }
    assert!(kept_n120.len() >= 6, "{kept_n120:?}");
    // Empty rate cells (headlands, alleys) are no rate, not a rejection.
    assert!(csv_rows(&w.path("run/1-ingest/rejected.csv"))
        .iter()
        .all(|r| r["column"] != "applied_n_kg_ha"));
    // The treatments against their targets: N120 averaged 15 % under, the others on target.
    let rows = csv_rows(&w.path("run/4-adjust/applied_rates.csv"));
    let all: Vec<&BTreeMap<String, String>> = rows.iter().filter(|r| r["field"] == "all").collect();
    assert_eq!(
        all.iter()
            .map(|r| r["treatment"].as_str())
            .collect::<Vec<_>>(),
        ["N0", "N40", "N80", "N120", "N160", "N200"]
    );
    for r in &all {
        let pct = num(r, "difference_pct");
        if r["treatment"] == "N120" {
            let want = kept_n120.iter().sum::<f64>() / kept_n120.len() as f64;
            assert!(
                (num(r, "applied_mean") - want).abs() < 0.5,
                "{r:?}: true {want}"
            );
            assert!((-18.0..-12.0).contains(&pct), "{r:?}");
        } else {
            assert!(pct.abs() < 3.0, "{r:?}");
        }
    }
    // One warning, naming N120, in the summary and at the top of the report.
    let summary = json(&w.path("run/4-adjust/summary.json"));
    let warned: Vec<&str> = summary["details"]["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .filter_map(|v| v.as_str())
        .filter(|v| v.starts_with("as-applied rates"))
        .collect();
    assert_eq!(warned.len(), 1, "{warned:?}");
    assert!(warned[0].contains("N120 averaged"), "{warned:?}");
    let md = read(&w.path("run/5-report/report.md"));
    let top = &md[..md.find("## Decision").unwrap()];
    assert!(top.contains("as-applied rates: N120 averaged"), "{top}");
    assert!(md.contains("### As applied against target"), "{md}");

    // The curve at the as-applied means: the summary records them as the rates used, the
    // curve is tabled at them, and each holds the true gain there in its 95 % band.
    run_trial(&w, &t, "at", &["adjust.rate_source=\"applied\""]);
    let used = json(&w.path("at/4-adjust/summary.json"))["details"]["rate_trial"].clone();
    assert_eq!(used["rate_source"], "applied");
    let n120 = all.iter().find(|r| r["treatment"] == "N120").unwrap();
    assert_eq!(
        format!("{:.3}", used["rates"]["N120"].as_f64().unwrap()),
        n120["applied_mean"]
    );
    let mut tested = 0;
    for c in csv_rows(&w.path("at/4-adjust/response_curve.csv")) {
        if c["field"] != "all" || c["tested"] != "true" {
            continue;
        }
        tested += 1;
        let want = true_gain(num(&c, "rate"));
        assert!(
            num(&c, "gain_lo95_t_ha") <= want && want <= num(&c, "gain_hi95_t_ha"),
            "{c:?}: true {want}"
        );
    }
    assert_eq!(tested, 6);
    assert!(csv_rows(&w.path("at/4-adjust/response_curve.csv"))
        .iter()
        .any(|c| c["tested"] == "true" && c["rate"] == n120["applied_mean"]));
    // A rerun gives the same bytes.
    run_trial(&w, &t, "again", &["adjust.rate_source=\"applied\""]);
    for f in ["applied_rates.csv", "response.csv", "response_curve.csv"] {
        assert_eq!(
            sha(&w.path("at/4-adjust").join(f)),
            sha(&w.path("again/4-adjust").join(f)),
            "{f}"
        );
    }

    // The same records logged in lb/ac: the same as-applied means in kg/ha.
    let lb = w.path("lb");
    copy_dir(&w.path("sim"), &lb);
    for f in ["field-A.csv", "field-B.csv"] {
        set_col(&lb.join("monitor").join(f), "applied_n_kg_ha", |v| {
            if v.is_empty() {
                String::new()
            } else {
                format!("{:.6}", v.parse::<f64>().unwrap() / 1.120851)
            }
        });
    }
    replace(
        &lb.join("trial.toml"),
        "unit = \"kg_ha\" }",
        "unit = \"lb_ac\" }",
        1,
    );
    run_trial(&w, &lb.join("trial.toml"), "lb-run", &[]);
    let per_plot = csv_rows(&w.path("lb-run/3-plots/applied_rates.csv"));
    assert!(
        per_plot[0].contains_key("applied_mean_lb_ac"),
        "{:?}",
        per_plot[0]
    );
    let lb_rows = csv_rows(&w.path("lb-run/4-adjust/applied_rates.csv"));
    assert_eq!(lb_rows.len(), rows.len());
    for (a, b) in rows.iter().zip(&lb_rows) {
        assert_eq!(b["rate_unit"], "kg_ha");
        assert!(
            (num(a, "applied_mean") - num(b, "applied_mean")).abs() < 0.01,
            "{a:?} against {b:?}"
        );
    }
}

#[test]
fn as_applied_settings_and_rates_that_cannot_be_used_are_refused_by_name() {
    let w = Workdir::new("applied-refused");
    let refused = |trial: &std::path::Path, sets: &[&str], want: &str| {
        run_refused(&w, trial, "run", sets, want)
    };
    // Curves at as-applied means without an as-applied column.
    let plain = simulate(&w, "plain", &["--rates", "--seed", "5", "--blocks", "2"]);
    refused(
        &plain,
        &["adjust.rate_source=\"applied\""],
        "adjust.rate_source = \"applied\" needs the exports' as-applied rate column",
    );
    // A column whose unit measures seeds, for rates in kg/ha.
    let t = simulate(
        &w,
        "sim",
        &["--rates", "--applied", "--seed", "5", "--blocks", "2"],
    );
    refused(
        &t,
        &["columns.applied_rate.unit=\"seeds_ha\""],
        "columns.applied_rate.unit = \"seeds_ha\" does not measure what adjust.rate_unit = \"kg_ha\" does",
    );
    // An as-applied column in a trial without rates.
    let p = simulate(&w, "products", &["--seed", "5", "--blocks", "2"]);
    replace(
        &p,
        "[columns]\n",
        "[columns]\napplied_rate = { name = \"hdop\", unit = \"kg_ha\" }\n",
        1,
    );
    refused(&p, &[], "columns.applied_rate is read for a rate trial");
    // A negative rate on one record: that record is rejected by name, the rest run.
    let mut line = 0;
    map_lines(&w.path("sim/monitor/field-A.csv"), |i, l| {
        if line == 0 && i > 0 && !l.ends_with(',') {
            line = i + 1;
            let (head, _) = l.rsplit_once(',').unwrap();
            return format!("{head},-5.00");
        }
        l.to_string()
    });
    run_trial(&w, &t, "neg", &[]);
    let rejected = csv_rows(&w.path("neg/1-ingest/rejected.csv"));
    let neg: Vec<_> = rejected
        .iter()
        .filter(|r| r["column"] == "applied_n_kg_ha")
        .collect();
    assert_eq!(neg.len(), 1, "{neg:?}");
    assert_eq!(neg[0]["rule"], "negative_value");
    assert_eq!(neg[0]["source_row"], line.to_string());
    assert_eq!(neg[0]["value"], "-5.00");
    let s = json(&w.path("neg/1-ingest/summary.json"));
    assert_eq!(
        s["count_in"].as_u64().unwrap(),
        s["kept"].as_u64().unwrap() + s["rejected"].as_u64().unwrap()
    );
}
