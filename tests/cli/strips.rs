//! Strip trials without plot polygons: every record carries its treatment label
//! (`simulate --labels`), the plots and design are built from the labels, and the plots
//! come out as the drawn polygons of the same harvest give them.

use crate::common::*;
use std::collections::BTreeMap;

/// A plots.csv row: (plot id, treatment, status, yield t/ha, centroid x, y).
type Row = (String, String, String, f64, f64, f64);

fn plot_rows(run: &std::path::Path) -> Vec<Row> {
    csv_rows(&run.join("3-plots/plots.csv"))
        .into_iter()
        .map(|r| {
            let f = |k: &str| r[k].parse::<f64>().unwrap_or(f64::NAN);
            (
                r["plot_id"].clone(),
                r["treatment"].clone(),
                r["status"].clone(),
                f("yield_mean_t_ha"),
                f("centroid_x_m"),
                f("centroid_y_m"),
            )
        })
        .collect()
}

/// Each label-built plot matched to the drawn plot with the nearest centroid: asserts one
/// match per drawn plot, within `near_m`, with the same treatment, and the same status but
/// for at most `status_slack` plots; returns the relative yield differences of plots kept
/// in both, sorted.
fn matched(drawn: &[Row], built: &[Row], near_m: f64, status_slack: usize) -> Vec<f64> {
    let mut differ = Vec::new();
    assert_eq!(drawn.len(), built.len(), "plot counts");
    let mut used = BTreeMap::new();
    let mut d = Vec::new();
    for b in built {
        let (k, a) = drawn
            .iter()
            .enumerate()
            .min_by(|x, y| {
                let dx = (x.1 .4 - b.4).hypot(x.1 .5 - b.5);
                let dy = (y.1 .4 - b.4).hypot(y.1 .5 - b.5);
                dx.total_cmp(&dy)
            })
            .unwrap();
        let dist = (a.4 - b.4).hypot(a.5 - b.5);
        assert!(dist < near_m, "{} is {dist} m from {}", b.0, a.0);
        assert!(
            used.insert(k, b.0.clone()).is_none(),
            "{} matched twice",
            a.0
        );
        assert_eq!(a.1, b.1, "treatment of {} ({})", b.0, a.0);
        if a.2 != b.2 {
            differ.push(format!("{} ({}): {} against {}", b.0, a.0, b.2, a.2));
        }
        if a.2 == "kept" && b.2 == "kept" {
            d.push(((b.3 - a.3) / a.3).abs());
        }
    }
    assert!(differ.len() <= status_slack, "statuses differ: {differ:?}");
    d.sort_by(f64::total_cmp);
    d
}

/// Treatments of each (field, block) of a run's design table.
fn blocks(run: &std::path::Path) -> BTreeMap<(String, String), Vec<String>> {
    let mut per_block: BTreeMap<(String, String), Vec<String>> = BTreeMap::new();
    for r in csv_rows(&run.join("1-ingest/design.csv")) {
        per_block
            .entry((r["field"].clone(), r["block"].clone()))
            .or_default()
            .push(r["treatment"].clone());
    }
    per_block
}

/// `plotsieve check TRIAL --set SET`.
fn check_with(w: &Workdir, t: &std::path::Path, set: &str) -> std::process::Output {
    plotsieve(&w.0, &["check", t.to_str().unwrap(), "--set", set])
}

fn uplift(run: &std::path::Path, treatment: &str) -> f64 {
    csv_rows(&run.join("4-adjust/treatments.csv"))
        .into_iter()
        .find(|r| r["field"] == "all" && r["treatment"] == treatment)
        .unwrap()["uplift_t_ha"]
        .parse()
        .unwrap()
}

#[test]
fn plots_built_from_treatment_labels_match_the_drawn_plots_of_the_same_harvest() {
    let w = Workdir::new("strips-labels");
    // The RCBD (plots two passes wide, six treatments a range, alleys between ranges).
    let drawn = simulate(&w, "drawn", &["--seed", "2", "--quiet"]);
    let labelled = simulate(&w, "labelled", &["--seed", "2", "--labels", "--quiet"]);
    assert!(!w.path("labelled/plots.geojson").exists());
    assert!(!w.path("labelled/design.csv").exists());
    let out = checked(&w, labelled.to_str().unwrap());
    assert!(
        out.contains("read: plots: 48 plots in 2 field(s) built from the treatment labels (column \"treatment\", columns.treatment)"),
        "{out}"
    );
    for (t, r) in [(&drawn, "r-drawn"), (&labelled, "r-labelled")] {
        run_trial(&w, &t, r, &[]);
    }
    let d = matched(
        &plot_rows(&w.path("r-drawn")),
        &plot_rows(&w.path("r-labelled")),
        2.0,
        0,
    );
    eprintln!(
        "RCBD from labels: {} kept plots, largest yield difference {:.5}",
        d.len(),
        d.last().unwrap()
    );
    assert!(d.len() >= 40, "{}", d.len());
    assert!(*d.last().unwrap() < 0.005, "{:?}", d.last());
    // The design: each field's ranges are its blocks, six treatments each.
    let mut per_block = blocks(&w.path("r-labelled"));
    assert_eq!(per_block.len(), 8, "{per_block:?}");
    for t in per_block.values_mut() {
        t.sort();
        assert_eq!(
            t,
            &["check", "prod-a", "prod-b", "prod-c", "prod-d", "prod-e"]
        );
    }
    let s = json(&w.path("r-labelled/1-ingest/summary.json"));
    let f = &s["details"]["plots_from_labels"]["fields"]["field-A"];
    assert_eq!(f["plots"], 24, "{f}");
    assert_eq!(f["exports"][0], "monitor/field-A.csv");

    // The strip trial: strips one pass wide, check and prod-d alternating.
    let drawn = simulate(&w, "s-drawn", &["--seed", "5", "--strips", "--quiet"]);
    let labelled = simulate(
        &w,
        "s-labelled",
        &["--seed", "5", "--strips", "--labels", "--quiet"],
    );
    for (t, r) in [(&drawn, "rs-drawn"), (&labelled, "rs-labelled")] {
        run_trial(&w, &t, r, &[]);
    }
    let d = matched(
        &plot_rows(&w.path("rs-drawn")),
        &plot_rows(&w.path("rs-labelled")),
        2.0,
        // A plot one record from its minimum may fall either side of it: the net plot of a
        // strip built from labels is placed from the records (plots.min_points_max_fraction).
        1,
    );
    let within = d.iter().filter(|x| **x < 0.005).count();
    eprintln!(
        "strips from labels: {} kept plots, {within} within 0.5 %, median {:.5}, largest {:.5}",
        d.len(),
        d[d.len() / 2],
        d.last().unwrap()
    );
    // One pass wide, a net plot holds a dozen records: a plot end placed from the records
    // (half a step, about 1.1 m, either way) moves one record in or out.
    assert!(d.len() >= 70, "{}", d.len());
    assert!(
        within as f64 >= 0.9 * d.len() as f64,
        "{within} of {}",
        d.len()
    );
    assert!(*d.last().unwrap() < 0.015, "{:?}", d.last());
    // Adjacent check and product strips are the replicates: blocks of two.
    let per_block = blocks(&w.path("rs-labelled"));
    assert!(
        per_block.values().all(|t| t.len() == 2 && t[0] != t[1]),
        "{per_block:?}"
    );
    // The uplift of prod-d (true 0.6 t/ha) as from the drawn plots.
    let (a, b) = (
        uplift(&w.path("rs-drawn"), "prod-d"),
        uplift(&w.path("rs-labelled"), "prod-d"),
    );
    eprintln!("prod-d uplift: drawn {a:.4}, from labels {b:.4}");
    assert!((a - b).abs() < 0.02, "{a} {b}");
    assert!((b - 0.6).abs() < 0.1, "{b}");
    // A rerun gives the same bytes.
    run_trial(&w, &labelled, "rs-again", &[]);
    for f in [
        "1-ingest/design.csv",
        "1-ingest/plots.geojson",
        "3-plots/plots.csv",
    ] {
        assert_eq!(
            sha(&w.path(&format!("rs-labelled/{f}"))),
            sha(&w.path(&format!("rs-again/{f}"))),
            "{f}"
        );
    }
}

#[test]
fn labelled_trials_refuse_drawn_plots_and_unlabelled_exports_say_so() {
    let w = Workdir::new("strips-refuse");
    let t = simulate(&w, "t", &["--seed", "3", "--labels", "--quiet"]);
    // columns.treatment with plots given: refused, naming the keys.
    let o = check_with(&w, &t, "inputs.plots=\"p.geojson\"");
    assert!(!o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("columns.treatment builds the plots and the design"),
        "{err}"
    );
    // A label column that names nothing in the export: the column and key are named.
    let o = check_with(&w, &t, "columns.treatment=\"product\"");
    assert!(!o.status.success());
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(
        out.contains("column \"product\" named in [columns] treatment is not in the header"),
        "{out}"
    );
    // An export whose records carry no label: a warning naming it, the others still run.
    let p = w.path("t/monitor/field-B.csv");
    let text = read(&p);
    let stripped: String = text
        .lines()
        .map(|l| {
            let mut f: Vec<&str> = l.split(',').collect();
            if !l.starts_with("time_utc") {
                *f.last_mut().unwrap() = "";
            }
            f.join(",") + "\n"
        })
        .collect();
    std::fs::write(&p, stripped).unwrap();
    let o = plotsieve(
        &w.0,
        &[
            "run",
            t.to_str().unwrap(),
            "--out",
            "r",
            "--quiet",
            "--set",
            "adjust.allow_missing_fields=true",
        ],
    );
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("export monitor/field-B.csv: no record carries a treatment label (column \"treatment\", columns.treatment); it is in no plot"),
        "{err}"
    );
}

#[test]
fn plots_built_from_prescription_polygons_match_the_drawn_plots() {
    // The same harvest with prescription polygons (each plot's rectangle, its treatment as
    // `product`) and no plots or design: each record takes the treatment of the polygon it
    // lies in, and the plots are built from those labels.
    let w = Workdir::new("strips-prescription");
    let drawn = simulate(&w, "drawn", &["--seed", "2", "--quiet"]);
    let rx = simulate(&w, "rx", &["--seed", "2", "--prescription", "--quiet"]);
    assert!(w.path("rx/prescription.geojson").is_file());
    assert!(!w.path("rx/plots.geojson").exists());
    let out = checked(&w, rx.to_str().unwrap());
    assert!(
        out.contains("read: plots: 48 plots in 2 field(s) built from the treatment labels (the prescription polygons of prescription.geojson by their \"product\", inputs.prescription)"),
        "{out}"
    );
    for (t, r) in [(&drawn, "r-drawn"), (&rx, "r-rx")] {
        run_trial(&w, &t, r, &[]);
    }
    let d = matched(
        &plot_rows(&w.path("r-drawn")),
        &plot_rows(&w.path("r-rx")),
        2.0,
        0,
    );
    eprintln!(
        "RCBD from prescription polygons: {} kept plots, largest yield difference {:.5}",
        d.len(),
        d.last().unwrap()
    );
    assert!(d.len() >= 40, "{}", d.len());
    assert!(*d.last().unwrap() < 0.005, "{:?}", d.last());
    // The manifest hashes the prescription file; both label sources at once are refused.
    assert!(read(&w.path("r-rx/manifest.json")).contains("prescription.geojson"));
    let both = w.path("rx/both.toml");
    std::fs::write(
        &both,
        read(&rx).replace("[columns]\n", "[columns]\ntreatment = \"product\"\n"),
    )
    .unwrap();
    let o = plotsieve(&w.0, &["check", both.to_str().unwrap()]);
    assert!(!o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("give columns.treatment (labels on the records) or inputs.prescription (labels from polygons), not both"),
        "{err}"
    );
}
