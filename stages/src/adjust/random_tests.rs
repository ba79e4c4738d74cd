//! Tests of random design factors (rows, columns, incomplete blocks): the mixed-model
//! likelihood against a dense evaluation, and known-truth simulation of row-column trials.

use super::*;
use crate::util::Rng;
use faer::linalg::solvers::Solve;
use faer::{Mat, Side};

/// A resolvable row-column trial: `reps` replicates of `nt` treatments ("chk", "e01", ...),
/// each replicate `rows_per_rep` rows x `cols` columns; plots 1.5 m across (x = row) and
/// 6 m along (y = column). Yields: 8000 kg/ha + treatment effect + row and column effects
/// (SDs `sr`, `sc`) + a Matern 5/2 field (SD `sf`, range 20 m) + noise (SD `sn`). Returns the
/// plots and the true uplifts of the products.
#[allow(clippy::too_many_arguments)]
fn row_column_trial(
    seed: u64,
    nt: usize,
    reps: usize,
    rows_per_rep: usize,
    cols: usize,
    [sr, sc, sf, sn]: [f64; 4],
    effect_sd: f64,
) -> (Vec<PlotStats>, BTreeMap<String, f64>) {
    assert_eq!(rows_per_rep * cols, nt);
    let mut rng = Rng::new(seed);
    let names: Vec<String> = (0..nt)
        .map(|t| {
            if t == 0 {
                "chk".to_string()
            } else {
                format!("e{t:02}")
            }
        })
        .collect();
    let effects: Vec<f64> = (0..nt)
        .map(|t| {
            if t == 0 {
                0.0
            } else {
                effect_sd * rng.normal()
            }
        })
        .collect();
    let rows = reps * rows_per_rep;
    let row_fx: Vec<f64> = (0..rows).map(|_| sr * rng.normal()).collect();
    let col_fx: Vec<f64> = (0..cols).map(|_| sc * rng.normal()).collect();
    let n = rows * cols;
    let xy: Vec<(f64, f64)> = (0..n)
        .map(|i| (1.5 * (i / cols) as f64, 6.0 * (i % cols) as f64))
        .collect();
    let k = Mat::from_fn(n, n, |i, j| {
        let h = ((xy[i].0 - xy[j].0).powi(2) + (xy[i].1 - xy[j].1).powi(2)).sqrt();
        Kernel::Matern52.cov(h, 20.0, sf) + if i == j { 1e-9 } else { 0.0 }
    });
    let l = k.llt(Side::Lower).unwrap().L().to_owned();
    let z = Mat::from_fn(n, 1, |_, _| rng.normal());
    let field = &l * &z;
    let mut plots = Vec::with_capacity(n);
    for r in 0..reps {
        let mut order: Vec<usize> = (0..nt).collect();
        rng.shuffle(&mut order);
        for (slot, &t) in order.iter().enumerate() {
            let (row, col) = (r * rows_per_rep + slot / cols, slot % cols);
            let i = row * cols + col;
            let y =
                8000.0 + effects[t] + row_fx[row] + col_fx[col] + field[(i, 0)] + sn * rng.normal();
            let mut p = PlotStats::from_yield(
                &format!("p{i}"),
                "F",
                &names[t],
                &format!("rep{r}"),
                y,
                xy[i].0,
                xy[i].1,
            );
            p.grid_row = row as u32 + 1;
            p.grid_range = col as u32 + 1;
            plots.push(p);
        }
    }
    let truth = names
        .iter()
        .zip(&effects)
        .skip(1)
        .map(|(n, e)| (n.clone(), *e))
        .collect();
    (plots, truth)
}

fn rc_settings() -> FitSettings {
    let mut s = FitSettings::new("chk");
    s.blocks = true;
    s.random = vec![RandomEffect::Row, RandomEffect::Column];
    s
}

#[test]
fn mixed_model_likelihood_equals_the_dense_evaluation() {
    // REML, GLS estimates and their covariance from the mixed-model equations against a
    // dense evaluation of y ~ N(X0 b, s_f^2 K1 + s_n^2 I + Z D Z') with flat b: V built and
    // inverted as an n x n matrix, REML = -1/2 ((n - p0) ln 2 pi + ln|V| + ln|X0'V^-1 X0| +
    // y'V^-1 y - b'X0'V^-1 y) (Harville 1977, eq. for the restricted likelihood).
    let (plots, _) = row_column_trial(5, 6, 3, 2, 3, [300.0, 200.0, 250.0, 200.0], 300.0);
    let s = rc_settings();
    let prep = prepare("F", plots.iter().collect(), &s).unwrap();
    let d = &prep.model.design;
    let (n, p, p0) = (d.n(), d.p, d.p_fixed());
    assert_eq!(d.groups, vec![(p0, 6), (p0 + 6, 3)]);
    for (l, sf, sn, sr, sc) in [
        (15.0, 250.0, 200.0, 300.0, 200.0),
        (60.0, 80.0, 400.0, 50.0, 500.0),
    ] {
        let rep = spectral::Repr::exact(d, (l, l)).unwrap();
        let e = rep.evaluate_groups(sf, sn, &[sr, sc]).unwrap();
        let sd_of = |j: usize| if j < p0 + 6 { sr } else { sc };
        let v = Mat::from_fn(n, n, |i, j| {
            let (a, b) = (d.coords[i], d.coords[j]);
            let h = ((a.0 - b.0).powi(2) + (a.1 - b.1).powi(2)).sqrt();
            let z: f64 = (p0..p)
                .map(|c| d.x[i * p + c] * d.x[j * p + c] * sd_of(c).powi(2))
                .sum();
            d.kernel.cov(h, l, sf) + z + if i == j { sn * sn } else { 0.0 }
        });
        let llt = v.llt(Side::Lower).unwrap();
        let ld_v: f64 = (0..n).map(|i| 2.0 * llt.L()[(i, i)].ln()).sum();
        let x0 = Mat::from_fn(n, p0, |i, j| d.x[i * p + j]);
        let y = Mat::from_fn(n, 1, |i, _| d.y[i]);
        let vix = llt.solve(&x0);
        let viy = llt.solve(&y);
        let a = x0.transpose() * &vix;
        let c = x0.transpose() * &viy;
        let al = a.llt(Side::Lower).unwrap();
        let b = al.solve(&c);
        let ld_a: f64 = (0..p0).map(|i| 2.0 * al.L()[(i, i)].ln()).sum();
        let yviy = (y.transpose() * &viy)[(0, 0)];
        let bc: f64 = (0..p0).map(|i| b[(i, 0)] * c[(i, 0)]).sum();
        let reml =
            -0.5 * ((n - p0) as f64 * (2.0 * std::f64::consts::PI).ln() + ld_v + ld_a + yviy - bc);
        assert!(
            (e.reml - reml).abs() < 1e-8 * reml.abs(),
            "{} vs {reml}",
            e.reml
        );
        let cov = al.solve(Mat::<f64>::identity(p0, p0));
        for i in 0..p0 {
            assert!(
                (e.b[i] - b[(i, 0)]).abs() < 1e-6,
                "b{i}: {} vs {}",
                e.b[i],
                b[(i, 0)]
            );
            for j in 0..p0 {
                assert!((e.cov[i * p + j] - cov[(i, j)]).abs() < 1e-6 * cov[(i, i)].abs());
            }
        }
    }
}

#[test]
fn a_row_column_trial_recovers_its_row_and_column_variances() {
    // One large trial (4 replicates of 60 entries in 20 rows x 12 columns... 240 plots) with
    // row SD 400 and column SD 250 kg/ha: both inside their 95 % intervals and the
    // posterior means within 40 % of the truth; the hyperparameter table has them, and
    // leaving them out of the model is worse by the marginal likelihood.
    let truth = [400.0, 250.0, 150.0, 250.0];
    let (plots, _) = row_column_trial(11, 60, 4, 5, 12, truth, 300.0);
    let out = run(&plots, &rc_settings()).unwrap();
    let h = &out.hyper[0];
    for (name, s, t) in [
        ("row", &h.row_sd, truth[0]),
        ("column", &h.column_sd, truth[1]),
    ] {
        eprintln!(
            "{name} SD {:.0} ({:.0}-{:.0}), truth {t}",
            s.mean, s.lo95, s.hi95
        );
        assert!(s.lo95 <= t && t <= s.hi95, "{name}: {s:?} vs {t}");
        assert!((s.mean / t - 1.0).abs() < 0.4, "{name}: {} vs {t}", s.mean);
    }
    assert!(h.block_sd.mean.is_nan());
    let mut plain = rc_settings();
    plain.random.clear();
    let without = run(&plots, &plain).unwrap();
    assert!(without.hyper[0].row_sd.mean.is_nan());
    eprintln!(
        "log ML with rows and columns {:.1}, without {:.1}",
        h.log_marginal_likelihood, without.hyper[0].log_marginal_likelihood
    );
    assert!(h.log_marginal_likelihood > without.hyper[0].log_marginal_likelihood + 5.0);
}

#[test]
fn row_column_uplift_intervals_are_calibrated_over_200_trials() {
    // Known-truth simulation: 200 row-column trials (3 replicates of 12 entries, each
    // replicate 2 rows x 6 columns; row SD 350, column SD 250, spatial SD 150, noise SD 250
    // kg/ha; entry effects ~ N(0, 300^2)), fitted with rows and columns random. The 95 %
    // intervals of the 2,200 uplifts should cover the truth 93-97 % of the time, and the
    // 95 % intervals of the row and column SDs should cover theirs at least 85 % of the time
    // (few levels per trial: 6 rows and 6 columns).
    let truth = [350.0, 250.0, 150.0, 250.0];
    let s = rc_settings();
    let per: Vec<[usize; 4]> = (0..200u64)
        .into_par_iter()
        .map(|k| {
            let (plots, effects) = row_column_trial(1000 + k, 12, 3, 2, 6, truth, 300.0);
            let out = run(&plots, &s).unwrap();
            let mut c = [0usize; 4];
            for r in out.treatments.iter().filter(|r| r.field == "F") {
                if let Some(t) = effects.get(&r.treatment) {
                    c[0] += usize::from(r.uplift_lo95 <= *t && *t <= r.uplift_hi95);
                    c[1] += 1;
                }
            }
            let h = &out.hyper[0];
            c[2] += usize::from(h.row_sd.lo95 <= truth[0] && truth[0] <= h.row_sd.hi95);
            c[3] += usize::from(h.column_sd.lo95 <= truth[1] && truth[1] <= h.column_sd.hi95);
            c
        })
        .collect();
    let [cov, tot, rows, cols] = per
        .iter()
        .fold([0; 4], |a, b| std::array::from_fn(|k| a[k] + b[k]));
    let coverage = cov as f64 / tot as f64;
    eprintln!(
        "uplift coverage {cov}/{tot} = {coverage:.3}; row SD {rows}/200, column SD {cols}/200"
    );
    assert_eq!(tot, 2200);
    assert!((0.93..=0.97).contains(&coverage), "coverage {coverage:.3}");
    assert!(rows >= 170 && cols >= 170, "rows {rows}, columns {cols}");
}
