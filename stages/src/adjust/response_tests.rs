//! Rate trials: the curves by hand, the simulator's truth, settings refusals, and the
//! optimum's interval against known truth over 100 simulated trials.

use super::response::{Curve, RateDesign};
use super::*;
use crate::simulate::{
    true_rate_gain, true_rate_optimum, RATES_KG_HA, RATE_TREATMENTS, RATE_TRUTH,
};

#[test]
fn curves_by_hand() {
    // Linear-plateau: a straight rise to the join, flat after.
    assert_eq!(Curve::LinearPlateau.basis(0.25, 0.5), [0.5, 0.0]);
    assert_eq!(Curve::LinearPlateau.basis(0.8, 0.5), [1.0, 0.0]);
    // Quadratic-plateau: 1 - (1 - u/x)^2, joining the plateau with zero slope.
    assert_eq!(Curve::QuadraticPlateau.basis(0.25, 0.5), [0.75, 0.0]);
    let h = 1e-6;
    let slope = (Curve::QuadraticPlateau.basis(0.5, 0.5)[0]
        - Curve::QuadraticPlateau.basis(0.5 - h, 0.5)[0])
        / h;
    assert!(slope.abs() < 1e-5, "{slope}");
    assert_eq!(Curve::Quadratic.basis(0.5, f64::NAN), [0.5, 0.25]);
    let rd = RateDesign::new(&[40.0, 80.0, 200.0], 0.0);
    assert_eq!(rd.u, vec![0.2, 0.4, 1.0]);
    assert_eq!(rd.rate(0.5), 100.0);
}

#[test]
fn the_simulator_truth_is_its_curve() {
    for ((name, gain), r) in RATE_TREATMENTS.iter().zip(RATES_KG_HA) {
        assert!((true_rate_gain(r, 1.0) - gain).abs() < 1e-9, "{name}");
    }
    // The optimum's slope equals the price ratio (kg grain per kg N), checked numerically.
    let r = true_rate_optimum(1.0);
    let ratio = RATE_TRUTH.n_price_per_kg / (RATE_TRUTH.grain_price_per_t / 1000.0);
    let slope = (true_rate_gain(r + 1e-4, 1.0) - true_rate_gain(r - 1e-4, 1.0)) / 2e-4;
    assert!((slope - ratio).abs() < 1e-6, "{slope} vs {ratio}");
    assert!((r - 111.80555555555556).abs() < 1e-9, "{r}");
}

/// A 6-rate x 4-block trial at plot level on the simulator's true curve: plots 12 m x 40 m
/// in blocks along y, a smooth trend of SD about `trend`, plot noise of SD `noise` (kg/ha).
fn rate_plots(seed: u64, trend: f64, noise: f64) -> Vec<PlotStats> {
    let mut rng = crate::util::Rng::new(seed);
    let (p1, p2) = (rng.range(0.0, 6.3), rng.range(0.0, 6.3));
    let mut out = Vec::new();
    for b in 0..4 {
        let mut order: Vec<usize> = (0..6).collect();
        rng.shuffle(&mut order);
        for (c, &k) in order.iter().enumerate() {
            let (x, y) = (12.0 * c as f64, 40.0 * b as f64);
            let t = trend * ((x / 30.0 + p1).sin() + (y / 70.0 + p2).cos()) / 2f64.sqrt();
            let v = 9000.0 + t + true_rate_gain(RATES_KG_HA[k], 1.0) + noise * rng.normal();
            out.push(PlotStats::from_yield(
                &format!("p{b}{c}"),
                "F",
                RATE_TREATMENTS[k].0,
                &b.to_string(),
                v,
                x,
                y,
            ));
        }
    }
    out
}

fn rate_settings() -> FitSettings {
    let mut s = FitSettings::new("N0");
    s.blocks = true;
    s.grain_price_per_t = RATE_TRUTH.grain_price_per_t;
    s.rates = Some(RateSettings {
        by_treatment: RATE_TREATMENTS
            .iter()
            .zip(RATES_KG_HA)
            .map(|((n, _), r)| (n.to_string(), r))
            .collect(),
        unit: crate::crop::RateUnit::KgHa,
        cost_per_ha: RATE_TRUTH.n_price_per_kg,
        current: Some(160.0),
        flat_top_within_per_ha: 0.0,
    });
    s
}

#[test]
fn a_rate_trial_gives_each_curve_its_probability_and_an_optimum_near_the_truth() {
    let out = run(&rate_plots(7, 500.0, 250.0), &rate_settings()).unwrap();
    let rows: Vec<&ResponseRow> = out.response.iter().filter(|r| r.field == "F").collect();
    assert_eq!(
        rows.iter().map(|r| r.model.as_str()).collect::<Vec<_>>(),
        [
            "averaged",
            "quadratic",
            "quadratic_plateau",
            "linear_plateau"
        ]
    );
    let total: f64 = rows[1..].iter().map(|r| r.probability).sum();
    assert!((total - 1.0).abs() < 1e-9, "{total}");
    // Strong evidence for a curve over six unordered rates on a 1.8 t/ha response.
    assert!(
        rows[1..].iter().all(|r| r.log_bayes_factor > 2.0),
        "{rows:?}"
    );
    let avg = rows[0];
    let truth = true_rate_optimum(1.0);
    assert!(
        avg.optimum_lo95 <= truth && truth <= avg.optimum_hi95,
        "{truth} outside {avg:?}"
    );
    assert!(avg.optimum_lo90 >= avg.optimum_lo95 && avg.optimum_hi90 <= avg.optimum_hi95);
    assert!(avg.flat_top_lo <= avg.optimum_rate && avg.optimum_rate <= avg.flat_top_hi);
    // The current rate (160) is past the optimum: the optimum beats it more often than not.
    assert!(avg.p_optimum_beats_current > 0.5, "{avg:?}");
    // The curve at the rates tested against the truth, within its 95 % band.
    let curve: Vec<&ResponseCurveRow> = out
        .response_curve
        .iter()
        .filter(|r| r.field == "F" && r.tested)
        .collect();
    assert_eq!(curve.len(), 6);
    for c in &curve {
        let t = true_rate_gain(c.rate, 1.0);
        assert!(c.gain_lo95 <= t && t <= c.gain_hi95, "{c:?} truth {t}");
    }
    // A single field: the pooled rows are its rows.
    let all: Vec<&ResponseRow> = out.response.iter().filter(|r| r.field == "all").collect();
    assert_eq!(all.len(), 4);
    assert_eq!(all[0].optimum_rate, avg.optimum_rate);
}

#[test]
fn rates_that_do_not_match_the_treatments_are_refused_by_name() {
    let mut s = rate_settings();
    let r = s.rates.as_mut().unwrap();
    r.by_treatment.remove("N80");
    r.by_treatment.insert("N999".into(), 999.0);
    let e = run(&rate_plots(1, 500.0, 250.0), &s)
        .unwrap_err()
        .to_string();
    assert!(e.contains("N80 have no rate in adjust.rates"), "{e}");
    assert!(e.contains("adjust.rates names N999"), "{e}");
}

#[test]
fn the_optimum_interval_covers_the_true_optimum_about_as_often_as_it_says() {
    // Known truth: 100 simulated trials on the simulator's curve and prices.
    let truth = true_rate_optimum(1.0);
    let s = rate_settings();
    let (mut in90, mut in95) = (0, 0);
    let n = 100;
    for seed in 0..n {
        let out = run(&rate_plots(1000 + seed, 500.0, 350.0), &s).unwrap();
        let avg = &out.response[0];
        assert_eq!(avg.model, "averaged");
        in90 += usize::from(avg.optimum_lo90 <= truth && truth <= avg.optimum_hi90);
        in95 += usize::from(avg.optimum_lo95 <= truth && truth <= avg.optimum_hi95);
    }
    eprintln!("optimum coverage over {n} trials: 90 % interval {in90}, 95 % interval {in95}");
    assert!(
        (85..=95).contains(&in90),
        "90 % interval covered {in90} of {n}"
    );
    assert!(in95 >= 90, "95 % interval covered {in95} of {n}");
}

#[test]
fn a_curve_s_factored_likelihood_equals_the_stacked_dense_model() {
    // Two fields at fixed hyperparameters, treatments chk, a, b at rates 0, 50 and 100:
    // Sum_f REML_f + log C of a curve (its coefficients N(0, tau^2 I) integrated, an
    // interaction SD s per field and product) equals the REML density of all plots stacked
    // with covariance blockdiag(K_f + s_n^2 I) + tau^2 (Z A)(Z A)' + Z s^2 Z' and flat field
    // means, from one dense Cholesky (as the unordered model's test in tests.rs).
    use super::response::{pieces, PostPoint};
    use faer::Mat;
    let mut plots = super::tests::trend_field("F", 3, 5, 0.2, 3);
    plots.extend(super::tests::trend_field("G", 3, 4, 0.4, 4));
    let s = FitSettings::new("chk");
    let preps: Vec<Prepared> = ["F", "G"]
        .iter()
        .map(|f| prepare(f, plots.iter().filter(|p| p.field == *f).collect(), &s).unwrap())
        .collect();
    let (_, _, maps) = effect_priors(&preps, &s);
    let hyper = [(25.0, 0.6, 0.3), (40.0, 0.4, 0.2)];
    let (si, tau) = (0.15, 0.7);
    let fits: Vec<spectral::Inner> = preps
        .iter()
        .zip(hyper)
        .map(|(p, (l, sf, sn))| {
            spectral::Repr::exact(&p.model.design, (l, l))
                .unwrap()
                .evaluate(sf, sn)
                .unwrap()
        })
        .collect();
    let rd = RateDesign::new(&[50.0, 100.0], 0.0);
    let point = PostPoint {
        w: 1.0,
        fits: fits.iter().collect(),
        s: si,
        log_c: 0.0,
    };
    let ps = pieces(std::slice::from_ref(&point), &maps, &rd, tau);
    let reml: f64 = fits.iter().map(|f| f.reml).sum();
    for curve in Curve::ALL {
        // The heaviest join of the curve (the quadratic has one node, of prior weight 1).
        let p = ps
            .iter()
            .filter(|p| p.curve == curve)
            .max_by(|a, b| a.log_w.total_cmp(&b.log_w))
            .unwrap();
        let lprior = if curve == Curve::Quadratic {
            0.0
        } else {
            -(30f64).ln()
        };
        let factored = reml + p.log_w - lprior;
        // Each plot's field, position, yield and curve row (zero for the check).
        let mut rows: Vec<(usize, (f64, f64), f64, usize, [f64; 2])> = Vec::new();
        for (f, pr) in preps.iter().enumerate() {
            let d = &pr.model.design;
            for i in 0..d.n() {
                let prod = (1..3).find(|&j| d.x[i * d.p + j] == 1.0).unwrap_or(0);
                let a = if prod == 0 {
                    [0.0, 0.0]
                } else {
                    curve.basis(rd.u[prod - 1], p.x)
                };
                rows.push((f, d.coords[i], d.y[i], prod, a));
            }
        }
        let n = rows.len();
        let cov = Mat::from_fn(n, n, |i, j| {
            let (fi, ai, _, pi, ri) = rows[i];
            let (fj, aj, _, pj, rj) = rows[j];
            let mut v = tau * tau * (ri[0] * rj[0] + ri[1] * rj[1]);
            if fi == fj {
                let (l, sf, sn) = hyper[fi];
                let dd = ((ai.0 - aj.0).powi(2) + (ai.1 - aj.1).powi(2)).sqrt();
                v += Kernel::Matern52.cov(dd, l, sf);
                if i == j {
                    v += sn * sn;
                }
                if pi > 0 && pi == pj {
                    v += si * si;
                }
            }
            v
        });
        let y = Mat::from_fn(n, 1, |i, _| rows[i].2);
        let field: Vec<usize> = rows.iter().map(|r| r.0).collect();
        let direct = super::tests::stacked_reml(&cov, &y, &field, 2);
        assert!(
            ((factored - direct) / direct).abs() < 1e-9,
            "{curve:?} at join {}: {factored} vs {direct}",
            p.x
        );
    }
}

/// Field `name` of a rate trial whose rise is `rise` x the simulator's.
fn rate_field(name: &str, seed: u64, rise: f64) -> Vec<PlotStats> {
    rate_plots(seed, 500.0, 350.0)
        .into_iter()
        .map(|mut p| {
            let k = RATE_TREATMENTS
                .iter()
                .position(|t| t.0 == p.treatment)
                .unwrap();
            p.yield_mean += (rise - 1.0) * true_rate_gain(RATES_KG_HA[k], 1.0);
            p.field = name.to_string();
            p.plot_id = format!("{name}{}", p.plot_id);
            p
        })
        .collect()
}

#[test]
fn a_new_field_s_optimum_interval_covers_held_out_fields() {
    // Known truth: 30 trials of four fields whose rise to the plateau varies from field to
    // field (SD 25 %); each trial's pooled new-field 90 % interval against the true optimum
    // of a fifth field drawn alike and not fitted. The interval is conservative (measured 59
    // of 60, widths 71 against 40 kg N/ha pooled): the fields depart from the curve by an
    // independent amount at each rate (the joint model's treatment x field interaction),
    // which moves a new field's best rate more than a change in the curve's height does.
    let s = rate_settings();
    let mut rng = crate::util::Rng::new(99);
    let (mut covered, mut pooled_width, mut new_width) = (0, 0.0, 0.0);
    let n = 30;
    for t in 0..n {
        let mut plots = Vec::new();
        for f in 0..4 {
            let rise = (1.0 + 0.25 * rng.normal()).max(0.2);
            plots.extend(rate_field(&format!("F{f}"), 7000 + 10 * t + f, rise));
        }
        let held_out = true_rate_optimum((1.0 + 0.25 * rng.normal()).max(0.2));
        let out = run(&plots, &s).unwrap();
        let all = out
            .response
            .iter()
            .find(|r| r.field == "all" && r.model == "averaged")
            .unwrap();
        covered += usize::from(all.new_field_lo90 <= held_out && held_out <= all.new_field_hi90);
        pooled_width += all.optimum_hi90 - all.optimum_lo90;
        new_width += all.new_field_hi90 - all.new_field_lo90;
    }
    eprintln!(
        "new-field 90 % interval covered {covered} of {n} held-out fields; mean widths {:.0} (pooled) and {:.0} (new field) kg N/ha",
        pooled_width / n as f64,
        new_width / n as f64
    );
    assert!(new_width > pooled_width);
    assert!(covered >= 26, "{covered} of {n}");
}

/// [`rate_plots`] with a spreader that applies `factor` x each target rate (x (1 + 3 %
/// noise) per plot): the yields respond to the applied rates, which each plot records.
fn applied_plots(seed: u64, factor: f64) -> Vec<PlotStats> {
    let mut plots = rate_plots(seed, 500.0, 350.0);
    let mut rng = crate::util::Rng::new(seed + 77);
    for p in &mut plots {
        let k = RATE_TREATMENTS
            .iter()
            .position(|t| t.0 == p.treatment)
            .unwrap();
        let applied = RATES_KG_HA[k] * factor * (1.0 + 0.03 * rng.normal());
        p.yield_mean += true_rate_gain(applied, 1.0) - true_rate_gain(RATES_KG_HA[k], 1.0);
        p.applied = Some(crate::table::AppliedRate {
            points: 30,
            mean: applied,
            sd: 1.0,
        });
    }
    plots
}

#[test]
fn as_applied_rates_keep_the_optimum_interval_honest_when_the_spreader_is_off() {
    // Known truth: 100 trials whose spreader applied 80 % of every target rate. Placed at
    // their targets, the treatments stretch the curve and the interval misses the true
    // optimum; placed at their as-applied means, it covers it as often as it says.
    let truth = true_rate_optimum(1.0);
    let s = rate_settings();
    let targets = s.rates.as_ref().unwrap().by_treatment.clone();
    let (mut at_target, mut at_applied) = (0, 0);
    let (mut bias_target, mut bias_applied) = (0.0, 0.0);
    let n = 100;
    for seed in 0..n {
        let plots = applied_plots(3000 + seed, 0.8);
        let fit = |s: &FitSettings| {
            let avg = run(&plots, s).unwrap().response[0].clone();
            let inside = avg.optimum_lo90 <= truth && truth <= avg.optimum_hi90;
            (usize::from(inside), avg.optimum_rate - truth)
        };
        let (c, b) = fit(&s);
        (at_target, bias_target) = (at_target + c, bias_target + b / n as f64);
        let rows = applied::applied_rows(&plots, &targets, crate::crop::RateUnit::KgHa);
        let mut sa = s.clone();
        sa.rates.as_mut().unwrap().by_treatment = applied::applied_means(&rows).unwrap();
        let (c, b) = fit(&sa);
        (at_applied, bias_applied) = (at_applied + c, bias_applied + b / n as f64);
    }
    eprintln!("over {n} trials with an 80 % spreader, the optimum's mean error and 90 % interval coverage: at target rates {bias_target:+.1} kg/ha, {at_target}; at as-applied means {bias_applied:+.1} kg/ha, {at_applied}");
    // At the targets the curve is stretched by 1 / 0.8: the optimum lands about 25 % high.
    assert!(bias_target > 15.0, "at target rates: {bias_target}");
    assert!(
        bias_applied.abs() < 8.0,
        "at as-applied means: {bias_applied}"
    );
    assert!(
        (83..=97).contains(&at_applied) && at_target < at_applied,
        "coverage at as-applied means {at_applied}, at targets {at_target}, of {n}"
    );
}
