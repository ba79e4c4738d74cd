//! Tests of the adjust stage: kernels, the dense references, the lattice against brute
//! force and a slice sampler, the joint likelihood against the stacked dense model, the
//! reduced-rank basis, pooling, priors and anisotropy.

use super::*;
use crate::plots::PlotStats;
use faer::linalg::solvers::Solve;
use faer::{Mat, Side};

#[test]
fn kernels_by_hand() {
    // At d = l with unit SD: exp(-1) = 0.367879; (1 + sqrt3) exp(-sqrt3) = 0.483358;
    // exp(-1/2) = 0.606531 (arithmetic).
    assert!((Kernel::Matern12.cov(10.0, 10.0, 1.0) - 0.367_879_4).abs() < 1e-6);
    assert!((Kernel::Matern32.cov(10.0, 10.0, 1.0) - 0.483_357_7).abs() < 1e-6);
    assert!((Kernel::SquaredExponential.cov(10.0, 10.0, 1.0) - 0.606_530_7).abs() < 1e-6);
    assert_eq!(Kernel::from_name("matern32"), Some(Kernel::Matern32));
    assert_eq!(Kernel::from_name("rbf"), None);
}

#[test]
fn matern_by_hand() {
    // d = 0 gives the variance; at d = l: (1 + sqrt5 + 5/3) exp(-sqrt5) = 0.523994.
    assert!((matern52(0.0, 10.0, 2.0) - 4.0).abs() < 1e-12);
    assert!((matern52(10.0, 10.0, 1.0) - 0.523_994_2).abs() < 1e-6);
}

#[test]
fn nelder_mead_finds_quadratic_minimum() {
    let f = |x: &[f64]| (x[0] - 1.0).powi(2) + 3.0 * (x[1] + 2.0).powi(2);
    let (x, v) = nelder_mead(&f, &[0.0, 0.0], 0.5, 500);
    assert!((x[0] - 1.0).abs() < 1e-3 && (x[1] + 2.0).abs() < 1e-3 && v < 1e-6);
}

#[test]
fn gls_reduces_to_means_without_spatial_field() {
    // With s_f tiny, b_hat are the treatment means and var = s_n^2 / n_t.
    let data = FieldData {
        y: vec![1.0, 3.0, 5.0, 9.0],
        xy: vec![(0.0, 0.0), (10.0, 0.0), (20.0, 0.0), (30.0, 0.0)],
        x: vec![
            vec![1.0, 0.0],
            vec![1.0, 0.0],
            vec![0.0, 1.0],
            vec![0.0, 1.0],
        ],
        p: 2,
        kernel: Kernel::Matern52,
    };
    let e = evaluate(&data, 5.0, 1e-6, 2.0, true).unwrap();
    assert!((e.b[0] - 2.0).abs() < 1e-9 && (e.b[1] - 7.0).abs() < 1e-9);
    assert!((e.cov_b[(0, 0)] - 2.0).abs() < 1e-9);
}

fn grid_plots(treatments: &[&str], yields: impl Fn(usize) -> f64) -> Vec<PlotStats> {
    (0..24)
        .map(|i| {
            PlotStats::from_yield(
                &format!("p{i}"),
                "F",
                treatments[i % treatments.len()],
                &(i / 6).to_string(),
                yields(i),
                18.0 * (i % 6) as f64,
                66.0 * (i / 6) as f64,
            )
        })
        .collect()
}

fn settings() -> FitSettings {
    FitSettings::new("chk")
}

#[test]
fn degenerate_designs_give_clear_messages() {
    let wobble = |i: usize| 10.0 + 0.3 * ((i * 7) % 5) as f64;
    let e = run(&grid_plots(&["chk"], wobble), &settings())
        .unwrap_err()
        .to_string();
    assert!(e.contains("field F: only one treatment (chk)"), "{e}");
    let e = run(&grid_plots(&["a", "b"], wobble), &settings())
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("field F: no kept plot of the check \"chk\""),
        "{e}"
    );
    let e = run(&grid_plots(&["chk", "a"], |_| 10.0), &settings())
        .unwrap_err()
        .to_string();
    assert!(e.contains("all plot yields are equal"), "{e}");
    // A product in a single plot: estimated, with a wider interval, no NaN.
    let mut plots = grid_plots(&["chk", "a", "b"], wobble);
    plots[5].treatment = "solo".into();
    let out = run(&plots, &settings()).unwrap();
    let solo = out
        .treatments
        .iter()
        .find(|t| t.treatment == "solo" && t.field == "F")
        .unwrap();
    let a = out
        .treatments
        .iter()
        .find(|t| t.treatment == "a" && t.field == "F")
        .unwrap();
    assert_eq!(solo.plots, 1);
    assert!(solo.uplift.is_finite() && solo.uplift_sd.is_finite() && solo.p_uplift_gt0.is_finite());
    assert!(
        solo.uplift_sd > a.uplift_sd,
        "{} vs {}",
        solo.uplift_sd,
        a.uplift_sd
    );
}

/// A field of `rows` x `cols` plots (18 m x 66 m) with a smooth trend, noise and
/// treatments "chk", "a", "b" in rotation; "a" adds `effect`.
pub(crate) fn trend_field(
    name: &str,
    rows: usize,
    cols: usize,
    effect: f64,
    seed: u64,
) -> Vec<PlotStats> {
    let mut rng = crate::util::Rng::new(seed);
    (0..rows * cols)
        .map(|i| {
            let (x, y) = (18.0 * (i % cols) as f64, 66.0 * (i / cols) as f64);
            let t = ["chk", "a", "b"][(i + i / cols) % 3];
            let trend = 0.8 * (x / 40.0).sin() + 0.5 * (y / 120.0).cos();
            let v = 10.0 + trend + if t == "a" { effect } else { 0.0 } + 0.25 * rng.normal();
            PlotStats::from_yield(
                &format!("{name}{i}"),
                name,
                t,
                &(i / cols).to_string(),
                v,
                x,
                y,
            )
        })
        .collect()
}

fn row<'a>(out: &'a AdjustOutput, field: &str, t: &str) -> &'a TreatmentRow {
    out.treatments
        .iter()
        .find(|r| r.field == field && r.treatment == t)
        .unwrap()
}

#[test]
fn lattice_integration_matches_brute_force_quadrature_and_a_slice_sampler() {
    // Small problem (24 plots): the lattice against a 36^3 brute-force grid and 6,000
    // slice-sampling sweeps; means and SDs within 2 % (relative to the SD for means),
    // probabilities within 0.02.
    let plots = trend_field("F", 4, 6, 0.3, 11);
    let s = settings();
    let out = run(&plots, &s).unwrap();
    let refs: Vec<&PlotStats> = plots.iter().collect();
    let mut prep = prepare("F", refs, &s).unwrap();
    let _ = scan_own(&mut prep.model, &s, true);
    let (_, global, maps) = effect_priors(std::slice::from_ref(&prep), &s);
    let (prior, _) = local_prior(&global, &maps[0]);
    let brute = oracle::brute_force(&prep, prior.clone(), 36);
    let slice = oracle::slice_sampler(&prep, prior, 6000, 5);
    for (k, t) in ["a", "b"].iter().enumerate() {
        let r = row(&out, "F", t);
        for (name, o) in [("brute force", &brute), ("slice sampler", &slice)] {
            let (m, sdv, pr) = o.uplift[k];
            eprintln!(
                "{t} {name}: mean {m:.4} vs {:.4}, sd {sdv:.4} vs {:.4}, P {pr:.4} vs {:.4}",
                r.uplift, r.uplift_sd, r.p_uplift_gt0
            );
            assert!(
                (r.uplift - m).abs() < 0.02 * sdv,
                "{t} {name} mean {} vs {m}",
                r.uplift
            );
            assert!(
                (r.uplift_sd / sdv - 1.0).abs() < 0.02,
                "{t} {name} sd {} vs {sdv}",
                r.uplift_sd
            );
            assert!(
                (r.p_uplift_gt0 - pr).abs() < 0.02,
                "{t} {name} P {} vs {pr}",
                r.p_uplift_gt0
            );
        }
    }
    let h = &out.hyper[0];
    eprintln!(
        "range mean {:.2} vs brute {:.2} slice {:.2}",
        h.range_m, brute.range_mean, slice.range_mean
    );
    assert!((h.range_m / brute.range_mean - 1.0).abs() < 0.05);
}

#[test]
fn joint_likelihood_equals_the_stacked_dense_model() {
    // Two fields at fixed hyperparameters: Sum_f REML_f + log C (treatment-level
    // equations) equals the REML density of all plots stacked, with covariance
    // blockdiag(K_f + s_n^2 I) + X_c S0 X_c' + Z s^2 Z' and flat field means, computed by
    // one dense Cholesky (R&W 2006 eq. 2.45 with the Gaussian prior columns moved into
    // the covariance).
    let mut plots = trend_field("F", 3, 5, 0.2, 3);
    plots.extend(trend_field("G", 3, 4, 0.4, 4));
    let s = settings();
    let preps: Vec<Prepared> = ["F", "G"]
        .iter()
        .map(|f| prepare(f, plots.iter().filter(|p| p.field == *f).collect(), &s).unwrap())
        .collect();
    let (_, mut global, maps) = effect_priors(&preps, &s);
    global.mean = vec![0.1, -0.2];
    global.var = vec![0.3, 0.5];
    let hyper = [(25.0, 0.6, 0.3), (40.0, 0.4, 0.2)];
    let si = 0.15;
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
    let refs: Vec<&spectral::Inner> = fits.iter().collect();
    let c = combine(&refs, &maps, &global, si, Moments::None).unwrap();
    let factored: f64 = fits.iter().map(|f| f.reml).sum::<f64>() + c.log_c;
    // The stacked model: columns = field intercepts (flat); products a, b (prior) and
    // one interaction column per field and product (variance s^2) go into the covariance.
    let n: usize = preps.iter().map(|p| p.model.design.n()).sum();
    let mut rows: Vec<(usize, (f64, f64), f64, usize)> = Vec::new(); // field, xy, y, product (0 = check)
    for (f, p) in preps.iter().enumerate() {
        let d = &p.model.design;
        for i in 0..d.n() {
            let prod = (1..d.p).find(|&j| d.x[i * d.p + j] == 1.0).unwrap_or(0);
            rows.push((f, d.coords[i], d.y[i], prod));
        }
    }
    let cov = Mat::from_fn(n, n, |i, j| {
        let (fi, ai, _, pi) = rows[i];
        let (fj, aj, _, pj) = rows[j];
        let mut v = 0.0;
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
        if pi > 0 && pi == pj {
            v += global.var[pi - 1];
        }
        v
    });
    let y = Mat::from_fn(n, 1, |i, _| {
        let (_, _, yv, pi) = rows[i];
        yv - if pi > 0 { global.mean[pi - 1] } else { 0.0 }
    });
    let field: Vec<usize> = rows.iter().map(|r| r.0).collect();
    let direct = stacked_reml(&cov, &y, &field, 2);
    assert!(
        ((factored - direct) / direct).abs() < 1e-9,
        "{factored} vs {direct}"
    );
}

/// The REML log density of plots stacked with covariance `cov`, values `y` and a flat mean
/// per field (`field[i]` of `nf`), by one dense Cholesky (R&W 2006 eq. 2.45).
pub(crate) fn stacked_reml(cov: &Mat<f64>, y: &Mat<f64>, field: &[usize], nf: usize) -> f64 {
    let n = field.len();
    let x0 = Mat::from_fn(n, nf, |i, j| if field[i] == j { 1.0 } else { 0.0 });
    let llt = cov.llt(Side::Lower).unwrap();
    let l = llt.L();
    let logdet: f64 = (0..n).map(|i| 2.0 * l[(i, i)].ln()).sum();
    let a = x0.transpose() * llt.solve(&x0);
    let a_llt = a.llt(Side::Lower).unwrap();
    let al = a_llt.L();
    let logdet_a: f64 = (0..nf).map(|i| 2.0 * al[(i, i)].ln()).sum();
    let b = a_llt.solve(&(x0.transpose() * llt.solve(y)));
    let r = y - &x0 * &b;
    let cr = llt.solve(&r);
    let quad: f64 = (0..n).map(|i| r[(i, 0)] * cr[(i, 0)]).sum();
    -0.5 * ((n - nf) as f64 * (2.0 * std::f64::consts::PI).ln() + logdet + logdet_a + quad)
}

#[test]
fn reduced_rank_basis_tracks_the_exact_kernel() {
    // 400 plots (702 m x 594 m) at a range of 100 m near the posterior mode, where the
    // basis rule is met within 400 functions: the Hilbert-space form's uplift within 5 % of
    // the uplift SD (its REML is printed: it runs ~2 % above the exact one, the truncated
    // high frequencies acting as a little extra noise); then the whole fit, exact
    // against reduced rank.
    let plots = trend_field("F", 10, 40, 0.3, 8);
    let mut s = settings();
    let refs: Vec<&PlotStats> = plots.iter().collect();
    let prep = prepare("F", refs, &s).unwrap();
    let d = &prep.model.design;
    for l in [100.0] {
        let ex = spectral::Repr::exact(d, (l, l))
            .unwrap()
            .evaluate(0.6, 0.25)
            .unwrap();
        let hs = spectral::Repr::hsgp(d, (l, l), 400, 2.0).unwrap();
        let basis = hs.basis;
        let hs = hs.evaluate(0.6, 0.25).unwrap();
        eprintln!(
            "l {l}: exact REML {:.3} hsgp {:.3} basis {basis:?}; uplift {:.4} vs {:.4} (sd {:.4})",
            ex.reml,
            hs.reml,
            ex.b[1],
            hs.b[1],
            ex.cov[d.p + 1].sqrt()
        );
        assert!(!basis.unwrap().2, "the cap should not bind at {l} m");
        assert!((ex.b[1] - hs.b[1]).abs() < 0.05 * ex.cov[d.p + 1].sqrt());
    }
    let exact = run(&plots, &s).unwrap();
    s.exact_max_plots = 100;
    let approx = run(&plots, &s).unwrap();
    let (e, a) = (row(&exact, "F", "a"), row(&approx, "F", "a"));
    eprintln!(
        "uplift exact {:.4} +- {:.4}, hsgp {:.4} +- {:.4} ({})",
        e.uplift, e.uplift_sd, a.uplift, a.uplift_sd, approx.hyper[0].method
    );
    assert!(approx.hyper[0].method.starts_with("hsgp"));
    assert!((e.uplift - a.uplift).abs() < 0.1 * e.uplift_sd);
    assert!((e.uplift_sd / a.uplift_sd - 1.0).abs() < 0.1);
}

#[test]
fn joint_fit_pools_fields_and_detects_a_field_where_a_product_differs() {
    // Four fields of 24 plots; product "a" adds 0.3 t/ha everywhere, or 1.2 in field F0
    // and 0 elsewhere.
    let season = |effects: [f64; 4]| -> Vec<PlotStats> {
        (0..4)
            .flat_map(|f| trend_field(&format!("F{f}"), 4, 6, effects[f], 20 + f as u64))
            .collect()
    };
    let s = settings();
    let same = run(&season([0.3; 4]), &s).unwrap();
    let pooled = row(&same, "all", "a");
    let widest_single = (0..4)
        .map(|f| row(&same, &format!("F{f}"), "a").uplift_sd)
        .fold(0.0, f64::max);
    eprintln!(
        "pooled a {:.3} +- {:.3}; per-field SDs up to {widest_single:.3}; ESS {:.0}",
        pooled.uplift, pooled.uplift_sd, same.joint_ess
    );
    assert!(pooled.uplift_lo95 < 0.3 && 0.3 < pooled.uplift_hi95);
    assert!(pooled.uplift_sd < widest_single);
    assert!(same.joint_ess > 100.0);
    // Per-plot spatial effects under the joint posterior stay close to each field's own
    // when the fields agree (they differ only through the shared product effects).
    let mut sep_s = s.clone();
    sep_s.pooling = Pooling::Separate;
    let sep = run(&season([0.3; 4]), &sep_s).unwrap();
    let diff: f64 = same
        .plots
        .iter()
        .zip(&sep.plots)
        .map(|(a, b)| (a.spatial_mean - b.spatial_mean).abs() / b.spatial_sd)
        .sum::<f64>()
        / same.plots.len() as f64;
    eprintln!("mean |joint - own| spatial effect: {diff:.3} SDs");
    assert!(diff < 0.2, "{diff}");
    let inter_same = same
        .hyper
        .iter()
        .find(|h| h.field == "all")
        .unwrap()
        .interaction_sd;
    let differ = run(&season([1.2, 0.0, 0.0, 0.0]), &s).unwrap();
    let inter_differ = differ
        .hyper
        .iter()
        .find(|h| h.field == "all")
        .unwrap()
        .interaction_sd;
    eprintln!("interaction SD: same {inter_same:?}, differ {inter_differ:?}");
    assert!(inter_differ.mean > 2.0 * inter_same.mean);
    assert!(inter_differ.lo95 > 0.0);
    let f0 = row(&differ, "F0", "a");
    let f1 = row(&differ, "F1", "a");
    eprintln!(
        "F0 a {:.3} +- {:.3}; F1 a {:.3} +- {:.3}",
        f0.uplift, f0.uplift_sd, f1.uplift, f1.uplift_sd
    );
    assert!(
        f0.uplift > 0.8 && f1.uplift < 0.4,
        "{} {}",
        f0.uplift,
        f1.uplift
    );
    // Seeded draws: a rerun gives the same numbers.
    let again = run(&season([1.2, 0.0, 0.0, 0.0]), &s).unwrap();
    assert_eq!(
        format!("{:?}", again.treatments),
        format!("{:?}", differ.treatments)
    );
}

#[test]
fn an_informative_prior_moves_the_posterior_and_is_shown_beside_it() {
    let plots = trend_field("F", 4, 6, 0.3, 31);
    let mut s = settings();
    let weak = run(&plots, &s).unwrap();
    s.product_prior.insert("a".into(), (1.0, 0.05));
    let strong = run(&plots, &s).unwrap();
    let (w, st) = (row(&weak, "F", "a"), row(&strong, "F", "a"));
    eprintln!(
        "weak {:.3} +- {:.3}; with N(1, 0.05^2) {:.3} +- {:.3}",
        w.uplift, w.uplift_sd, st.uplift, st.uplift_sd
    );
    assert_eq!((st.prior_mean, st.prior_sd), (1.0, 0.05));
    assert!(
        w.prior_sd > 1.0,
        "the weak default prior is wide: {}",
        w.prior_sd
    );
    // A prior SD of 0.05 against a data SD of ~0.1: the posterior sits between, nearer
    // the prior, and is narrower than either.
    assert!(st.uplift > w.uplift + 0.5 * (1.0 - w.uplift) && st.uplift < 1.0);
    assert!(st.uplift_sd < 0.05 && st.uplift_sd < w.uplift_sd);
    // "b" has no prior of its own: it moves only through the check it shares with "a".
    // With equal replication the check's mean absorbs about half of a's shift (a and the
    // check are equally informed), so b's contrast rises by about half of it.
    let db = row(&strong, "F", "b").uplift - row(&weak, "F", "b").uplift;
    let da = st.uplift - w.uplift;
    eprintln!("a moved by {da:.3}, b by {db:.3}");
    assert!(db > 0.3 * da && db < 0.7 * da);
}

#[test]
fn anisotropic_fit_finds_the_shorter_range_along_the_axis_that_varies() {
    // The trend varies along x (wavelength ~190 m) and hardly across y.
    let mut rng = crate::util::Rng::new(5);
    let plots: Vec<PlotStats> = (0..48)
        .map(|i| {
            let (x, y) = (18.0 * (i % 12) as f64, 66.0 * (i / 12) as f64);
            let t = ["chk", "a", "b"][(i + i / 12) % 3];
            let v = 10.0 + 0.8 * (x / 30.0).sin() + 0.002 * y + 0.15 * rng.normal();
            PlotStats::from_yield(&format!("p{i}"), "F", t, "1", v, x, y)
        })
        .collect();
    let mut s = settings();
    s.anisotropic = true;
    let out = run(&plots, &s).unwrap();
    let h = &out.hyper[0];
    eprintln!(
        "range along x {:.1} ({:.1}..{:.1}), along y {:?}",
        h.range_m, h.range_lo95_m, h.range_hi95_m, h.range_across
    );
    assert!(h.range_m < h.range_across.mean);
    assert!(h.range_hi95_m < h.range_across.hi95);
}

#[test]
fn joint_importance_draws_stay_effective_with_many_fields() {
    // 30 small fields: without the cavity tilt the effective sample size fell to ~50 of
    // 2,000 draws (5 with 60 fields); with it the draws stay effective, and the pooled
    // uplift agrees with the inverse-variance combination of separate fits.
    let plots: Vec<PlotStats> = (0..30)
        .flat_map(|f| trend_field(&format!("F{f:02}"), 4, 6, 0.3, 500 + f as u64))
        .collect();
    let mut s = settings();
    s.interaction = false;
    let joint = run(&plots, &s).unwrap();
    s.pooling = Pooling::Separate;
    let sep = run(&plots, &s).unwrap();
    let (j, p) = (row(&joint, "all", "a"), row(&sep, "all", "a"));
    eprintln!(
        "ESS {:.0}; joint {:.4} +- {:.4}, separate {:.4} +- {:.4}",
        joint.joint_ess, j.uplift, j.uplift_sd, p.uplift, p.uplift_sd
    );
    assert!(joint.joint_ess > 500.0, "{}", joint.joint_ess);
    // The method names the draws the ESS is of, so the ESS never exceeds them.
    let method = &joint
        .hyper
        .iter()
        .find(|h| h.field == "all")
        .unwrap()
        .method;
    let draws: f64 = method
        .strip_prefix("joint, ")
        .and_then(|m| m.split(' ').next())
        .and_then(|d| d.parse().ok())
        .unwrap_or_else(|| panic!("{method}"));
    assert!(joint.joint_ess <= draws + 1e-9, "{method}");
    assert!((j.uplift - p.uplift).abs() < 0.25 * p.uplift_sd);
    assert!((j.uplift_sd / p.uplift_sd - 1.0).abs() < 0.15);
}

#[test]
fn spectral_evaluation_equals_the_dense_cholesky_evaluation() {
    // The exact spectral form against a fresh dense Cholesky (`evaluate`) at several
    // hyperparameters, with blocks in the mean model: REML, GLS estimates and their
    // covariance to 1e-9, spatial effect means and variances to 1e-8. The second design has
    // 20 blocks (22 mean parameters), which takes the blocked products of `linalg::LARGE`.
    for (rows, cols) in [(4, 6), (20, 3)] {
        let plots = trend_field("F", rows, cols, 0.3, 17);
        let mut s = settings();
        s.blocks = true;
        let prep = prepare("F", plots.iter().collect(), &s).unwrap();
        let d = &prep.model.design;
        assert_eq!(d.p >= linalg::LARGE, rows == 20, "p = {}", d.p);
        let data = FieldData::from_design(d);
        for (l, sf, sn) in [(20.0, 0.5, 0.2), (80.0, 1.2, 0.05), (300.0, 0.1, 0.4)] {
            let rep = spectral::Repr::exact(d, (l, l)).unwrap();
            let e = rep.evaluate(sf, sn).unwrap();
            let dense = evaluate(&data, l, sf, sn, true).unwrap();
            assert!(
                (e.reml - dense.reml).abs() < 1e-9 * dense.reml.abs(),
                "{} vs {}",
                e.reml,
                dense.reml
            );
            for a in 0..d.p {
                assert!((e.b[a] - dense.b[a]).abs() < 1e-9);
                for b in 0..d.p {
                    assert!((e.cov[a * d.p + b] - dense.cov_b[(a, b)]).abs() < 1e-9);
                }
            }
            let (m, v) = rep.spatial(d, sf, sn, &e).unwrap();
            for i in 0..d.n() {
                assert!((m[i] - dense.spatial_mean[i]).abs() < 1e-8);
                assert!((v[i] - dense.spatial_var[i]).abs() < 1e-8);
            }
            // The REML alone (the searches' path) is the same number.
            assert_eq!(rep.reml_groups(sf, sn, &[]), Some(e.reml));
        }
    }
}

#[test]
fn joint_fit_handles_fields_with_different_products() {
    // Field F holds chk, a, b; field G holds chk, a, c: "a" is pooled over both, "b" and
    // "c" come from one field each, and the pooled row of a one-field product matches
    // that field's row up to the interaction's shrinkage.
    let mut plots = trend_field("F", 4, 6, 0.3, 41);
    let mut g = trend_field("G", 4, 6, 0.3, 42);
    for p in g.iter_mut().filter(|p| p.treatment == "b") {
        p.treatment = "c".into();
    }
    plots.extend(g);
    let out = run(&plots, &settings()).unwrap();
    for (f, t) in [
        ("F", "b"),
        ("G", "c"),
        ("all", "a"),
        ("all", "b"),
        ("all", "c"),
    ] {
        let r = row(&out, f, t);
        assert!(r.uplift.is_finite() && r.uplift_sd > 0.0, "{f} {t}");
    }
    assert!(out
        .treatments
        .iter()
        .all(|r| !(r.field == "F" && r.treatment == "c")));
    assert_eq!(row(&out, "all", "a").plots, 16);
    assert_eq!(row(&out, "all", "c").plots, 8);
    let (fc, pc) = (row(&out, "G", "c"), row(&out, "all", "c"));
    eprintln!(
        "G c {:.3} +- {:.3}; pooled c {:.3} +- {:.3}",
        fc.uplift, fc.uplift_sd, pc.uplift, pc.uplift_sd
    );
    assert!((fc.uplift - pc.uplift).abs() < 0.5 * fc.uplift_sd);
    assert!(
        pc.uplift_sd >= fc.uplift_sd * 0.99,
        "one field cannot pin the mean effect more tightly"
    );
}

#[test]
fn a_single_field_gives_one_answer_in_its_row_and_the_pooled_row() {
    // One field: the pooled row of each product is the field's own posterior, so every
    // uplift column and probability is the same (before, a normal approximation of the
    // field's mixture printed slightly different intervals and probabilities).
    let plots = trend_field("F", 4, 6, 0.3, 43);
    let out = run(&plots, &settings()).unwrap();
    for t in ["a", "b"] {
        let (f, p) = (row(&out, "F", t), row(&out, "all", t));
        assert_eq!(
            (
                f.uplift,
                f.uplift_sd,
                f.uplift_lo90,
                f.uplift_hi90,
                f.uplift_lo95,
                f.uplift_hi95,
                f.p_uplift_gt0,
                f.plots
            ),
            (
                p.uplift,
                p.uplift_sd,
                p.uplift_lo90,
                p.uplift_hi90,
                p.uplift_lo95,
                p.uplift_hi95,
                p.p_uplift_gt0,
                p.plots
            ),
            "{t}"
        );
        assert!(
            p.estimate.is_nan(),
            "the pooled row has no mean yield of its own"
        );
    }
}

#[test]
fn deferred_own_effects_and_rows_equal_those_made_in_the_fit_bit_for_bit() {
    // fit_own with its plot effects made at once (separate fits) against fit_own leaving
    // them to own_plots (a planned joint fit that falls back), and the rows from own_rows:
    // the same plot effects, rows and comparison, bit for bit.
    let plots = trend_field("F", 6, 8, 0.3, 23);
    let s = settings();
    let refs: Vec<&PlotStats> = plots.iter().collect();
    let mut prep = prepare("F", refs, &s).unwrap();
    let lat = scan_own(&mut prep.model, &s, true);
    let (_, global, maps) = effect_priors(std::slice::from_ref(&prep), &s);
    let now = fit_own(&prep, &lat, &global, &maps[0], &s, true).unwrap();
    let mut later = fit_own(&prep, &lat, &global, &maps[0], &s, false).unwrap();
    assert!(later.plots.is_none() && later.mode_spatial.is_some());
    later.plots = Some(own_plots(
        &prep,
        &later.spatial_pts,
        later.mode_spatial.take(),
    ));
    let bits = |v: &[AdjustedPlot]| -> Vec<[u64; 5]> {
        v.iter()
            .map(|p| {
                [
                    p.raw,
                    p.spatial_mean,
                    p.spatial_sd,
                    p.adjusted,
                    p.adjusted_sd,
                ]
                .map(f64::to_bits)
            })
            .collect()
    };
    let (a, b) = (now.plots.unwrap(), later.plots.unwrap());
    assert_eq!(a.len(), 48);
    assert_eq!(bits(&a), bits(&b));
    assert!(a.iter().any(|p| p.spatial_mean != 0.0));
    assert_eq!(
        format!("{:?}", now.comparison),
        format!("{:?}", later.comparison)
    );
    let (rows_a, up_a) = own_rows(&prep, &now.comps, &global, &maps[0], &s);
    let (rows_b, up_b) = own_rows(&prep, &later.comps, &global, &maps[0], &s);
    assert_eq!(format!("{rows_a:?}"), format!("{rows_b:?}"));
    assert_eq!(format!("{up_a:?}"), format!("{up_b:?}"));
    assert_eq!(rows_a.len(), 3);
    // The rows are those run() reports for the field alone.
    let out = run(&plots, &s).unwrap();
    for r in &rows_a {
        let o = row(&out, "F", &r.treatment);
        assert_eq!(o.uplift.to_bits(), r.uplift.to_bits(), "{}", r.treatment);
    }
}
