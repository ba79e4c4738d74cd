//! Dense reference computations on a fresh Cholesky factorisation: the REML evaluation,
//! the Gaussian-prior marginal likelihood and latent predictions. Used by the tests (against
//! the spectral path, the oracles and the scipy / scikit-learn fixtures), not by the fit.

use super::*;
use faer::linalg::solvers::Solve;
use faer::{Mat, Side};

/// A field's data: yields, centroids and design matrix.
#[derive(Clone, Debug)]
pub struct FieldData {
    pub y: Vec<f64>,
    pub xy: Vec<(f64, f64)>,
    /// n x p design matrix, row major.
    pub x: Vec<Vec<f64>>,
    pub p: usize,
    pub kernel: Kernel,
}

impl FieldData {
    /// The dense form of a field's design (isotropic distances on its coordinates).
    pub fn from_design(d: &Design) -> FieldData {
        FieldData {
            y: d.y.clone(),
            xy: d.coords.clone(),
            x: (0..d.n())
                .map(|i| d.x[i * d.p..(i + 1) * d.p].to_vec())
                .collect(),
            p: d.p,
            kernel: d.kernel,
        }
    }
}

/// Everything computed at one set of hyperparameters.
pub struct Evaluation {
    pub reml: f64,
    pub b: Vec<f64>,
    pub cov_b: Mat<f64>,
    pub spatial_mean: Vec<f64>,
    pub spatial_var: Vec<f64>,
}

pub(crate) fn kernel_matrix(data: &FieldData, range: f64, sf: f64) -> Mat<f64> {
    let n = data.y.len();
    Mat::from_fn(n, n, |i, j| {
        let (a, b) = (data.xy[i], data.xy[j]);
        data.kernel.cov(
            ((a.0 - b.0).powi(2) + (a.1 - b.1).powi(2)).sqrt(),
            range,
            sf,
        )
    })
}

/// REML log marginal likelihood and the conditional posterior at (range, sf, sn).
/// `full` also computes the spatial effect and its variance. None if not positive definite.
pub fn evaluate(data: &FieldData, range: f64, sf: f64, sn: f64, full: bool) -> Option<Evaluation> {
    let n = data.y.len();
    let p = data.p;
    let k = kernel_matrix(data, range, sf);
    let mut ky = k.clone();
    for i in 0..n {
        ky[(i, i)] += sn * sn;
    }
    let llt = ky.llt(Side::Lower).ok()?;
    let l = llt.L();
    let logdet_ky: f64 = (0..n).map(|i| 2.0 * l[(i, i)].ln()).sum();
    let x = Mat::from_fn(n, p, |i, j| data.x[i][j]);
    let y = Mat::from_fn(n, 1, |i, _| data.y[i]);
    let kinv_x = llt.solve(&x);
    let kinv_y = llt.solve(&y);
    let a = x.transpose() * &kinv_x; // X' Ky^-1 X
    let a_llt = a.llt(Side::Lower).ok()?;
    let al = a_llt.L();
    let logdet_a: f64 = (0..p).map(|i| 2.0 * al[(i, i)].ln()).sum();
    let xty = x.transpose() * &kinv_y;
    let b = a_llt.solve(&xty);
    let r = Mat::from_fn(n, 1, |i, _| {
        data.y[i] - (0..p).map(|j| data.x[i][j] * b[(j, 0)]).sum::<f64>()
    });
    let kinv_r = llt.solve(&r);
    let quad: f64 = (0..n).map(|i| r[(i, 0)] * kinv_r[(i, 0)]).sum();
    let reml =
        -0.5 * ((n - p) as f64 * (2.0 * std::f64::consts::PI).ln() + logdet_ky + logdet_a + quad);
    let eye = Mat::<f64>::identity(p, p);
    let cov_b = a_llt.solve(&eye);
    let (spatial_mean, spatial_var) = if full {
        let m = &k * &kinv_r;
        let kinv_k = llt.solve(&k);
        let rr = x.transpose() * &kinv_k; // p x n
        let cov_rr = &cov_b * &rr;
        let var: Vec<f64> = (0..n)
            .map(|i| {
                let kk: f64 = (0..n).map(|j| k[(i, j)] * kinv_k[(j, i)]).sum();
                let extra: f64 = (0..p).map(|a| rr[(a, i)] * cov_rr[(a, i)]).sum();
                (k[(i, i)] - kk + extra).max(0.0)
            })
            .collect();
        ((0..n).map(|i| m[(i, 0)]).collect(), var)
    } else {
        (Vec::new(), Vec::new())
    };
    Some(Evaluation {
        reml,
        b: (0..p).map(|j| b[(j, 0)]).collect(),
        cov_b,
        spatial_mean,
        spatial_var,
    })
}

/// Log marginal likelihood with a Gaussian prior on the mean parameters, b ~ N(m, diag(v)):
/// log N(y; X m, K + s_n^2 I + X diag(v) X') (R&W 2006, section 2.7, eq. 2.43 with the prior
/// mean added). Checked against scipy.stats.multivariate_normal.logpdf. None if the
/// covariance is not positive definite.
pub fn log_marginal_gaussian_prior(
    data: &FieldData,
    range: f64,
    sf: f64,
    sn: f64,
    prior_mean: &[f64],
    prior_var: &[f64],
) -> Option<f64> {
    let n = data.y.len();
    let k = kernel_matrix(data, range, sf);
    let c = Mat::from_fn(n, n, |i, j| {
        let xsx: f64 = (0..data.p)
            .map(|a| data.x[i][a] * prior_var[a] * data.x[j][a])
            .sum();
        k[(i, j)] + xsx + if i == j { sn * sn } else { 0.0 }
    });
    let llt = c.llt(Side::Lower).ok()?;
    let l = llt.L();
    let logdet: f64 = (0..n).map(|i| 2.0 * l[(i, i)].ln()).sum();
    let r = Mat::from_fn(n, 1, |i, _| {
        data.y[i]
            - (0..data.p)
                .map(|a| data.x[i][a] * prior_mean[a])
                .sum::<f64>()
    });
    let cr = llt.solve(&r);
    let quad: f64 = (0..n).map(|i| r[(i, 0)] * cr[(i, 0)]).sum();
    Some(-0.5 * (quad + logdet + n as f64 * (2.0 * std::f64::consts::PI).ln()))
}

/// Predictive mean and SD of the latent GP f at new points, given values `y` at `xy` with
/// noise variance `sn^2` and zero prior mean (R&W 2006, Algorithm 2.1, eq. 2.25-2.26).
/// Checked against scikit-learn's GaussianProcessRegressor with optimizer=None.
pub fn predict_latent(
    xy: &[(f64, f64)],
    y: &[f64],
    range: f64,
    sf: f64,
    sn: f64,
    new: &[(f64, f64)],
) -> Option<(Vec<f64>, Vec<f64>)> {
    let n = y.len();
    let d = |a: (f64, f64), b: (f64, f64)| ((a.0 - b.0).powi(2) + (a.1 - b.1).powi(2)).sqrt();
    let ky = Mat::from_fn(n, n, |i, j| {
        matern52(d(xy[i], xy[j]), range, sf) + if i == j { sn * sn } else { 0.0 }
    });
    let llt = ky.llt(Side::Lower).ok()?;
    let alpha = llt.solve(&Mat::from_fn(n, 1, |i, _| y[i]));
    let ks = Mat::from_fn(n, new.len(), |i, j| matern52(d(xy[i], new[j]), range, sf));
    let v = llt.solve(&ks);
    let mean = (0..new.len())
        .map(|j| (0..n).map(|i| ks[(i, j)] * alpha[(i, 0)]).sum())
        .collect();
    let sd = (0..new.len())
        .map(|j| {
            (sf * sf - (0..n).map(|i| ks[(i, j)] * v[(i, j)]).sum::<f64>())
                .max(0.0)
                .sqrt()
        })
        .collect();
    Some((mean, sd))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn gp_likelihood_and_predictions_match_scipy_and_scikit_learn() {
        // Fixture made by tests/fixtures/make_fixtures.py (scipy, scikit-learn and numpy versions
        // in "made_by"), at fixed hyperparameters.
        let fx: serde_json::Value = serde_json::from_str(include_str!(
            "../../../tests/fixtures/gp_scipy_sklearn.json"
        ))
        .unwrap();
        assert!(fx["made_by"].as_str().unwrap().contains("scikit-learn"));
        let v = |k: &str| -> Vec<f64> {
            fx[k]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap())
                .collect()
        };
        let pairs = |k: &str| -> Vec<(f64, f64)> {
            fx[k]
                .as_array()
                .unwrap()
                .iter()
                .map(|p| (p[0].as_f64().unwrap(), p[1].as_f64().unwrap()))
                .collect()
        };
        let x: Vec<Vec<f64>> = fx["X"]
            .as_array()
            .unwrap()
            .iter()
            .map(|r| {
                r.as_array()
                    .unwrap()
                    .iter()
                    .map(|x| x.as_f64().unwrap())
                    .collect()
            })
            .collect();
        let (l, sf, sn) = (
            fx["length_scale"].as_f64().unwrap(),
            fx["spatial_sd"].as_f64().unwrap(),
            fx["noise_sd"].as_f64().unwrap(),
        );
        let data = FieldData {
            kernel: Kernel::Matern52,
            y: v("y"),
            xy: pairs("xy"),
            x,
            p: 3,
        };
        let ours = log_marginal_gaussian_prior(&data, l, sf, sn, &v("prior_mean"), &v("prior_var"))
            .unwrap();
        let theirs = fx["logpdf"].as_f64().unwrap();
        assert!(
            ((ours - theirs) / theirs).abs() < 1e-8,
            "log marginal likelihood {ours} vs scipy {theirs}"
        );
        let (mean, sd) =
            predict_latent(&pairs("xy"), &v("residual"), l, sf, sn, &pairs("new")).unwrap();
        for (k, (m, s)) in mean.iter().zip(&sd).enumerate() {
            let (tm, ts) = (v("pred_mean")[k], v("pred_sd")[k]);
            assert!(
                (m - tm).abs() < 1e-8 && (s - ts).abs() < 1e-8,
                "prediction {k}: ({m}, {s}) vs scikit-learn ({tm}, {ts})"
            );
        }
    }
}
