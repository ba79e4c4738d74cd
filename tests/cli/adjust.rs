//! The adjust stage through the binary: simulated trials, the joint fit's outputs, the plot-table entry.

use crate::common::*;

#[test]
fn simulated_trials_recover_true_effects_and_trend() {
    let mut covered = 0;
    let mut total = 0;
    for seed in [11u64, 12, 13] {
        let w = Workdir::new("truth");
        let trial = simulate(&w, "trial", &["--seed", &seed.to_string()]);
        run_trial(&w, &trial, "run", &[]);
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
    run_trial(&w, &trial, "run", &[]);
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
    run_stages(&w, &t2, "fresh", &["adjust"]);
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
    run_trial(&w, &trial, "run", &[]);
    let text = std::fs::read_to_string(w.path("run/4-adjust/comparison.csv")).unwrap();
    assert_eq!(
        text.lines().next().unwrap(),
        "field,log_ml_spatial,log_ml_without_spatial,efficiency,moran_i_without_spatial,moran_i_spatial,rank_correlation,top_quarter_overlap"
    );
}

#[test]
fn a_plot_table_alone_runs_end_to_end_and_passes_check() {
    // The shape of a published variety trial: plot id, variety, block, yield and x/y in
    // metres, nothing else. 8 varieties in 4 blocks on a 8 x 4 grid of 1.5 x 6 m plots, with
    // a smooth trend across the field; variety V05 is 0.6 t/ha better than the check V01.
    let w = Workdir::new("plot-table-entry");
    let mut table = String::from("plot,variety,block,yield_t_ha,x_m,y_m\n");
    let mut k = 0;
    for b in 0..4 {
        for v in 0..8 {
            let v = (v * 3 + b * 5) % 8; // a different order in each block
            let (x, y) = ((v as f64 + 0.5) * 1.5, (b as f64 + 0.5) * 6.0);
            let effect = if v == 4 { 0.6 } else { 0.05 * v as f64 };
            let noise = 0.08 * (((k * 7919) % 17) as f64 / 8.0 - 1.0);
            let yld = 7.0 + 0.4 * (x / 12.0).sin() + 0.3 * (y / 24.0) + effect + noise;
            table += &format!("{},V{:02},{},{yld:.3},{x},{y}\n", 101 + k, v + 1, b + 1);
            k += 1;
        }
    }
    // One row the analyst mistyped: logged, not fatal.
    table += "999,V03,4,seventy,3.0,27.0\n";
    std::fs::create_dir_all(w.path("t")).unwrap();
    std::fs::write(w.path("t/plots.csv"), table).unwrap();
    std::fs::write(
        w.path("t/trial.toml"),
        "[trial]\nname = \"Variety trial\"\ncrop = \"wheat\"\noutput_unit = \"t_ha\"\ncheck = \"V01\"\n\n[inputs]\nplot_table = \"plots.csv\"\n",
    )
    .unwrap();
    let t = w.path("t/trial.toml");
    let t = t.to_str().unwrap();
    let out = checked(&w, t);
    assert!(
        out.contains(
            "read: plots.csv: plot table (CSV): plot id plot, treatment variety, block block"
        ) && out.contains("warning: plots.csv, line 34, column yield_t_ha: unparseable"),
        "{out}"
    );
    let o = plotsieve(&w.0, &["run", t, "--out", "run", "--quiet"]);
    ok(&o);
    assert!(String::from_utf8_lossy(&o.stderr).contains("1 of its 33 rows could not be used"));
    let rej = csv_rows(&w.path("run/1-ingest/rejected.csv"));
    assert_eq!(rej.len(), 1);
    assert_eq!(
        (rej[0]["source_row"].as_str(), rej[0]["rule"].as_str()),
        ("34", "unparseable")
    );
    let plots = csv_rows(&w.path("run/3-plots/plots.csv"));
    assert_eq!(plots.len(), 32);
    let rows = csv_rows(&w.path("run/4-adjust/treatments.csv"));
    let v05 = rows
        .iter()
        .find(|r| r["field"] == "1" && r["treatment"] == "V05")
        .expect("V05 in field 1");
    let (up, sd): (f64, f64) = (
        v05["uplift_t_ha"].parse().unwrap(),
        v05["uplift_sd_t_ha"].parse().unwrap(),
    );
    assert!((up - 0.6).abs() < 3.0 * sd, "uplift {up} +- {sd}");
    assert!(w.path("run/5-report/report.html").exists());
    let md = read(&w.path("run/5-report/report.md"));
    assert!(md.contains("| plots.csv | plot table (CSV):"), "{md}");
    let m = json(&w.path("run/manifest.json"));
    assert_eq!(
        m["inputs"].as_array().unwrap().len(),
        2,
        "trial file and table"
    );
    for s in ["ingest", "clean", "plots", "adjust", "report"] {
        assert_eq!(m["stages"][s]["status"], "done", "{s}");
    }
    // A table without the check is refused by check, naming the field.
    replace(
        &w.path("t/trial.toml"),
        "check = \"V01\"",
        "check = \"V99\"",
        1,
    );
    let o = plotsieve(&w.0, &["check", t]);
    assert_eq!(o.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&o.stdout)
        .contains("problem: adjust: field 1: no kept plot of the check"));
}

#[test]
fn a_row_column_variety_trial_is_analysed_as_designed() {
    // A plot table with row and range positions: 12 varieties in 3 replicates, each 2 rows x
    // 6 ranges, strong row effects (+-0.5 t/ha) and weaker range effects. With rows and
    // columns random (adjust.random_effects) the run reports both SDs, the row effects go
    // into each plot's position effect, and the fit beats the same model without them.
    let w = Workdir::new("row-column");
    let row_fx = [0.5, -0.4, 0.1, 0.6, -0.5, -0.2];
    let col_fx = [0.1, -0.15, 0.05, 0.2, -0.1, -0.05];
    let mut table = String::from("plot,entry,rep,yield_t_ha,row,range\n");
    let mut k = 0;
    for rep in 0..3 {
        for slot in 0..12 {
            let v = (slot * 5 + rep * 7) % 12;
            let (row, col) = (rep * 2 + slot / 6, slot % 6);
            let noise = 0.06 * (((k * 7919) % 17) as f64 / 8.0 - 1.0);
            let yld = 7.0 + 0.04 * v as f64 + row_fx[row] + col_fx[col] + noise;
            table += &format!(
                "{},E{:02},{},{yld:.3},{},{}\n",
                101 + k,
                v + 1,
                rep + 1,
                row + 1,
                col + 1
            );
            k += 1;
        }
    }
    std::fs::create_dir_all(w.path("t")).unwrap();
    std::fs::write(w.path("t/plots.csv"), table).unwrap();
    let trial = "[trial]\nname = \"Row-column trial\"\ncrop = \"wheat\"\noutput_unit = \"t_ha\"\ncheck = \"E01\"\n\n[inputs]\nplot_table = \"plots.csv\"\n\n[adjust]\nrow_spacing_m = 1.5\nrange_spacing_m = 6.0\nblocks = true\nrandom_effects = [\"row\", \"column\"]\n";
    std::fs::write(w.path("t/trial.toml"), trial).unwrap();
    let t = w.path("t/trial.toml");
    let t = t.to_str().unwrap();
    ok(&plotsieve(&w.0, &["check", t]));
    ok(&plotsieve(&w.0, &["run", t, "--out", "rc", "--quiet"]));
    let h = &csv_rows(&w.path("rc/4-adjust/hyperparameters.csv"))[0];
    let num = |k: &str| -> f64 { h[k].parse().unwrap_or_else(|_| panic!("{k}: {:?}", h[k])) };
    // The six row effects have SD 0.46 t/ha; the row SD's interval holds it and lies above
    // the column SD's lower end.
    let sd = |v: &[f64]| {
        let m = v.iter().sum::<f64>() / v.len() as f64;
        (v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (v.len() - 1) as f64).sqrt()
    };
    let (lo, hi) = (num("row_sd_lo95_t_ha"), num("row_sd_hi95_t_ha"));
    assert!(
        lo <= sd(&row_fx) && sd(&row_fx) <= hi,
        "row SD {lo}-{hi} vs {}",
        sd(&row_fx)
    );
    assert!(num("column_sd_t_ha") < num("row_sd_t_ha"));
    assert_eq!(h["block_sd_t_ha"], "");
    // Plot 101 is in row 1 (+0.5): its position effect carries the row effect.
    let p = csv_rows(&w.path("rc/4-adjust/adjusted_plots.csv"));
    let first = p.iter().find(|r| r["plot_id"] == "101").unwrap();
    let eff: f64 = first["spatial_effect_t_ha"].parse().unwrap();
    assert!(eff > 0.25, "position effect of plot 101: {eff}");
    let md = read(&w.path("rc/5-report/report.md"));
    assert!(
        md.contains("| 1 | row |") && md.contains("| 1 | column |"),
        "{md}"
    );
    let html = read(&w.path("rc/5-report/report.html"));
    assert!(html.contains("<h3>Random design factors</h3>"));
    // Without the random factors the fit is worse by its marginal likelihood.
    run_trial(&w, Path::new(t), "plain", &["adjust.random_effects=[]"]);
    let ml = |run: &str| -> f64 {
        csv_rows(&w.path(&format!("{run}/4-adjust/hyperparameters.csv")))[0]
            ["log_marginal_likelihood"]
            .parse()
            .unwrap()
    };
    assert!(
        ml("rc") > ml("plain") + 3.0,
        "{} vs {}",
        ml("rc"),
        ml("plain")
    );
    // Blocks fixed and random at once, or a factor that does not exist, are refused.
    let o = plotsieve(
        &w.0,
        &["check", t, "--set", "adjust.random_effects=[\"block\"]"],
    );
    assert_eq!(o.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&o.stderr)
        .contains("adjust.random_effects has \"block\" while adjust.blocks is true"));
    let o = plotsieve(
        &w.0,
        &["check", t, "--set", "adjust.random_effects=[\"diagonal\"]"],
    );
    assert_eq!(o.status.code(), Some(1));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains(
            "adjust.random_effects[0] must be \"row\", \"column\" or \"block\" (got \"diagonal\")"
        ),
        "{err}"
    );
}
