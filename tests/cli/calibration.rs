//! Calibration over many simulated trials, and the spatial model's efficiency.

use crate::common::*;

#[test]
fn calibration_over_200_simulated_trials() {
    // Known-truth simulation: 200 trials (two fields each, five products against the check),
    // fitted jointly. 95 % intervals of the per-field uplifts and of the pooled uplifts
    // should each cover the true uplift 92-98 % of the time, and a product with no true
    // effect (prod-c) should get P(uplift > 0) > 0.95 in about 5 % of fields.
    let w = Workdir::new("calibration");
    let seeds: Vec<u64> = (1000..1200).collect();
    let results: Vec<[usize; 6]> = std::thread::scope(|sc| {
        let handles: Vec<_> = seeds
            .chunks(100)
            .map(|chunk| {
                let w = &w;
                sc.spawn(move || {
                    let (mut cov, mut tot, mut fp, mut nulls, mut pcov, mut ptot) =
                        (0, 0, 0, 0, 0, 0);
                    for seed in chunk {
                        let dir = format!("t{seed}");
                        let trial = simulate(w, &dir, &["--seed", &seed.to_string()]);
                        let out = format!("r{seed}");
                        ok(&plotsieve(
                            &w.0,
                            &["run", trial.to_str().unwrap(), "--out", &out, "--quiet"],
                        ));
                        let truth = json(&w.path(&dir).join("truth.json"));
                        for r in csv_rows(&w.path(&out).join("4-adjust/treatments.csv")) {
                            if r["treatment"] == "check" {
                                continue;
                            }
                            let t = truth["effects_t_ha"][&r["treatment"]].as_f64().unwrap();
                            let lo: f64 = r["uplift_lo95_t_ha"].parse().unwrap();
                            let hi: f64 = r["uplift_hi95_t_ha"].parse().unwrap();
                            if r["field"] == "all" {
                                ptot += 1;
                                pcov += usize::from(lo <= t && t <= hi);
                                continue;
                            }
                            tot += 1;
                            cov += usize::from(lo <= t && t <= hi);
                            if t == 0.0 {
                                nulls += 1;
                                fp += usize::from(r["p_uplift_gt0"].parse::<f64>().unwrap() > 0.95);
                            }
                        }
                        let _ = std::fs::remove_dir_all(w.path(&dir));
                        let _ = std::fs::remove_dir_all(w.path(&out));
                    }
                    [cov, tot, fp, nulls, pcov, ptot]
                })
            })
            .collect();
        handles.into_iter().map(|h| h.join().unwrap()).collect()
    });
    let [cov, tot, fp, nulls, pcov, ptot] = results
        .iter()
        .fold([0; 6], |a, b| std::array::from_fn(|k| a[k] + b[k]));
    let coverage = cov as f64 / tot as f64;
    let false_pos = fp as f64 / nulls as f64;
    eprintln!("coverage {cov}/{tot} = {coverage:.3}; null products with P(uplift > 0) > 0.95: {fp}/{nulls} = {false_pos:.3}");
    let pooled = pcov as f64 / ptot as f64;
    eprintln!("pooled coverage {pcov}/{ptot} = {pooled:.3}");
    assert_eq!(tot, 2000);
    assert_eq!(ptot, 1000);
    assert!((0.92..=0.98).contains(&coverage), "coverage {coverage:.3}");
    assert!(
        (0.92..=0.98).contains(&pooled),
        "pooled coverage {pooled:.3}"
    );
    assert!(
        (0.02..=0.09).contains(&false_pos),
        "false-positive rate {false_pos:.3}"
    );
}

#[test]
fn spatial_model_is_more_efficient_with_a_trend_and_no_worse_without() {
    let w = Workdir::new("efficiency");
    let mut eff = BTreeMap::new();
    for (name, trend) in [("strong", "1200"), ("none", "0")] {
        let mut values = Vec::new();
        for seed in [81u64, 82, 83, 84] {
            let dir = format!("{name}{seed}");
            let trial = simulate(
                &w,
                &dir,
                &["--seed", &seed.to_string(), "--trend-sd", trend],
            );
            let out = format!("run-{dir}");
            ok(&plotsieve(
                &w.0,
                &["run", trial.to_str().unwrap(), "--out", &out, "--quiet"],
            ));
            for r in csv_rows(&w.path(&out).join("4-adjust/comparison.csv")) {
                values.push(r["efficiency"].parse::<f64>().unwrap());
            }
        }
        eff.insert(name, plotsieve_stages::util::median(&values));
    }
    eprintln!("median efficiency (RCBD contrast variance / spatial): {eff:?}");
    assert!(eff["strong"] > 1.5, "{eff:?}");
    assert!(eff["none"] > 0.85, "{eff:?}");
}
