//! The adjust stage through the binary: simulated trials, the joint fit's outputs, the plot-table entry.

use crate::common::*;

#[test]
fn simulated_trials_recover_true_effects_and_trend() {
    let mut covered = 0;
    let mut total = 0;
    for seed in [11u64, 12, 13] {
        let w = Workdir::new("truth");
        let trial = simulate(&w, "trial", &["--seed", &seed.to_string()]);
        ok(&plotsieve(
            &w.0,
            &["run", trial.to_str().unwrap(), "--out", "run", "--quiet"],
        ));
        let truth = json(&w.path("trial/truth.json"));
        let effects = truth["effects_t_ha"].as_object().unwrap();
        for r in csv_rows(&w.path("run/4-adjust/treatments.csv"))
            .iter()
            .filter(|r| r["treatment"] != "check" && r["field"] != "all")
        {
            let true_up = effects[&r["treatment"]].as_f64().unwrap();
            let lo: f64 = r["uplift_lo95_t_ha"].parse().unwrap();
            let hi: f64 = r["uplift_hi95_t_ha"].parse().unwrap();
            total += 1;
            if lo <= true_up && true_up <= hi {
                covered += 1;
            }
        }
        // The estimated spatial effect follows the true trend at the plot centroids.
        let trend: BTreeMap<String, f64> = truth_by_plot(&truth, "trend_t_ha");
        let adj = csv_rows(&w.path("run/4-adjust/adjusted_plots.csv"));
        for field in ["A", "B"] {
            let rows: Vec<_> = adj.iter().filter(|r| r["field"] == field).collect();
            let est: Vec<f64> = rows
                .iter()
                .map(|r| r["spatial_effect_t_ha"].parse().unwrap())
                .collect();
            let tru: Vec<f64> = rows.iter().map(|r| trend[&r["plot_id"]]).collect();
            let c = plotsieve_stages::util::correlation(&est, &tru);
            assert!(
                c > 0.6,
                "seed {seed} field {field}: correlation of spatial effect with true trend {c:.3}"
            );
        }
    }
    assert_eq!(total, 30);
    assert!(
        covered >= 24,
        "{covered} of {total} true uplifts inside their 95 % intervals"
    );
}

#[test]
fn joint_adjust_writes_priors_intervals_and_the_interaction_row() {
    // The demo trial has two fields: the joint fit's tables through the binary, with an
    // informative prior on one product given on the command line.
    let w = Workdir::new("joint");
    let trial = simulate(&w, "trial", &["--seed", "3"]);
    ok(&plotsieve(
        &w.0,
        &[
            "run",
            trial.to_str().unwrap(),
            "--out",
            "run",
            "--quiet",
            "--set",
            "adjust.product_prior_mean.prod-a=0.25",
            "--set",
            "adjust.product_prior_sd.prod-a=0.1",
        ],
    ));
    let h = csv_rows(&w.path("run/4-adjust/hyperparameters.csv"));
    let all = h.iter().find(|r| r["field"] == "all").expect("joint row");
    let (m, lo, hi): (f64, f64, f64) = (
        all["interaction_sd_t_ha"].parse().unwrap(),
        all["interaction_sd_lo95_t_ha"].parse().unwrap(),
        all["interaction_sd_hi95_t_ha"].parse().unwrap(),
    );
    assert!(lo <= m && m <= hi && hi > 0.0, "{m} {lo} {hi}");
    assert!(all["method"].starts_with("joint"), "{}", all["method"]);
    for r in h.iter().filter(|r| r["field"] != "all") {
        let v = |k: &str| -> f64 { r[k].parse().unwrap() };
        assert!(
            v("noise_sd_lo95_t_ha") <= v("noise_sd_t_ha")
                && v("noise_sd_t_ha") <= v("noise_sd_hi95_t_ha")
        );
        assert!(v("spatial_share_lo95") >= 0.0 && v("spatial_share_hi95") <= 1.0);
        assert_eq!(r["method"], "exact");
    }
    let t = csv_rows(&w.path("run/4-adjust/treatments.csv"));
    for r in t.iter().filter(|r| r["treatment"] != "check") {
        let v = |k: &str| -> f64 { r[k].parse().unwrap() };
        assert!(
            v("uplift_lo95_t_ha") < v("uplift_lo90_t_ha")
                && v("uplift_lo90_t_ha") < v("uplift_t_ha")
        );
        assert!(
            v("uplift_t_ha") < v("uplift_hi90_t_ha")
                && v("uplift_hi90_t_ha") < v("uplift_hi95_t_ha")
        );
        if r["treatment"] == "prod-a" {
            assert_eq!((v("prior_mean_t_ha"), v("prior_sd_t_ha")), (0.25, 0.1));
        } else {
            assert!(v("prior_sd_t_ha") > 1.0, "weak default prior");
        }
    }
    let md = std::fs::read_to_string(w.path("run/5-report/report.md")).unwrap();
    assert!(
        md.contains("0.25 +- 0.10"),
        "the prior is shown beside the posterior"
    );
}

#[test]
fn plot_table_entry_fits_an_analysts_own_table() {
    let w = Workdir::new("table");
    let trial = simulate(&w, "trial", &["--seed", "91"]);
    ok(&plotsieve(
        &w.0,
        &["run", trial.to_str().unwrap(), "--out", "run", "--quiet"],
    ));
    // The analyst's table: the kept plots of that run, in the plot-table format.
    let mut table = String::from("plot_id,field,treatment,block,yield_t_ha,x_m,y_m\n");
    for r in csv_rows(&w.path("run/3-plots/plots.csv"))
        .iter()
        .filter(|r| r["status"] == "kept")
    {
        table += &format!(
            "{},{},{},{},{},{},{}\n",
            r["plot_id"],
            r["field"],
            r["treatment"],
            r["block"],
            r["yield_mean_t_ha"],
            r["centroid_x_m"],
            r["centroid_y_m"]
        );
    }
    std::fs::write(w.path("trial/table.csv"), table).unwrap();
    let text =
        std::fs::read_to_string(&trial).unwrap() + "\n[adjust]\nplot_table = \"table.csv\"\n";
    let t2 = w.path("trial/table-trial.toml");
    std::fs::write(&t2, text).unwrap();
    ok(&plotsieve(
        &w.0,
        &[
            "stage",
            "adjust",
            t2.to_str().unwrap(),
            "--out",
            "fresh",
            "--quiet",
        ],
    ));
    assert_eq!(
        std::fs::read(w.path("run/4-adjust/treatments.csv")).unwrap(),
        std::fs::read(w.path("fresh/4-adjust/treatments.csv")).unwrap(),
        "the same plots give the same treatment table"
    );
    let m = json(&w.path("fresh/manifest.json"));
    assert_eq!(m["stages"]["adjust"]["status"], "done");
    assert_eq!(
        m["inputs"].as_array().unwrap().len(),
        2,
        "trial file and plot table"
    );
    // A bad cell is named by file, line and column.
    std::fs::write(
        w.path("trial/table.csv"),
        "plot_id,field,treatment,block,yield_t_ha,x_m,y_m\nA-101,A,check,1,lots,0,0\n",
    )
    .unwrap();
    let o = plotsieve(
        &w.0,
        &[
            "stage",
            "adjust",
            t2.to_str().unwrap(),
            "--out",
            "fresh2",
            "--quiet",
        ],
    );
    assert_eq!(o.status.code(), Some(1));
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("table.csv, line 2, column yield_t_ha: expected a number, found \"lots\""),
        "{e}"
    );
}

#[test]
fn comparison_columns_say_which_model_they_describe() {
    let w = Workdir::new("comparison");
    let trial = simulate(&w, "t", &["--seed", "15"]);
    ok(&plotsieve(
        &w.0,
        &["run", trial.to_str().unwrap(), "--out", "run", "--quiet"],
    ));
    let text = std::fs::read_to_string(w.path("run/4-adjust/comparison.csv")).unwrap();
    assert_eq!(
        text.lines().next().unwrap(),
        "field,log_ml_spatial,log_ml_without_spatial,efficiency,moran_i_without_spatial,moran_i_spatial,rank_changes"
    );
}
