//! `plotsieve season`: two simulated trials in two places run into their folders, then the
//! season fit over their four fields: its tables, the stage-one values it read, an
//! end-to-end check of stage two by hand, reruns and the ways it refuses.

use crate::common::*;

const SEASON: &str = "[season]\nname = \"Demo season\"\n\n[[trial]]\nfile = \"north/trial.toml\"\nout = \"runs/north\"\n\n[[trial]]\nfile = \"south/trial.toml\"\nout = \"runs/south\"\n";

/// Two simulated trials (two fields each, 24 plots per field) 45 km apart, both run.
fn two_trials(w: &Workdir) {
    simulate(w, "north", &["--seed", "2", "--quiet"]);
    simulate(
        w,
        "south",
        &[
            "--seed",
            "3",
            "--origin-lon",
            "-97.5",
            "--origin-lat",
            "40.2",
            "--quiet",
        ],
    );
    ok(&plotsieve(
        &w.0,
        &["run", "north/trial.toml", "--out", "runs/north", "--quiet"],
    ));
    ok(&plotsieve(
        &w.0,
        &["run", "south/trial.toml", "--out", "runs/south", "--quiet"],
    ));
    std::fs::write(w.path("season.toml"), SEASON).unwrap();
}

fn num(r: &BTreeMap<String, String>, k: &str) -> f64 {
    r[k].parse().unwrap_or(f64::NAN)
}

/// Solve a small symmetric positive-definite system by Gaussian elimination.
fn solve(mut a: Vec<Vec<f64>>, mut b: Vec<f64>) -> Vec<f64> {
    let n = b.len();
    for i in 0..n {
        for j in i + 1..n {
            let f = a[j][i] / a[i][i];
            let pivot = a[i].clone();
            for (x, p) in a[j].iter_mut().zip(&pivot).skip(i) {
                *x -= f * p;
            }
            b[j] -= f * b[i];
        }
    }
    let mut x = vec![0.0; n];
    for i in (0..n).rev() {
        x[i] = (b[i] - (i + 1..n).map(|k| a[i][k] * x[k]).sum::<f64>()) / a[i][i];
    }
    x
}

fn invert(a: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let n = a.len();
    let cols: Vec<Vec<f64>> = (0..n)
        .map(|j| {
            solve(
                a.to_vec(),
                (0..n).map(|i| f64::from(u8::from(i == j))).collect(),
            )
        })
        .collect();
    (0..n)
        .map(|i| (0..n).map(|j| cols[j][i]).collect())
        .collect()
}

#[test]
fn a_season_of_two_trials_reads_their_contrasts_and_writes_its_own_folder() {
    let w = Workdir::new("season");
    two_trials(&w);
    let o = plotsieve(&w.0, &["season", "season.toml"]);
    ok(&o);
    let err = String::from_utf8_lossy(&o.stderr);
    // Every field has 24 plots: the small-field caution is said once, naming all four.
    assert!(
        err.contains("4 of 4 fields have fewer than 30 kept plots"),
        "{err}"
    );
    let dir = w.path("season-run");
    let products = csv_rows(&dir.join("products.csv"));
    let names: Vec<&str> = products.iter().map(|r| r["treatment"].as_str()).collect();
    assert_eq!(names, ["prod-a", "prod-b", "prod-c", "prod-d", "prod-e"]);
    for r in &products {
        assert_eq!(r["field"], "all");
        assert_eq!(r["plots"], "16", "four plots in each of four fields");
        let (u, sd, nsd) = (
            num(r, "uplift_t_ha"),
            num(r, "uplift_sd_t_ha"),
            num(r, "new_field_sd_t_ha"),
        );
        assert!(u.is_finite() && sd > 0.0 && nsd >= sd, "{r:?}");
        assert!(num(r, "uplift_lo95_t_ha") < u && u < num(r, "uplift_hi95_t_ha"));
        assert!((0.0..=1.0).contains(&num(r, "p_new_field_gt0")));
    }
    // Each location row carries what the trial's contrasts file says, in t/ha, and the
    // field's position.
    let locations = csv_rows(&dir.join("locations.csv"));
    assert_eq!(locations.len(), 20);
    for (trial, lon, lat) in [("north", -97.8, 40.6), ("south", -97.5, 40.2)] {
        let c = json(&w.path(&format!("runs/{trial}/4-adjust/contrasts.json")));
        assert_eq!(c["format"], "plotsieve-contrasts-1");
        for f in c["fields"].as_array().unwrap() {
            let (flon, flat) = (f["lon"].as_f64().unwrap(), f["lat"].as_f64().unwrap());
            assert!(
                (flon - lon).abs() < 0.05 && (flat - lat).abs() < 0.05,
                "{trial}: {flon} {flat}"
            );
            for (k, p) in f["products"].as_array().unwrap().iter().enumerate() {
                let row = locations
                    .iter()
                    .find(|r| {
                        r["trial"] == c["trial"].as_str().unwrap()
                            && r["field"] == f["field"].as_str().unwrap()
                            && r["product"] == p.as_str().unwrap()
                    })
                    .unwrap();
                let up = f["uplift_kg_ha"][k].as_f64().unwrap() / 1000.0;
                let sd = f["cov_kg_ha2"][k][k].as_f64().unwrap().sqrt() / 1000.0;
                assert!((num(row, "stage_one_uplift_t_ha") - up).abs() < 1e-6);
                assert!((num(row, "stage_one_sd_t_ha") - sd).abs() < 1e-6);
                assert!((num(row, "lon") - flon).abs() < 1e-9);
            }
        }
    }
    // The summary names each contrasts file by its hash.
    let summary = json(&dir.join("summary.json"));
    assert_eq!(summary["fields"], 4);
    for t in summary["trials"].as_array().unwrap() {
        let run = t["run_folder"].as_str().unwrap();
        assert_eq!(
            t["contrasts_sha256"].as_str().unwrap(),
            sha(&w.path(&format!("{run}/4-adjust/contrasts.json")))
        );
    }
    // The report opens with the decision, then per-product forests, the map, the table.
    let html = read(&dir.join("report.html"));
    let at = |s: &str| html.find(s).unwrap_or_else(|| panic!("no {s}"));
    assert!(at("Decision: products against the check") < at("<table"));
    assert!(at("<table") < at("Each product across the fields"));
    assert!(at("Each product across the fields") < at("Where the season"));
    assert!(html.contains("aria-label=\"map of the season's fields\""));
    assert_eq!(
        html.matches("uplift per field with 95 % intervals").count(),
        5
    );
    assert!(html.contains("Piepho"));
    let md = read(&dir.join("report.md"));
    assert!(md.find("## Decision").unwrap() < md.find("## Per field").unwrap());
    // A rerun gives the same bytes and leaves no temporary folder behind.
    let before = all_files(&dir);
    ok(&plotsieve(&w.0, &["season", "season.toml", "--quiet"]));
    assert_eq!(before, all_files(&dir));
    let names: Vec<String> = std::fs::read_dir(&w.0)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().to_string())
        .collect();
    assert!(
        !names.iter().any(|n| n.starts_with(".season-run")),
        "{names:?}"
    );
}

#[test]
fn with_no_spread_between_fields_the_season_is_the_weighted_mean_of_the_contrasts_by_hand() {
    // A tiny product x field SD prior scale pins the SD near zero: stage two is then
    // generalised least squares of the four fields' contrast vectors with their full
    // covariances plus the weak N(0, (10 x mean plot SD)^2) prior, solved here by hand from
    // the contrasts files.
    let w = Workdir::new("season-hand");
    two_trials(&w);
    let text = SEASON.replace(
        "name = \"Demo season\"",
        "name = \"Pinned\"\ninteraction_sd_u = 1e-9",
    );
    std::fs::write(w.path("season.toml"), text).unwrap();
    ok(&plotsieve(&w.0, &["season", "season.toml", "--quiet"]));
    let fields: Vec<serde_json::Value> = ["north", "south"]
        .iter()
        .flat_map(|t| {
            json(&w.path(&format!("runs/{t}/4-adjust/contrasts.json")))["fields"]
                .as_array()
                .unwrap()
                .clone()
        })
        .collect();
    let n = 5;
    let mean_sd = fields
        .iter()
        .map(|f| f["yield_sd_kg_ha"].as_f64().unwrap())
        .sum::<f64>()
        / 4.0;
    let mut prec = vec![vec![0.0; n]; n];
    let mut h = vec![0.0; n];
    for (i, row) in prec.iter_mut().enumerate() {
        row[i] = 1.0 / (10.0 * mean_sd).powi(2);
    }
    for f in &fields {
        assert_eq!(f["products"].as_array().unwrap().len(), n);
        let cov: Vec<Vec<f64>> = (0..n)
            .map(|a| {
                (0..n)
                    .map(|b| f["cov_kg_ha2"][a][b].as_f64().unwrap())
                    .collect()
            })
            .collect();
        let c: Vec<f64> = (0..n)
            .map(|a| f["uplift_kg_ha"][a].as_f64().unwrap())
            .collect();
        let inv = invert(&cov);
        for a in 0..n {
            for b in 0..n {
                prec[a][b] += inv[a][b];
                h[a] += inv[a][b] * c[b];
            }
        }
    }
    let mean = solve(prec.clone(), h);
    let var = invert(&prec);
    let products = csv_rows(&w.path("season-run/products.csv"));
    for (a, r) in products.iter().enumerate() {
        let (u, sd) = (num(r, "uplift_t_ha"), num(r, "uplift_sd_t_ha"));
        let (hu, hsd) = (mean[a] / 1000.0, var[a][a].sqrt() / 1000.0);
        eprintln!(
            "{}: {u:.6} +- {sd:.6}; by hand {hu:.6} +- {hsd:.6}",
            r["treatment"]
        );
        assert!((u - hu).abs() < 2e-6, "{}: {u} vs {hu}", r["treatment"]);
        assert!((sd - hsd).abs() < 2e-6, "{}: {sd} vs {hsd}", r["treatment"]);
    }
}

#[test]
fn a_season_refuses_what_it_cannot_compare_and_never_leaves_a_stale_folder() {
    let w = Workdir::new("season-refuse");
    simulate(&w, "north", &["--seed", "2", "--quiet"]);
    simulate(
        &w,
        "south",
        &["--seed", "3", "--origin-lon", "-97.5", "--quiet"],
    );
    std::fs::write(w.path("season.toml"), SEASON).unwrap();
    ok(&plotsieve(
        &w.0,
        &["run", "north/trial.toml", "--out", "runs/north", "--quiet"],
    ));
    // The south trial was never run.
    let o = plotsieve(&w.0, &["season", "season.toml"]);
    assert_eq!(o.status.code(), Some(1));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("trial south/trial.toml") && err.contains("plotsieve run"),
        "{err}"
    );
    ok(&plotsieve(
        &w.0,
        &["run", "south/trial.toml", "--out", "runs/south", "--quiet"],
    ));
    ok(&plotsieve(&w.0, &["season", "season.toml", "--quiet"]));
    assert!(w.path("season-run/report.html").exists());
    // A stage rerun upstream leaves the trial's adjust stale: refused, and the earlier
    // season folder goes, so it cannot be taken for the current result.
    ok(&plotsieve(
        &w.0,
        &[
            "stage",
            "plots",
            "south/trial.toml",
            "--out",
            "runs/south",
            "--quiet",
        ],
    ));
    let o = plotsieve(&w.0, &["season", "season.toml"]);
    assert_eq!(o.status.code(), Some(1));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("adjust stage") && err.contains("stale"),
        "{err}"
    );
    assert!(err.contains("was removed"), "{err}");
    assert!(!w.path("season-run").exists());
    ok(&plotsieve(
        &w.0,
        &["run", "south/trial.toml", "--out", "runs/south", "--quiet"],
    ));
    // Another check name in one trial: refused, naming both trials.
    replace(
        &w.path("south/trial.toml"),
        "check = \"check\"",
        "check = \"prod-a\"",
        1,
    );
    ok(&plotsieve(
        &w.0,
        &["run", "south/trial.toml", "--out", "runs/south", "--quiet"],
    ));
    let o = plotsieve(&w.0, &["season", "season.toml"]);
    assert_eq!(o.status.code(), Some(1));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("south/trial.toml")
            && err.contains("north/trial.toml")
            && err.contains("one check"),
        "{err}"
    );
    // A folder that is not a season's is never replaced.
    replace(
        &w.path("south/trial.toml"),
        "check = \"prod-a\"",
        "check = \"check\"",
        1,
    );
    ok(&plotsieve(
        &w.0,
        &["run", "south/trial.toml", "--out", "runs/south", "--quiet"],
    ));
    std::fs::write(
        w.path("season.toml"),
        SEASON.replace("name = \"Demo season\"", "out = \"runs/north\""),
    )
    .unwrap();
    let o = plotsieve(&w.0, &["season", "season.toml"]);
    assert_eq!(o.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&o.stderr).contains("is not a season folder"));
    assert!(w.path("runs/north/4-adjust/contrasts.json").exists());
}
