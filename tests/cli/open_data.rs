//! Real open data through the binary with the defaults, as a user brings it, held against an
//! independent computation on the same data.
//!
//! The Las Rosas nitrogen-rate strip trial of corn (1999 and 2001; `lasrosas.corn` of the
//! agridat R package, Kevin Wright, MIT licence; Anselin, Bongiovanni & Lowenberg-DeBoer 2004,
//! American Journal of Agricultural Economics 86:675): averaged yield points with an N level
//! and a replicate on each, no time, speed or swath. The reference values come from
//! `tests/fixtures/lasrosas/make_lasrosas_fixture.py` (numpy, pandas and statsmodels; the
//! versions are in the JSON it wrote): each strip's mean of all its points, and the ordinary
//! least-squares RCBD analysis of those strip means.

use crate::common::*;

pub(crate) fn fixtures() -> PathBuf {
    repo().join("tests/fixtures/lasrosas")
}

fn reference() -> serde_json::Value {
    json(&fixtures().join("lasrosas_reference.json"))
}

/// The year's records as the user keeps them: the published file's header and the year's
/// lines, unchanged (the file holds both harvests of the same field).
fn year_export(year: &str) -> String {
    let text = read(&fixtures().join("lasrosas_corn.tsv"));
    let mut lines = text.lines();
    let mut out = format!("{}\n", lines.next().unwrap());
    for l in lines.filter(|l| l.starts_with(&format!("{year}\t"))) {
        out += l;
        out.push('\n');
    }
    out
}

/// A trial of one year's yield points with their N labels, nothing but the mapping set.
pub(crate) fn points_trial(w: &Workdir, year: &str, extra: &str) -> PathBuf {
    let dir = w.path(&format!("points-{year}"));
    std::fs::create_dir_all(&dir).unwrap();
    std::fs::write(dir.join(format!("lasrosas_{year}.tsv")), year_export(year)).unwrap();
    let toml = format!(
        r#"[trial]
name = "Las Rosas N-rate strips {year}"
crop = "corn"
output_unit = "t_ha"
check = "N0"

[inputs]
monitor = ["lasrosas_{year}.tsv"]

[columns]
delimiter = "\t"
time = {{ format = "none" }}
longitude = "long"
latitude = "lat"
yield = {{ name = "yield", unit = "q_ha", basis = "dry" }}
treatment = "nf"
replicate = "rep"
{extra}"#
    );
    std::fs::write(dir.join("trial.toml"), toml).unwrap();
    dir.join("trial.toml")
}

/// A plot-table trial of one year's strip means (the fixture script's table).
pub(crate) fn table_trial(w: &Workdir, year: &str) -> PathBuf {
    let dir = w.path(&format!("table-{year}"));
    std::fs::create_dir_all(&dir).unwrap();
    let name = format!("lasrosas_{year}_plots.csv");
    std::fs::copy(fixtures().join(&name), dir.join(&name)).unwrap();
    let toml = format!(
        "[trial]\nname = \"Las Rosas N-rate strips {year}, plot table\"\ncrop = \"corn\"\noutput_unit = \"t_ha\"\ncheck = \"N0\"\n\n[inputs]\nplot_table = \"{name}\"\n"
    );
    std::fs::write(dir.join("trial.toml"), toml).unwrap();
    dir.join("trial.toml")
}

/// Pooled uplift and its SD per N level, t/ha.
fn uplifts(run: &Path) -> BTreeMap<String, (f64, f64)> {
    csv_rows(&run.join("4-adjust/treatments.csv"))
        .into_iter()
        .filter(|r| r["field"] == "all" && !r["uplift_t_ha"].is_empty())
        .map(|r| {
            (
                r["treatment"].clone(),
                (
                    r["uplift_t_ha"].parse().unwrap(),
                    r["uplift_sd_t_ha"].parse().unwrap(),
                ),
            )
        })
        .collect()
}

pub(crate) fn counts_add_up(run: &Path) {
    for st in ["1-ingest", "2-clean", "3-plots", "4-adjust"] {
        let s = json(&run.join(st).join("summary.json"));
        let (i, k, r) = (
            s["count_in"].as_u64().unwrap(),
            s["kept"].as_u64().unwrap(),
            s["rejected"].as_u64().unwrap(),
        );
        assert_eq!(i, k + r, "{st}: {i} in, {k} kept, {r} rejected");
    }
}

#[test]
fn las_rosas_yield_points_through_the_defaults_agree_with_an_independent_rcbd_analysis() {
    // Before: gps_jump took the missing speed for 0.1 m/s and removed every point, and
    // without a swath width no strip could be built. Now the records' own spacing bounds a
    // jump, the swath is estimated from the spacing of neighbouring strips, and the rules
    // timed in seconds are skipped and listed.
    let w = Workdir::new("open-lasrosas-points");
    let reference = reference();
    for year in ["1999", "2001"] {
        let t = points_trial(&w, year, "");
        let said = checked(&w, t.to_str().unwrap());
        assert!(
            said.contains("no time column: records in file order"),
            "{said}"
        );
        // The published design repeats the first replicate's N order in the other two
        // (the data's documentation): said, not passed in silence.
        assert!(
            said.contains("blocks R1, R2, R3 lay out their treatments in one order"),
            "{said}"
        );
        let run = w.path(&format!("run-{year}"));
        ok(&plotsieve(
            &w.0,
            &[
                "run",
                t.to_str().unwrap(),
                "--out",
                run.to_str().unwrap(),
                "--quiet",
            ],
        ));
        counts_add_up(&run);
        let year_ref = &reference["years"][year];
        let ing = json(&run.join("1-ingest/summary.json"));
        assert_eq!(ing["count_in"], year_ref["points"]);
        let field = ing["details"]["plots_from_labels"]["fields"]
            .as_object()
            .unwrap()
            .values()
            .next()
            .unwrap()
            .clone();
        // 6 N levels x 3 replicates; the strips' centres lie 6.77 m (1999) and 7.06-7.12 m
        // (2001) apart across travel, measured on the published coordinates.
        assert_eq!(field["strips"], 18, "{field}");
        let swath = field["swath_m"].as_f64().unwrap();
        let want = if year == "1999" { 6.77 } else { 7.1 };
        assert!((swath - want).abs() < 0.1, "{swath}");
        assert!(field["swath_source"]
            .as_str()
            .unwrap()
            .starts_with("estimated"));
        let clean = json(&run.join("2-clean/summary.json"));
        let removed = clean["rejected"].as_u64().unwrap();
        assert!(
            removed * 100 < clean["count_in"].as_u64().unwrap(),
            "clean removed {removed}: {}",
            clean["by_rule"]
        );
        let skipped = &clean["details"]["exports"][format!("lasrosas_{year}.tsv")]["skipped_rules"];
        assert!(
            skipped["pass_start"].as_str().unwrap().contains("no times"),
            "{skipped}"
        );
        // Each strip's plot mean against the mean of all its points: plotsieve trims 15 m
        // at each strip end (two or three of about 96 points) and removes a few outliers,
        // so they differ a little.
        let plots = csv_rows(&run.join("3-plots/plots.csv"));
        let design = csv_rows(&run.join("1-ingest/design.csv"));
        let mut worst: f64 = 0.0;
        for s in year_ref["strips"].as_array().unwrap() {
            let (rep, nf) = (s["rep"].as_str().unwrap(), s["nf"].as_str().unwrap());
            let ids: Vec<&String> = design
                .iter()
                .filter(|d| d["block"] == rep && d["treatment"] == nf)
                .map(|d| &d["plot_id"])
                .collect();
            let (mut sum, mut n) = (0.0, 0.0);
            for p in plots.iter().filter(|p| ids.contains(&&p["plot_id"])) {
                let k: f64 = p["points"].parse().unwrap();
                sum += k * p["yield_mean_t_ha"].parse::<f64>().unwrap();
                n += k;
            }
            let mine = sum / n * 10.0; // q/ha
            let want = s["yield_q_ha"].as_f64().unwrap();
            worst = worst.max((mine / want - 1.0).abs());
        }
        assert!(
            worst < 0.02,
            "{year}: largest strip-mean difference {worst}"
        );
        // The spatial model's uplifts against the OLS RCBD analysis of the strip means: the
        // same contrasts within a fraction of the OLS standard error.
        let up = uplifts(&run);
        let ols = &year_ref["ols_rcbd"]["contrasts_with_N0"];
        for (level, c) in ols.as_object().unwrap() {
            let (u, _) = up[level];
            let (want, se) = (
                c["uplift_q_ha"].as_f64().unwrap() / 10.0,
                c["se_q_ha"].as_f64().unwrap() / 10.0,
            );
            assert!(
                (u - want).abs() < 0.75 * se,
                "{year} {level}: plotsieve {u} t/ha, OLS {want} +- {se}"
            );
        }
    }
}

#[test]
fn las_rosas_plot_table_agrees_with_the_yield_points_and_the_published_prices_give_break_even() {
    // The strip means as a plot table: the same uplifts as the points route within
    // 0.03 t/ha (measured: 0.012 at most). With the published prices (corn 6.85 USD per
    // quintal, N 0.4348 USD per kg; Anselin et al. 2004) given in their own units, the
    // break-even uplift is the N cost over the corn price, as the fixture script computed.
    let w = Workdir::new("open-lasrosas-table");
    let reference = reference();
    for year in ["1999", "2001"] {
        let year_ref = &reference["years"][year]["ols_rcbd"]["contrasts_with_N0"];
        let costs: Vec<String> = year_ref
            .as_object()
            .unwrap()
            .iter()
            .map(|(l, c)| format!("{l} = {}", c["n_kg_ha"].as_f64().unwrap() * 0.4348))
            .collect();
        let priced = format!(
            "\n[adjust]\ngrain_price = 6.85\ngrain_price_unit = \"q\"\nproduct_cost = {{ {} }}\nproduct_cost_unit = \"ha\"\n",
            costs.join(", ")
        );
        let t_points = points_trial(&w, year, &priced);
        let t_table = table_trial(&w, year);
        let (rp, rt) = (w.path(&format!("p-{year}")), w.path(&format!("t-{year}")));
        for (t, r) in [(&t_points, &rp), (&t_table, &rt)] {
            ok(&plotsieve(
                &w.0,
                &[
                    "run",
                    t.to_str().unwrap(),
                    "--out",
                    r.to_str().unwrap(),
                    "--quiet",
                ],
            ));
        }
        counts_add_up(&rp);
        let s = json(&rt.join("1-ingest/summary.json"));
        assert!(
            s["details"]["warnings"][0]
                .as_str()
                .unwrap()
                .contains("blocks R1, R2, R3 lay out their treatments in one order"),
            "{}",
            s["details"]["warnings"]
        );
        let (a, b) = (uplifts(&rp), uplifts(&rt));
        assert_eq!(a.len(), 5);
        for (level, (u, _)) in &a {
            assert!(
                (u - b[level].0).abs() < 0.03,
                "{year} {level}: {u} and {}",
                b[level].0
            );
        }
        for r in csv_rows(&rp.join("4-adjust/treatments.csv")) {
            if r["field"] != "all" || r["treatment"] == "N0" {
                continue;
            }
            let be: f64 = r["break_even_t_ha"].parse().unwrap();
            let want = year_ref[&r["treatment"]]["break_even_q_ha"]
                .as_f64()
                .unwrap()
                / 10.0;
            assert!(
                (be - want).abs() < 1e-5,
                "{r:?}: break-even {be}, want {want}"
            );
        }
        let md = read(&rp.join("5-report/report.md"));
        assert!(
            md.contains("Prices: grain 6.85 per q at standard moisture; product costs and net returns per ha."),
            "{md}"
        );
    }
}

#[test]
fn las_rosas_both_harvests_as_a_season() {
    // The two harvests as two trials of one season: each N level's season mean lies
    // between (or at) the two years' own uplifts, and within two of its SDs of the
    // inverse-variance mean of the two years' OLS contrasts.
    let w = Workdir::new("open-lasrosas-season");
    let reference = reference();
    let mut season = String::from("[season]\nname = \"Las Rosas 1999 and 2001\"\n");
    let mut years = BTreeMap::new();
    for year in ["1999", "2001"] {
        let t = points_trial(&w, year, "");
        let out = format!("runs/{year}");
        ok(&plotsieve(
            &w.0,
            &["run", t.to_str().unwrap(), "--out", &out, "--quiet"],
        ));
        years.insert(year, uplifts(&w.path(&out)));
        season += &format!("\n[[trial]]\nfile = \"points-{year}/trial.toml\"\nout = \"{out}\"\n");
    }
    std::fs::write(w.path("season.toml"), season).unwrap();
    ok(&plotsieve(&w.0, &["season", "season.toml", "--quiet"]));
    let rows = csv_rows(&w.path("season-run/products.csv"));
    assert_eq!(rows.len(), 5);
    for r in rows {
        let level = &r["treatment"];
        let (m, sd): (f64, f64) = (
            r["uplift_t_ha"].parse().unwrap(),
            r["uplift_sd_t_ha"].parse().unwrap(),
        );
        let (a, b) = (years["1999"][level].0, years["2001"][level].0);
        assert!(
            m >= a.min(b) - 0.02 && m <= a.max(b) + 0.02,
            "{level}: season {m}, years {a} and {b}"
        );
        let (mut num, mut den) = (0.0, 0.0);
        for y in ["1999", "2001"] {
            let c = &reference["years"][y]["ols_rcbd"]["contrasts_with_N0"][level];
            let (u, se) = (
                c["uplift_q_ha"].as_f64().unwrap() / 10.0,
                c["se_q_ha"].as_f64().unwrap() / 10.0,
            );
            num += u / (se * se);
            den += 1.0 / (se * se);
        }
        let pooled = num / den;
        assert!(
            (m - pooled).abs() < 2.0 * sd,
            "{level}: season {m} +- {sd}, OLS pooled {pooled}"
        );
    }
}
