//! Priors carried forward: a run's `4-adjust/priors.json` named by a later trial's
//! `adjust.priors_from`, checked against conjugate normal arithmetic (hand-computed from the
//! two trials' own posteriors) on trials large enough that their variance parameters are
//! well determined, so that the posterior is close to normal.

use crate::common::*;

/// A plot table: 40 blocks of check C and product N (N better by 0.3 t/ha), noise SD
/// 0.4 t/ha from a fixed-seed generator, plots on a 10 x 4 grid of block pairs.
fn table(seed: u64) -> String {
    let mut state = seed;
    let mut uniform = move || {
        // 64-bit LCG (Knuth's MMIX constants), top 53 bits.
        state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((state >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    };
    let mut out = String::from("plot,variety,block,yield_t_ha,x_m,y_m\n");
    for b in 0..40 {
        for v in 0..2 {
            // Box-Muller.
            let z = (-2.0 * uniform().ln()).sqrt() * (2.0 * std::f64::consts::PI * uniform()).cos();
            let y = 7.0 + if v == 1 { 0.3 } else { 0.0 } + 0.4 * z;
            let (x, yy) = ((b % 10) * 6 + v * 3, (b / 10) * 10);
            out += &format!(
                "{},{},{},{y:.3},{x},{yy}\n",
                b * 2 + v,
                ["C", "N"][v as usize],
                b + 1
            );
        }
    }
    out
}

fn trial(w: &Workdir, name: &str, table: &str, adjust: &str) -> std::path::PathBuf {
    let t = w.path(&format!("t/{name}.toml"));
    std::fs::write(
        &t,
        format!("[trial]\nname = \"{name}\"\ncrop = \"wheat\"\noutput_unit = \"t_ha\"\ncheck = \"C\"\n\n[inputs]\nplot_table = \"{table}\"\n\n[adjust]\n{adjust}"),
    )
    .unwrap();
    t
}

/// The pooled uplift of N and its SD, and N's prior SD, from a run.
fn uplift(w: &Workdir, run: &str) -> (f64, f64, f64) {
    let rows = csv_rows(&w.path(&format!("{run}/4-adjust/treatments.csv")));
    let r = rows
        .iter()
        .find(|r| r["field"] == "all" && r["treatment"] == "N")
        .unwrap();
    let f = |k: &str| r[k].parse::<f64>().unwrap();
    (f("uplift_t_ha"), f("uplift_sd_t_ha"), f("prior_sd_t_ha"))
}

#[test]
fn a_prior_from_an_earlier_trial_narrows_the_next_as_conjugate_arithmetic_says() {
    let w = Workdir::new("priors-forward");
    std::fs::create_dir_all(w.path("t")).unwrap();
    std::fs::write(w.path("t/a.csv"), table(1)).unwrap();
    std::fs::write(w.path("t/b.csv"), table(2)).unwrap();
    let go = |t: &std::path::Path, out: &str| run_trial(&w, &t, out, &[]);
    go(&trial(&w, "earlier", "a.csv", ""), "t/ra");
    go(&trial(&w, "alone", "b.csv", ""), "rb");
    let (ma, sa, _) = uplift(&w, "t/ra");
    let (mb, sb, weak) = uplift(&w, "rb");
    assert!(weak > 10.0 * sb, "the default prior is weak: {weak}");
    let p = json(&w.path("t/ra/4-adjust/priors.json"));
    assert_eq!(p["format"], "plotsieve-priors-1");
    assert!((p["products"]["N"]["uplift_sd_kg_ha"].as_f64().unwrap() - 1000.0 * sa).abs() < 1e-3);
    for widen in [1.0, 2.0] {
        let t = trial(
            &w,
            &format!("later{widen}"),
            "b.csv",
            &format!("priors_from = \"ra/4-adjust/priors.json\"\npriors_widen = {widen:?}\n"),
        );
        let out = format!("rb{widen}");
        go(&t, &out);
        let (m, s, prior_sd) = uplift(&w, &out);
        // The prior SD is the earlier posterior SD times the widening (table values have 6
        // decimals).
        assert!(
            (prior_sd - widen * sa).abs() < 2e-6,
            "{prior_sd} vs {widen} x {sa}"
        );
        // Conjugate normal arithmetic: precisions add, means weight by precision.
        let s0 = widen * sa;
        let prec = 1.0 / (s0 * s0) + 1.0 / (sb * sb);
        let (m_hand, s_hand) = ((ma / (s0 * s0) + mb / (sb * sb)) / prec, prec.powf(-0.5));
        eprintln!("widen {widen}: hand {m_hand:.5} +- {s_hand:.5}, run {m:.5} +- {s:.5}");
        assert!((m - m_hand).abs() < 0.05 * s_hand, "mean {m} vs {m_hand}");
        assert!((s / s_hand - 1.0).abs() < 0.02, "SD {s} vs {s_hand}");
        assert!(s < sb);
        // The manifest records the priors file and its hash; the summary says what was taken.
        let man = json(&w.path(&format!("{out}/manifest.json")));
        let hashed = man["inputs"]
            .as_array()
            .unwrap()
            .iter()
            .find(|i| i.to_string().contains("ra/4-adjust/priors.json"))
            .expect("the priors file among the manifest's inputs")
            .to_string();
        assert!(
            hashed.contains(&sha(&w.path("t/ra/4-adjust/priors.json"))),
            "{hashed}"
        );
        let s = json(&w.path(&format!("{out}/4-adjust/summary.json")));
        let taken = s["details"]["priors_from"]["taken"].as_str().unwrap();
        assert!(
            taken.contains("priors for N from ra/4-adjust/priors.json"),
            "{taken}"
        );
    }
    // A priors file from another crop, or with another check, is refused naming the key.
    let t = trial(
        &w,
        "corn",
        "b.csv",
        "priors_from = \"ra/4-adjust/priors.json\"\n",
    );
    replace(&t, "crop = \"wheat\"", "crop = \"corn\"", 1);
    let o = plotsieve(
        &w.0,
        &["run", t.to_str().unwrap(), "--out", "rc", "--quiet"],
    );
    assert_eq!(o.status.code(), Some(1));
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("ra/4-adjust/priors.json (adjust.priors_from) is from a wheat trial"),
        "{e}"
    );
}
