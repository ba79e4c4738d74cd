//! Adjust: Bayesian Gaussian-process spatial adjustment of plot yields, treatment contrasts
//! pooled over fields, and decision probabilities.
//!
//! Model, per field f (Rasmussen & Williams 2006, "Gaussian Processes for Machine Learning",
//! section 2.7, explicit basis functions):
//!
//!   y_f = X_f b_f + g_f + e_f,  g_f ~ GP(0, s_f^2 k_l),  e_f ~ N(0, s_n^2 I),
//!
//! with y the plot mean yields, X an intercept (the check), one column per product (its
//! contrast with the check) and sum-to-zero block columns when `adjust.blocks`, and k a Matern
//! 1/2, 3/2, 5/2 or squared-exponential kernel on plot distances in metres, optionally with
//! separate length scales along and across the plot grid. Field means and blocks have flat
//! priors; the product effects are Gaussian (a weak default prior, or an informative one per
//! product from the config), so given the hyperparameters their posterior and the marginal
//! likelihood are exact. Fields share the product effects and may differ by a treatment x
//! field interaction with its own SD; they are joined through the treatment-level equations
//! only (see `joint`).
//!
//! The hyperparameters (length scale(s), spatial SD, noise SD per field; interaction SD) have
//! penalised-complexity priors (Fuglstad et al. 2019) and are integrated numerically (see
//! `field`): each field on a lattice in log space, and the fields together by importance
//! sampling from their own lattices (seeded, so reruns give the same bytes). Every estimate,
//! SD, interval and probability is a mixture over hyperparameters, not a plug-in.
//!
//! Fields of up to `adjust.exact_max_plots` plots use the exact kernel; larger ones the
//! reduced-rank Hilbert-space form (see `spectral`).
//!
//! Beside it the same mean model is fitted without the spatial field (the usual RCBD analysis
//! when `adjust.blocks`), with both REML log marginal likelihoods at the posterior mode, the
//! efficiency (ratio of contrast variances), products whose ranking changes, and the residual
//! Moran's I of both. With a grain price and product costs, each product also gets its
//! break-even uplift (cost / price), P(uplift > break-even) and expected net return.
//!
//! Per-plot spatial effects are mixtures over the same posterior; in a joint fit each field's
//! hyperparameter points carry their joint weights and the joint moments of its mean
//! parameters (see `joint_plots`). The comparison with the no-spatial-field model and its
//! Moran's I use each field's own fit at its mode.
//!
//! Errors: [`AdjustError`] when no field can be fitted; a field that cannot be fitted (one
//! treatment, no kept check plot, fewer plots than parameters + 2, all yields equal) is
//! skipped with a warning that names it.

pub mod field;
pub mod joint;
pub mod linalg;
pub mod oracle;
pub mod settings;
pub mod spectral;

pub use settings::{AdjustSettings, FitSettings, Pooling};

use crate::plots::PlotStats;
use crate::util::{sd, Rng};
use faer::linalg::solvers::Solve;
use faer::{Mat, Side};
use field::{log_sum_exp, range_lattice, FieldModel, Node, PC_ALPHA_LN};
use joint::{combine, Component, EffectPrior, FieldMap, Mixture};
use rayon::prelude::*;
use spectral::{Design, Method};
use std::collections::{BTreeMap, BTreeSet};

/// No field could be fitted.
#[derive(Debug, thiserror::Error)]
pub enum AdjustError {
    #[error("no field could be adjusted:\n  {}", .0.join("\n  "))]
    NothingToFit(Vec<String>),
}

/// The spatial model against the same model without the spatial field (the usual RCBD
/// analysis when blocks are in the mean model), per field.
#[derive(Clone, Debug, PartialEq)]
pub struct Comparison {
    pub field: String,
    pub log_ml_spatial: f64,
    pub log_ml_rcbd: f64,
    /// Mean over products of var(uplift, RCBD) / var(uplift, spatial): above 1 means the
    /// spatial model estimates the contrasts more precisely.
    pub efficiency: f64,
    /// Residual Moran's I without and with the spatial field (Moran 1950, Biometrika 37:17).
    pub moran_rcbd: f64,
    pub moran_spatial: f64,
    /// Products whose rank by uplift differs between the two models.
    pub rank_changes: Vec<String>,
}

/// Moran's I of values at points, with binary weights for pairs closer than `cutoff`
/// (Moran 1950): I = n / W x sum_ij w_ij z_i z_j / sum_i z_i^2, z centred.
pub fn morans_i(xy: &[(f64, f64)], v: &[f64], cutoff: f64) -> f64 {
    let n = v.len();
    let m = v.iter().sum::<f64>() / n as f64;
    let z: Vec<f64> = v.iter().map(|x| x - m).collect();
    let (mut num, mut w) = (0.0, 0.0);
    for i in 0..n {
        for j in 0..n {
            if i != j {
                let d = ((xy[i].0 - xy[j].0).powi(2) + (xy[i].1 - xy[j].1).powi(2)).sqrt();
                if d <= cutoff {
                    num += z[i] * z[j];
                    w += 1.0;
                }
            }
        }
    }
    let den: f64 = z.iter().map(|x| x * x).sum();
    if w == 0.0 || den == 0.0 {
        return f64::NAN;
    }
    n as f64 / w * num / den
}

/// A plot after adjustment.
#[derive(Clone, Debug, PartialEq)]
pub struct AdjustedPlot {
    pub plot_id: String,
    pub field: String,
    pub treatment: String,
    pub block: String,
    pub raw: f64,
    pub spatial_mean: f64,
    pub spatial_sd: f64,
    pub adjusted: f64,
    pub adjusted_sd: f64,
}

/// A treatment in a field (or pooled over fields: field = "all").
#[derive(Clone, Debug, PartialEq)]
pub struct TreatmentRow {
    pub field: String,
    pub treatment: String,
    pub plots: u64,
    /// Treatment mean yield (per field; NaN in pooled rows, where fields differ in level).
    pub estimate: f64,
    pub sd: f64,
    pub lo95: f64,
    pub hi95: f64,
    /// Uplift over the check; NaN for the check itself.
    pub uplift: f64,
    pub uplift_sd: f64,
    pub uplift_lo90: f64,
    pub uplift_hi90: f64,
    pub uplift_lo95: f64,
    pub uplift_hi95: f64,
    pub p_uplift_gt0: f64,
    /// Uplift that pays for the product (cost / price), in the output unit; NaN without
    /// economics.
    pub break_even: f64,
    pub p_uplift_gt_break_even: f64,
    /// Expected uplift x price - cost, per hectare.
    pub expected_net_return_per_ha: f64,
    /// The prior on the product's effect (mean, SD), shown beside the posterior.
    pub prior_mean: f64,
    pub prior_sd: f64,
}

/// Posterior mean and 95 % interval of one hyperparameter (NaN where it does not apply).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Summary {
    pub mean: f64,
    pub lo95: f64,
    pub hi95: f64,
}

impl Summary {
    pub const NONE: Summary = Summary {
        mean: f64::NAN,
        lo95: f64::NAN,
        hi95: f64::NAN,
    };
    /// From weighted values (weights need not sum to one).
    pub fn from_weighted(mut v: Vec<(f64, f64)>) -> Summary {
        let total: f64 = v.iter().map(|x| x.1).sum();
        if v.is_empty() || !(total > 0.0) {
            return Summary::NONE;
        }
        let mean = v.iter().map(|x| x.0 * x.1).sum::<f64>() / total;
        v.sort_by(|a, b| a.0.total_cmp(&b.0));
        let q = |q: f64| {
            let mut acc = 0.0;
            for (x, w) in &v {
                acc += w / total;
                if acc >= q {
                    return *x;
                }
            }
            v.last().map(|x| x.0).unwrap_or(f64::NAN)
        };
        Summary {
            mean,
            lo95: q(0.025),
            hi95: q(0.975),
        }
    }
}

/// Hyperparameters of one field (or, in the row for field "all" of a joint fit, the
/// interaction SD and the shared range).
#[derive(Clone, Debug, PartialEq)]
pub struct FieldHyper {
    pub field: String,
    pub plots: u64,
    /// Range (along the grid with anisotropy), metres: posterior mean and 95 % interval.
    pub range_m: f64,
    pub range_lo95_m: f64,
    pub range_hi95_m: f64,
    /// Range across the grid (anisotropic fits only).
    pub range_across: Summary,
    pub spatial_sd: f64,
    pub spatial_sd_ci: Summary,
    pub noise_sd: f64,
    pub noise_sd_ci: Summary,
    pub spatial_share: f64,
    pub spatial_share_ci: Summary,
    pub interaction_sd: Summary,
    /// REML log marginal likelihood at the posterior mode.
    pub log_marginal_likelihood: f64,
    /// "exact", or "hsgp m0xm1" with the basis functions per axis at the mode.
    pub method: String,
    /// Empty, or a warning such as the range sitting at a bound.
    pub warning: String,
}

/// What adjust hands on.
#[derive(Clone, Debug)]
pub struct AdjustOutput {
    pub comparisons: Vec<Comparison>,
    pub plots: Vec<AdjustedPlot>,
    pub treatments: Vec<TreatmentRow>,
    pub hyper: Vec<FieldHyper>,
    pub warnings: Vec<String>,
    /// Effective sample size of the joint importance draws (NaN without a joint fit).
    pub joint_ess: f64,
}

/// Matern 5/2 covariance at distance `d` (R&W 2006 eq. 4.17).
pub fn matern52(d: f64, range: f64, sd: f64) -> f64 {
    let r = 5f64.sqrt() * d / range;
    sd * sd * (1.0 + r + r * r / 3.0) * (-r).exp()
}

crate::choice! {
    /// Spatial covariance functions (R&W 2006 eq. 4.9 and 4.16-4.17), as named in
    /// `adjust.kernel`.
    pub enum Kernel {
        /// Matern 1/2 (exponential): s^2 exp(-d/l).
        Matern12 = "matern12",
        /// Matern 3/2: s^2 (1 + sqrt3 d/l) exp(-sqrt3 d/l).
        Matern32 = "matern32",
        /// Matern 5/2: s^2 (1 + sqrt5 d/l + 5 d^2/(3 l^2)) exp(-sqrt5 d/l).
        Matern52 = "matern52",
        /// Squared exponential: s^2 exp(-d^2 / (2 l^2)).
        SquaredExponential = "squared_exponential",
    }
}

impl Kernel {
    /// Covariance at distance `d`.
    pub fn cov(self, d: f64, range: f64, sd: f64) -> f64 {
        match self {
            Kernel::Matern12 => sd * sd * (-d / range).exp(),
            Kernel::Matern32 => {
                let r = 3f64.sqrt() * d / range;
                sd * sd * (1.0 + r) * (-r).exp()
            }
            Kernel::Matern52 => matern52(d, range, sd),
            Kernel::SquaredExponential => sd * sd * (-0.5 * (d / range).powi(2)).exp(),
        }
    }
}

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

fn kernel_matrix(data: &FieldData, range: f64, sf: f64) -> Mat<f64> {
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

/// Nelder-Mead minimisation (Nelder & Mead 1965) with standard coefficients.
pub fn nelder_mead(
    f: &dyn Fn(&[f64]) -> f64,
    start: &[f64],
    step: f64,
    iters: usize,
) -> (Vec<f64>, f64) {
    let d = start.len();
    let mut simplex: Vec<Vec<f64>> = vec![start.to_vec()];
    for i in 0..d {
        let mut v = start.to_vec();
        v[i] += step;
        simplex.push(v);
    }
    let mut vals: Vec<f64> = simplex.iter().map(|v| f(v)).collect();
    for _ in 0..iters {
        let mut order: Vec<usize> = (0..=d).collect();
        order.sort_by(|&a, &b| vals[a].total_cmp(&vals[b]));
        simplex = order.iter().map(|&i| simplex[i].clone()).collect();
        vals = order.iter().map(|&i| vals[i]).collect();
        if (vals[d] - vals[0]).abs() < 1e-9 {
            break;
        }
        let centroid: Vec<f64> = (0..d)
            .map(|k| simplex[..d].iter().map(|v| v[k]).sum::<f64>() / d as f64)
            .collect();
        let along = |t: f64| -> Vec<f64> {
            (0..d)
                .map(|k| centroid[k] + t * (simplex[d][k] - centroid[k]))
                .collect()
        };
        let xr = along(-1.0);
        let fr = f(&xr);
        if fr < vals[0] {
            let xe = along(-2.0);
            let fe = f(&xe);
            if fe < fr {
                simplex[d] = xe;
                vals[d] = fe;
            } else {
                simplex[d] = xr;
                vals[d] = fr;
            }
        } else if fr < vals[d - 1] {
            simplex[d] = xr;
            vals[d] = fr;
        } else {
            let xc = if fr < vals[d] {
                along(-0.5)
            } else {
                along(0.5)
            };
            let fc = f(&xc);
            if fc < vals[d].min(fr) {
                simplex[d] = xc;
                vals[d] = fc;
            } else {
                for i in 1..=d {
                    for k in 0..d {
                        simplex[i][k] = simplex[0][k] + 0.5 * (simplex[i][k] - simplex[0][k]);
                    }
                    vals[i] = f(&simplex[i]);
                }
            }
        }
    }
    let best = (0..=d)
        .min_by(|&a, &b| vals[a].total_cmp(&vals[b]))
        .unwrap_or(0);
    (simplex[best].clone(), vals[best])
}

/// Break-even uplift (cost / price, in the output unit) and expected net return per hectare
/// for one product; NaN without economics.
fn economics(s: &FitSettings, treatment: &str, uplift: f64) -> (f64, f64) {
    let cost = s.product_cost_per_ha.get(treatment).copied().unwrap_or(0.0);
    if !(s.grain_price_per_t > 0.0) || uplift.is_nan() {
        return (f64::NAN, f64::NAN);
    }
    let be = cost / s.grain_price_per_t * s.t_ha_to_unit;
    (be, uplift / s.t_ha_to_unit * s.grain_price_per_t - cost)
}

/// A treatment row from the posterior of its mean yield and (for products) its uplift.
#[allow(clippy::too_many_arguments)]
fn treatment_row(
    s: &FitSettings,
    field: &str,
    treatment: &str,
    plots: u64,
    est: Option<&Mixture>,
    up: Option<&Mixture>,
    prior: Option<(f64, f64)>,
) -> TreatmentRow {
    let nan = f64::NAN;
    let mut r = TreatmentRow {
        field: field.into(),
        treatment: treatment.into(),
        plots,
        estimate: nan,
        sd: nan,
        lo95: nan,
        hi95: nan,
        uplift: nan,
        uplift_sd: nan,
        uplift_lo90: nan,
        uplift_hi90: nan,
        uplift_lo95: nan,
        uplift_hi95: nan,
        p_uplift_gt0: nan,
        break_even: nan,
        p_uplift_gt_break_even: nan,
        expected_net_return_per_ha: nan,
        prior_mean: prior.map_or(nan, |p| p.0),
        prior_sd: prior.map_or(nan, |p| p.1),
    };
    if let Some(e) = est {
        r.estimate = e.mean();
        r.sd = e.var().sqrt();
        r.lo95 = e.quantile(0.025);
        r.hi95 = e.quantile(0.975);
    }
    if let Some(u) = up {
        r.uplift = u.mean();
        r.uplift_sd = u.var().sqrt();
        r.uplift_lo90 = u.quantile(0.05);
        r.uplift_hi90 = u.quantile(0.95);
        r.uplift_lo95 = u.quantile(0.025);
        r.uplift_hi95 = u.quantile(0.975);
        r.p_uplift_gt0 = 1.0 - u.cdf(0.0);
        let (be, ret) = economics(s, treatment, r.uplift);
        r.break_even = be;
        r.expected_net_return_per_ha = ret;
        if be.is_finite() {
            r.p_uplift_gt_break_even = 1.0 - u.cdf(be);
        }
    }
    r
}

/// A field ready to fit, with its plots.
pub struct Prepared<'a> {
    pub model: FieldModel,
    pub plots: Vec<&'a PlotStats>,
    pub counts: Vec<u64>,
}

/// Builds a field's design and priors, or says why it cannot be fitted.
pub fn prepare<'a>(
    field: &str,
    plots: Vec<&'a PlotStats>,
    s: &FitSettings,
) -> Result<Prepared<'a>, String> {
    let treatments: Vec<String> = {
        let set: BTreeSet<&str> = plots.iter().map(|p| p.treatment.as_str()).collect();
        let mut v: Vec<String> = set.into_iter().map(String::from).collect();
        v.sort_by_key(|t| (t != &s.check, t.clone()));
        v
    };
    if !treatments.contains(&s.check) {
        return Err(format!(
            "field {field}: no kept plot of the check {:?}; contrasts cannot be formed",
            s.check
        ));
    }
    if treatments.len() < 2 {
        return Err(format!(
            "field {field}: only one treatment ({}); nothing to compare",
            treatments[0]
        ));
    }
    let blocks: Vec<String> = if s.blocks {
        plots
            .iter()
            .map(|p| p.block.clone())
            .collect::<BTreeSet<_>>()
            .into_iter()
            .collect()
    } else {
        Vec::new()
    };
    let nt = treatments.len();
    let p = nt + blocks.len().saturating_sub(1);
    let n = plots.len();
    if n < p + 2 {
        return Err(format!(
            "field {field}: {n} kept plots for {p} mean parameters; at least {} needed",
            p + 2
        ));
    }
    let y: Vec<f64> = plots.iter().map(|p| p.yield_mean).collect();
    let sy = sd(&y);
    if !(sy > 0.0) {
        return Err(format!(
            "field {field}: all plot yields are equal; no variation to model"
        ));
    }
    // Columns: intercept (the check), one contrast per product, sum-to-zero blocks.
    let mut x = vec![0.0; n * p];
    for (i, pl) in plots.iter().enumerate() {
        let row = &mut x[i * p..(i + 1) * p];
        row[0] = 1.0;
        let t = treatments
            .iter()
            .position(|t| *t == pl.treatment)
            .unwrap_or(0);
        if t > 0 {
            row[t] = 1.0;
        }
        if blocks.len() > 1 {
            let b = blocks.iter().position(|b| *b == pl.block).unwrap_or(0);
            for j in 1..blocks.len() {
                row[nt + j - 1] = if b == j {
                    1.0
                } else if b == 0 {
                    -1.0
                } else {
                    0.0
                };
            }
        }
    }
    // Kernel axes: the plot grid's own (along, across) when they matter and are known
    // (anisotropy; the reduced-rank basis's box), else projected x/y (distances are equal).
    let grid = (s.anisotropic || n > s.exact_max_plots)
        && plots
            .iter()
            .all(|p| p.along_m.is_finite() && p.across_m.is_finite());
    let coords: Vec<(f64, f64)> = plots
        .iter()
        .map(|p| {
            if grid {
                (p.along_m, p.across_m)
            } else {
                (p.centroid_x_m, p.centroid_y_m)
            }
        })
        .collect();
    let mut dmin = f64::INFINITY;
    let mut dmax: f64 = 0.0;
    let mut amin = [f64::INFINITY; 2];
    for i in 0..n {
        for j in i + 1..n {
            let (a, b) = (coords[i], coords[j]);
            let d = ((a.0 - b.0).powi(2) + (a.1 - b.1).powi(2)).sqrt();
            if d > 0.0 {
                dmin = dmin.min(d);
            }
            dmax = dmax.max(d);
        }
    }
    for i in 0..n {
        for j in i + 1..n {
            for (k, dk) in [
                (coords[i].0 - coords[j].0).abs(),
                (coords[i].1 - coords[j].1).abs(),
            ]
            .into_iter()
            .enumerate()
            {
                if dk > 0.25 * dmin {
                    amin[k] = amin[k].min(dk);
                }
            }
        }
    }
    if !dmin.is_finite() {
        return Err(format!("field {field}: all plots share one position"));
    }
    let lo = |r0: f64| {
        if s.min_range_m > 0.0 {
            s.min_range_m
        } else {
            0.5 * r0
        }
    };
    let hi = if s.max_range_m > 0.0 {
        s.max_range_m
    } else {
        10.0 * dmax
    };
    let rho0 = if s.anisotropic {
        (
            if amin[0].is_finite() { amin[0] } else { dmin },
            if amin[1].is_finite() { amin[1] } else { dmin },
        )
    } else {
        (dmin, dmin)
    };
    let bounds = [
        (lo(rho0.0).ln(), hi.ln().max(lo(rho0.0).ln() + 0.1)),
        (lo(rho0.1).ln(), hi.ln().max(lo(rho0.1).ln() + 0.1)),
    ];
    let method = if n <= s.exact_max_plots {
        Method::Exact
    } else {
        Method::Hsgp {
            max_basis: s.hsgp_max_basis,
            min_boundary: s.hsgp_boundary,
        }
    };
    let counts = treatments
        .iter()
        .map(|t| plots.iter().filter(|p| &p.treatment == t).count() as u64)
        .collect();
    Ok(Prepared {
        model: FieldModel {
            name: field.into(),
            design: Design {
                y,
                x,
                p,
                coords,
                kernel: s.kernel,
            },
            treatments,
            sy,
            dmin,
            anisotropic: s.anisotropic,
            bounds,
            rho0,
            method,
            nodes: BTreeMap::new(),
        },
        plots,
        counts,
    })
}

/// The length-scale nodes a field's integration uses.
#[derive(Clone, Debug)]
pub struct Lattice {
    pub keys: Vec<(i64, i64)>,
    /// Bounds the lattice indices are counted from, the fine spacing and the PC prior's rho0.
    pub bounds: [(f64, f64); 2],
    pub h: [f64; 2],
    pub rho0: (f64, f64),
    pub at_bound: [bool; 2],
    /// log cell volume of a node.
    pub lvol: f64,
}

impl Lattice {
    fn l(&self, key: (i64, i64), anisotropic: bool) -> (f64, f64) {
        let l0 = (self.bounds[0].0 + key.0 as f64 * self.h[0]).exp();
        if anisotropic {
            (l0, (self.bounds[1].0 + key.1 as f64 * self.h[1]).exp())
        } else {
            (l0, l0)
        }
    }
}

/// Evaluates the nodes `keys` of `m` (sequentially, each warm-started from the last).
fn eval_nodes(m: &mut FieldModel, keys: &[(i64, i64)], bounds: [(f64, f64); 2], h: [f64; 2]) {
    let mut warm = m.nodes.values().last().and_then(FieldModel::node_mode);
    for &k in keys {
        if m.nodes.contains_key(&k) {
            continue;
        }
        let lat = Lattice {
            keys: Vec::new(),
            bounds,
            h,
            rho0: m.rho0,
            at_bound: [false; 2],
            lvol: 0.0,
        };
        let node = m.node(lat.l(k, m.anisotropic), warm);
        warm = FieldModel::node_mode(&node).or(warm);
        m.nodes.insert(k, node);
    }
}

/// The fine spacing of the lattice for `bounds` (see `field::range_lattice`).
fn lattice_h(dims: usize, bounds: [(f64, f64); 2], coarse: usize) -> [f64; 2] {
    let refine = if dims == 1 { 3.0 } else { 2.0 };
    let nc = coarse.max(3) as f64;
    [
        (bounds[0].1 - bounds[0].0) / ((nc - 1.0) * refine),
        (bounds[1].1 - bounds[1].0) / ((nc - 1.0) * refine),
    ]
}

/// Scans one field's length scales on its own lattice.
fn scan_own(m: &mut FieldModel, s: &FitSettings) -> Lattice {
    let dims = if m.anisotropic { 2 } else { 1 };
    let bounds = m.bounds;
    let h = lattice_h(dims, bounds, s.range_grid_points);
    let rho0 = m.rho0;
    let mut masses = |keys: &[(i64, i64)]| -> Vec<f64> {
        eval_nodes(m, keys, bounds, h);
        keys.iter()
            .map(|k| {
                let node = &m.nodes[k];
                node.lz + m.log_prior_range(node.l, rho0)
            })
            .collect()
    };
    lattice(dims, bounds, rho0, s.range_grid_points, &mut masses)
}

/// Scans all fields on one shared lattice of length scales.
fn scan_shared(models: &mut [FieldModel], s: &FitSettings) -> Lattice {
    let aniso = models[0].anisotropic;
    let dims = if aniso { 2 } else { 1 };
    let bounds = [0, 1].map(|d| {
        (
            models
                .iter()
                .map(|m| m.bounds[d].0)
                .fold(f64::INFINITY, f64::min),
            models
                .iter()
                .map(|m| m.bounds[d].1)
                .fold(f64::NEG_INFINITY, f64::max),
        )
    });
    let rho0 = (
        models
            .iter()
            .map(|m| m.rho0.0)
            .fold(f64::INFINITY, f64::min),
        models
            .iter()
            .map(|m| m.rho0.1)
            .fold(f64::INFINITY, f64::min),
    );
    let h = lattice_h(dims, bounds, s.range_grid_points);
    let mut masses = |keys: &[(i64, i64)]| -> Vec<f64> {
        models
            .par_iter_mut()
            .for_each(|m| eval_nodes(m, keys, bounds, h));
        keys.iter()
            .map(|k| {
                let l = models[0].nodes[k].l;
                models.iter().map(|m| m.nodes[k].lz).sum::<f64>()
                    + models[0].log_prior_range(l, rho0)
            })
            .collect()
    };
    lattice(dims, bounds, rho0, s.range_grid_points, &mut masses)
}

/// The refined length-scale lattice (`field::range_lattice`) as a [`Lattice`].
fn lattice(
    dims: usize,
    bounds: [(f64, f64); 2],
    rho0: (f64, f64),
    coarse: usize,
    masses: &mut dyn FnMut(&[(i64, i64)]) -> Vec<f64>,
) -> Lattice {
    let (keys, h, at_bound) = range_lattice(dims, bounds, coarse, masses);
    Lattice {
        keys,
        bounds,
        h,
        rho0,
        at_bound,
        lvol: h[0].ln() + if dims == 2 { h[1].ln() } else { 0.0 },
    }
}

/// The prior on product effects in the global product order, and each field's map into it.
fn effect_priors(preps: &[Prepared], s: &FitSettings) -> (Vec<String>, EffectPrior, Vec<FieldMap>) {
    let products: Vec<String> = preps
        .iter()
        .flat_map(|p| p.model.treatments[1..].iter().cloned())
        .collect::<BTreeSet<_>>()
        .into_iter()
        .collect();
    let mean_sy = preps.iter().map(|p| p.model.sy).sum::<f64>() / preps.len().max(1) as f64;
    let weak = if s.weak_prior_sd > 0.0 {
        s.weak_prior_sd
    } else {
        10.0 * mean_sy
    };
    let (mean, var) = products
        .iter()
        .map(|t| match s.product_prior.get(t) {
            Some(&(m, sd)) => (m, sd * sd),
            None => (0.0, weak * weak),
        })
        .unzip();
    let maps = preps
        .iter()
        .map(|p| FieldMap {
            index: p.model.treatments[1..]
                .iter()
                .map(|t| products.iter().position(|x| x == t).unwrap_or(0))
                .collect(),
        })
        .collect();
    (products, EffectPrior { mean, var }, maps)
}

/// A field's prior and map restricted to its own products (for its single-field fit).
fn local_prior(global: &EffectPrior, map: &FieldMap) -> (EffectPrior, FieldMap) {
    (
        EffectPrior {
            mean: map.index.iter().map(|&k| global.mean[k]).collect(),
            var: map.index.iter().map(|&k| global.var[k]).collect(),
        },
        FieldMap {
            index: (0..map.index.len()).collect(),
        },
    )
}

/// A weighted point of one field's posterior: (log weight, node key, point index).
type Weighted = (f64, (i64, i64), usize);

/// Normalised weights from log weights, keeping those above 1e-10 of the largest, at most
/// `cap` (the largest).
fn top_weights(mut v: Vec<Weighted>, cap: usize) -> Vec<Weighted> {
    v.sort_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(&b.1)).then(a.2.cmp(&b.2)));
    let top = v.first().map_or(0.0, |x| x.0);
    v.retain(|x| x.0 > top - 23.0);
    v.truncate(cap);
    let z = log_sum_exp(v.iter().map(|x| x.0));
    v.into_iter()
        .map(|(w, k, i)| ((w - z).exp(), k, i))
        .collect()
}

/// Fit result of one field on its own.
struct FieldFit {
    plots: Vec<AdjustedPlot>,
    rows: Vec<TreatmentRow>,
    comparison: Comparison,
    hyper: FieldHyper,
    /// (treatment, uplift mean, variance) for inverse-variance pooling.
    uplifts: Vec<(String, f64, f64)>,
}

/// Summaries of a field's hyperparameters from weighted points.
fn hyper_summaries(
    m: &FieldModel,
    pts: &[(f64, [f64; 4])],
) -> (Summary, Summary, Summary, Summary, Summary) {
    let v = |f: &dyn Fn(&[f64; 4]) -> f64| -> Summary {
        Summary::from_weighted(pts.iter().map(|(w, t)| (f(t), *w)).collect())
    };
    let range = v(&|t| t[0].exp());
    let across = if m.anisotropic {
        v(&|t| t[1].exp())
    } else {
        Summary::NONE
    };
    let sf = v(&|t| t[2].exp());
    let sn = v(&|t| t[3].exp());
    let share = v(&|t| {
        let (f, e) = (t[2].exp().powi(2), t[3].exp().powi(2));
        f / (f + e)
    });
    (range, across, sf, sn, share)
}

/// One field alone: its posterior over its lattice, spatial effects, treatment rows,
/// hyperparameters and the comparison with the no-spatial-field model.
fn fit_own(
    prep: &Prepared,
    lat: &Lattice,
    global: &EffectPrior,
    map: &FieldMap,
    s: &FitSettings,
) -> Result<FieldFit, String> {
    let m = &prep.model;
    let field = m.name.as_str();
    let (prior, lmap) = local_prior(global, map);
    let mut all: Vec<Weighted> = Vec::new();
    for &k in &lat.keys {
        let node = &m.nodes[&k];
        let lpr = m.log_prior_range(node.l, lat.rho0) + lat.lvol;
        for (i, pt) in node.points.iter().enumerate() {
            if let Some(c) = combine(&[&pt.fit], std::slice::from_ref(&lmap), &prior, 0.0, false) {
                all.push((lpr + pt.lw + c.log_c, k, i));
            }
        }
    }
    if all.is_empty() {
        return Err(format!(
            "field {field}: the hyperparameter posterior could not be evaluated"
        ));
    }
    let comps_w = top_weights(all, 3000);
    let point = |k: &(i64, i64), i: usize| &m.nodes[k].points[i];
    let comps: Vec<(f64, Component)> = comps_w
        .par_iter()
        .filter_map(|(w, k, i)| {
            combine(
                &[&point(k, *i).fit],
                std::slice::from_ref(&lmap),
                &prior,
                0.0,
                true,
            )
            .map(|c| (*w, c))
        })
        .collect();
    let nt = m.treatments.len();
    let mut rows = Vec::new();
    let mut uplifts = Vec::new();
    for t in 0..nt {
        let est = Mixture::new(
            comps
                .iter()
                .map(|(w, c)| (*w, c.est[0][t].0, c.est[0][t].1))
                .collect(),
        );
        let up = (t > 0).then(|| {
            Mixture::new(
                comps
                    .iter()
                    .map(|(w, c)| (*w, c.delta[0][t - 1].0, c.delta[0][t - 1].1))
                    .collect(),
            )
        });
        let pr = (t > 0).then(|| {
            let g = map.index[t - 1];
            (global.mean[g], global.var[g].sqrt())
        });
        let row = treatment_row(
            s,
            field,
            &m.treatments[t],
            prep.counts[t],
            Some(&est),
            up.as_ref(),
            pr,
        );
        if t > 0 {
            uplifts.push((m.treatments[t].clone(), row.uplift, row.uplift_sd.powi(2)));
        }
        rows.push(row);
    }
    // Spatial effects: the highest-weight points holding 99.9 % of the mass, at most 64.
    let mut acc = 0.0;
    let spatial_pts: Vec<&Weighted> = comps_w
        .iter()
        .take_while(|x| {
            let go = acc < 0.999;
            acc += x.0;
            go
        })
        .take(64)
        .collect();
    let effects: Vec<(f64, Vec<f64>, Vec<f64>)> = spatial_pts
        .par_iter()
        .filter_map(|(w, k, i)| {
            let node: &Node = &m.nodes[k];
            let pt = &node.points[*i];
            let repr = node.repr.as_ref()?;
            let (mean, var) =
                repr.spatial(&m.design, pt.theta[2].exp(), pt.theta[3].exp(), &pt.fit);
            Some((*w, mean, var))
        })
        .collect();
    let n = m.design.n();
    let plots = adjusted_plots(prep, &effects);
    // Hyperparameters over the components.
    let pts: Vec<(f64, [f64; 4])> = comps_w
        .iter()
        .map(|(w, k, i)| (*w, point(k, *i).theta))
        .collect();
    let (range, across, sf, sn, share) = hyper_summaries(m, &pts);
    let mut warnings = Vec::new();
    // Mass near a bound of the length-scale search.
    for d in 0..if m.anisotropic { 2 } else { 1 } {
        let maxk = ((lat.bounds[d].1 - lat.bounds[d].0) / lat.h[d]).round() as i64;
        let edge: f64 = comps_w
            .iter()
            .filter(|(_, k, _)| {
                let kd = if d == 0 { k.0 } else { k.1 };
                kd <= 1 || kd >= maxk - 1
            })
            .map(|x| x.0)
            .sum();
        if lat.at_bound[d] && edge > 0.10 {
            warnings.push(format!(
                "{:.0} % of the range posterior lies at a bound of its search ({:.1}..{:.1} m); the field may be too small to tell the range",
                100.0 * edge,
                lat.bounds[d].0.exp(),
                lat.bounds[d].1.exp()
            ));
        }
    }
    let capped: f64 = comps_w
        .iter()
        .filter(|(_, k, _)| m.nodes[k].basis.is_some_and(|b| b.2))
        .map(|x| x.0)
        .sum();
    if capped > 0.05 {
        warnings.push(format!(
            "{:.0} % of the posterior is at length scales the reduced-rank basis ({} functions) resolves only in part; raise adjust.hsgp_max_basis or adjust.exact_max_plots",
            100.0 * capped,
            s.hsgp_max_basis
        ));
    }
    // The comparison at the posterior mode.
    let (_, mk, mi) = comps_w[0];
    let mode = point(&mk, mi);
    let method = match m.nodes[&mk].basis {
        Some((a, b, _)) => format!("hsgp {a}x{b}"),
        None => "exact".into(),
    };
    let mode_effect = effects
        .first()
        .map(|e| e.1.clone())
        .unwrap_or_else(|| vec![0.0; n]);
    let comparison = compare(prep, &mode.fit, &mode_effect)?;
    let hyper = FieldHyper {
        field: field.into(),
        plots: n as u64,
        range_m: range.mean,
        range_lo95_m: range.lo95,
        range_hi95_m: range.hi95,
        range_across: across,
        spatial_sd: sf.mean,
        spatial_sd_ci: sf,
        noise_sd: sn.mean,
        noise_sd_ci: sn,
        spatial_share: share.mean,
        spatial_share_ci: share,
        interaction_sd: Summary::NONE,
        log_marginal_likelihood: mode.fit.reml,
        method,
        warning: warnings.join("; "),
    };
    Ok(FieldFit {
        plots,
        rows,
        comparison,
        hyper,
        uplifts,
    })
}

/// The spatial fit at the mode against the same mean model without the spatial field.
fn compare(prep: &Prepared, fit: &spectral::Inner, effect: &[f64]) -> Result<Comparison, String> {
    let m = &prep.model;
    let d = &m.design;
    let (n, p) = (d.n(), d.p);
    let field = &m.name;
    let mut xtx = vec![0.0; p * p];
    let mut xty = vec![0.0; p];
    for i in 0..n {
        for a in 0..p {
            xty[a] += d.x[i * p + a] * d.y[i];
            for b in 0..p {
                xtx[a * p + b] += d.x[i * p + a] * d.x[i * p + b];
            }
        }
    }
    let l = linalg::chol(&xtx, p)
        .ok_or_else(|| format!("field {field}: the design matrix is singular"))?;
    let mut b = xty.clone();
    linalg::solve(&l, p, &mut b);
    let resid_rcbd: Vec<f64> = (0..n)
        .map(|i| d.y[i] - (0..p).map(|j| d.x[i * p + j] * b[j]).sum::<f64>())
        .collect();
    let rss: f64 = resid_rcbd.iter().map(|r| r * r).sum();
    let s2 = (rss / (n - p) as f64).max(1e-18);
    let inv = linalg::inverse(&l, p);
    let reml_rcbd = -0.5
        * ((n - p) as f64 * (2.0 * std::f64::consts::PI).ln()
            + n as f64 * s2.ln()
            + linalg::logdet(&l, p)
            - p as f64 * s2.ln()
            + rss / s2);
    let nt = m.treatments.len();
    let efficiency = (1..nt)
        .map(|t| s2 * inv[t * p + t] / fit.cov[t * p + t])
        .sum::<f64>()
        / (nt - 1) as f64;
    let rank = |b: &[f64]| -> Vec<usize> {
        let mut idx: Vec<usize> = (1..nt).collect();
        idx.sort_by(|&a, &c| b[c].total_cmp(&b[a]));
        let mut r = vec![0; nt];
        for (k, &i) in idx.iter().enumerate() {
            r[i] = k + 1;
        }
        r
    };
    let (rs, rr) = (rank(&fit.b), rank(&b));
    let rank_changes = (1..nt)
        .filter(|&t| rs[t] != rr[t])
        .map(|t| m.treatments[t].clone())
        .collect();
    let resid_sp: Vec<f64> = (0..n)
        .map(|i| d.y[i] - (0..p).map(|j| d.x[i * p + j] * fit.b[j]).sum::<f64>() - effect[i])
        .collect();
    let xy: Vec<(f64, f64)> = prep
        .plots
        .iter()
        .map(|p| (p.centroid_x_m, p.centroid_y_m))
        .collect();
    let cutoff = 1.5 * m.dmin;
    Ok(Comparison {
        field: field.clone(),
        log_ml_spatial: fit.reml,
        log_ml_rcbd: reml_rcbd,
        efficiency,
        moran_rcbd: morans_i(&xy, &resid_rcbd, cutoff),
        moran_spatial: morans_i(&xy, &resid_sp, cutoff),
        rank_changes,
    })
}

/// Interaction SD nodes and the log prior mass of the cell around each: s = 0 and a
/// geometric ladder from 0.01 U to 4 U, cells split at (geometric) midpoints, under the PC
/// prior s ~ Exp(l) with P(s > U) = 0.05.
fn interaction_nodes(u: f64) -> Vec<(f64, f64)> {
    let k = 14;
    let mut s: Vec<f64> = vec![0.0];
    for i in 0..k {
        s.push(0.01 * u * (400f64).powf(i as f64 / (k - 1) as f64));
    }
    let lam = PC_ALPHA_LN / u;
    let cdf = |x: f64| 1.0 - (-lam * x).exp();
    (0..s.len())
        .map(|i| {
            let lo = if i == 0 {
                0.0
            } else if i == 1 {
                0.5 * s[1]
            } else {
                (s[i - 1] * s[i]).sqrt()
            };
            let hi = if i == 0 {
                0.5 * s[1]
            } else if i + 1 < s.len() {
                (s[i] * s[i + 1]).sqrt()
            } else {
                f64::INFINITY
            };
            (s[i], (cdf(hi) - cdf(lo)).max(1e-300).ln())
        })
        .collect()
}

/// Result of the joint fit.
struct JointFit {
    /// (weight, component, interaction SD, chosen point (node key, index) per field).
    comps: Vec<(f64, Component, f64, Vec<((i64, i64), usize)>)>,
    ess: f64,
}

/// All fields in one model (see `joint`): importance sampling of the fields' hyperparameters
/// from their own lattices (one group per shared length scale, or one group), on a grid of
/// the interaction SD; a pilot of 16 draws per cell, then `joint_draws` spread over the
/// cells by their estimated mass.
fn fit_joint(
    preps: &[Prepared],
    lats: &[Lattice],
    shared: bool,
    global: &EffectPrior,
    maps: &[FieldMap],
    s: &FitSettings,
) -> Option<JointFit> {
    let nf = preps.len();
    // Groups: (log weight, per field: candidate points with log weights).
    let mut groups: Vec<(f64, Vec<Vec<(f64, (i64, i64), usize)>>)> = Vec::new();
    if shared {
        let lat = &lats[0];
        for &k in &lat.keys {
            let l = preps[0].model.nodes[&k].l;
            let lg = preps[0].model.log_prior_range(l, lat.rho0) + lat.lvol;
            let per: Vec<Vec<(f64, (i64, i64), usize)>> = preps
                .iter()
                .map(|p| {
                    p.model.nodes[&k]
                        .points
                        .iter()
                        .enumerate()
                        .map(|(i, pt)| (pt.lw, k, i))
                        .collect()
                })
                .collect();
            groups.push((lg, per));
        }
    } else {
        let per = preps
            .iter()
            .zip(lats)
            .map(|(p, lat)| {
                let mut v = Vec::new();
                for &k in &lat.keys {
                    let node = &p.model.nodes[&k];
                    let lpr = p.model.log_prior_range(node.l, lat.rho0) + lat.lvol;
                    for (i, pt) in node.points.iter().enumerate() {
                        v.push((lpr + pt.lw, k, i));
                    }
                }
                v
            })
            .collect();
        groups.push((0.0, per));
    }
    let u = if s.interaction_sd_u > 0.0 {
        s.interaction_sd_u
    } else {
        preps.iter().map(|p| p.model.sy).sum::<f64>() / nf as f64
    };
    let snodes = if s.interaction {
        interaction_nodes(u)
    } else {
        vec![(0.0, 0.0)]
    };
    let fit_of = |g: usize, f: usize, i: usize| -> &spectral::Inner {
        let (_, k, idx) = groups[g].1[f][i];
        &preps[f].model.nodes[&k].points[idx].fit
    };
    // Per cell (group, interaction SD) and field: the proposal (the field's own posterior
    // over its points, tilted by `cavity_tilt`), its log normaliser and the log tilt of
    // each point. Points below 1e-8 of a field's total are left out.
    struct Prop {
        cdf: Vec<f64>,
        lnf: Vec<f64>,
    }
    // Cells whose mass, judged at each field's best point, is below e^-30 of the largest are
    // left out before the (costlier) tilt.
    let screen: Vec<((usize, usize), f64)> = (0..groups.len())
        .flat_map(|g| (0..snodes.len()).map(move |j| (g, j)))
        .collect::<Vec<_>>()
        .par_iter()
        .map(|&(g, j)| {
            let per = &groups[g].1;
            let best: Vec<usize> = per
                .iter()
                .map(|c| {
                    (0..c.len())
                        .max_by(|&a, &b| c[a].0.total_cmp(&c[b].0))
                        .unwrap_or(0)
                })
                .collect();
            let fits: Vec<&spectral::Inner> = (0..nf).map(|f| fit_of(g, f, best[f])).collect();
            let lc = combine(&fits, maps, global, snodes[j].0, false)
                .map_or(f64::NEG_INFINITY, |c| c.log_c);
            let lz: f64 = per.iter().map(|c| log_sum_exp(c.iter().map(|x| x.0))).sum();
            ((g, j), groups[g].0 + snodes[j].1 + lz + lc)
        })
        .collect();
    let smax = screen.iter().map(|x| x.1).fold(f64::NEG_INFINITY, f64::max);
    let cells: Vec<(usize, usize)> = screen
        .iter()
        .filter(|x| x.1 > smax - 30.0)
        .map(|x| x.0)
        .collect();
    let cell_props: Vec<(f64, Vec<Prop>)> = cells
        .par_iter()
        .map(|&(g, j)| {
            let per = &groups[g].1;
            let lzs: Vec<f64> = per
                .iter()
                .map(|c| log_sum_exp(c.iter().map(|x| x.0)))
                .collect();
            let cands: Vec<Vec<(&spectral::Inner, f64)>> = per
                .iter()
                .enumerate()
                .map(|(f, c)| {
                    c.iter()
                        .enumerate()
                        .map(|(i, x)| {
                            let lp = x.0 - lzs[f];
                            (
                                fit_of(g, f, i),
                                if lp > -18.4 { lp } else { f64::NEG_INFINITY },
                            )
                        })
                        .collect()
                })
                .collect();
            let lnf = joint::cavity_tilt(&cands, maps, global, snodes[j].0, 2);
            let mut lpre = groups[g].0 + snodes[j].1;
            let props = cands
                .iter()
                .zip(lnf)
                .enumerate()
                .map(|(f, (c, lnf))| {
                    let lq: Vec<f64> = c.iter().zip(&lnf).map(|((_, lp), t)| lp + t).collect();
                    let lt = log_sum_exp(lq.iter().cloned());
                    lpre += lzs[f] + lt;
                    let mut acc = 0.0;
                    let cdf = lq
                        .iter()
                        .map(|v| {
                            acc += (v - lt).exp();
                            acc
                        })
                        .collect();
                    Prop { cdf, lnf }
                })
                .collect();
            (lpre, props)
        })
        .collect();
    let cells: Vec<(usize, usize, f64)> = cells
        .iter()
        .zip(&cell_props)
        .map(|(&(g, j), (lpre, _))| (g, j, *lpre))
        .collect();
    let draw = |rng: &mut Rng, ci: usize| -> Vec<usize> {
        cell_props[ci]
            .1
            .iter()
            .map(|p| {
                let u = rng.uniform() * p.cdf.last().copied().unwrap_or(1.0);
                p.cdf.partition_point(|&c| c < u).min(p.cdf.len() - 1)
            })
            .collect()
    };
    // log C of a draw minus its tilt: the importance weight's variable part.
    let log_c = |ci: usize, pick: &[usize]| -> f64 {
        let (g, j, _) = cells[ci];
        let fits: Vec<&spectral::Inner> = (0..nf).map(|f| fit_of(g, f, pick[f])).collect();
        let tilt: f64 = (0..nf).map(|f| cell_props[ci].1[f].lnf[pick[f]]).sum();
        combine(&fits, maps, global, snodes[j].0, false)
            .map_or(f64::NEG_INFINITY, |c| c.log_c - tilt)
    };
    // `k` draws in cell `ci`, seeded per cell (and per round) so that the result does not
    // depend on thread scheduling.
    let sample = |ci: usize, k: usize, round: u64| -> Vec<(Vec<usize>, f64)> {
        let mut rng = Rng::new(s.seed ^ (round * (ci as u64 + 1)));
        (0..k)
            .map(|_| {
                let pick = draw(&mut rng, ci);
                let lc = log_c(ci, &pick);
                (pick, lc)
            })
            .collect()
    };
    // A pilot of 16 draws per cell, then `joint_draws` spread by the cells' estimated mass.
    let mut draws: Vec<Vec<(Vec<usize>, f64)>> = (0..cells.len())
        .into_par_iter()
        .map(|ci| sample(ci, 16, 0x9e37_79b9))
        .collect();
    let cell_mass: Vec<f64> = cells
        .iter()
        .zip(&draws)
        .map(|(c, d)| c.2 + log_sum_exp(d.iter().map(|x| x.1)) - (d.len() as f64).ln())
        .collect();
    let top = log_sum_exp(cell_mass.iter().cloned());
    let more: Vec<Vec<(Vec<usize>, f64)>> = (0..cells.len())
        .into_par_iter()
        .map(|ci| {
            let share = (cell_mass[ci] - top).exp();
            sample(
                ci,
                (share * s.joint_draws as f64).round() as usize,
                0x85eb_ca6b,
            )
        })
        .collect();
    for (d, m) in draws.iter_mut().zip(more) {
        d.extend(m);
    }
    // Weighted draws: exp(lpre + log C) / draws in the cell.
    let mut weighted: Vec<(f64, usize, Vec<usize>)> = Vec::new();
    for (ci, d) in draws.into_iter().enumerate() {
        let ln = (d.len() as f64).ln();
        for (pick, lc) in d {
            if lc.is_finite() {
                weighted.push((cells[ci].2 + lc - ln, ci, pick));
            }
        }
    }
    if weighted.is_empty() {
        return None;
    }
    let z = log_sum_exp(weighted.iter().map(|x| x.0));
    let ws: Vec<f64> = weighted.iter().map(|x| (x.0 - z).exp()).collect();
    let ess = 1.0 / ws.iter().map(|w| w * w).sum::<f64>();
    // Keep the draws above 1e-10 of the largest; beyond 3,000, resample systematically.
    let mut idx: Vec<usize> = (0..weighted.len()).collect();
    idx.sort_by(|&a, &b| ws[b].total_cmp(&ws[a]).then(a.cmp(&b)));
    let wmax = ws[idx[0]];
    idx.retain(|&i| ws[i] > 1e-10 * wmax);
    let chosen: Vec<(f64, usize)> = if idx.len() > 3000 {
        let total: f64 = idx.iter().map(|&i| ws[i]).sum();
        let k = 3000;
        let mut out: BTreeMap<usize, f64> = BTreeMap::new();
        let mut acc = 0.0;
        let mut next = 0.5 / k as f64;
        for &i in &idx {
            acc += ws[i] / total;
            while next < acc {
                *out.entry(i).or_default() += 1.0 / k as f64;
                next += 1.0 / k as f64;
            }
        }
        out.into_iter().map(|(i, w)| (w, i)).collect()
    } else {
        idx.iter().map(|&i| (ws[i], i)).collect()
    };
    let comps = chosen
        .par_iter()
        .filter_map(|&(w, i)| {
            let (_, ci, pick) = &weighted[i];
            let (g, j, _) = cells[*ci];
            let fits: Vec<&spectral::Inner> = (0..nf).map(|f| fit_of(g, f, pick[f])).collect();
            let c = combine(&fits, maps, global, snodes[j].0, true)?;
            let pts = (0..nf)
                .map(|f| {
                    let (_, k, idx) = groups[g].1[f][pick[f]];
                    (k, idx)
                })
                .collect();
            Some((w, c, snodes[j].0, pts))
        })
        .collect();
    Some(JointFit { comps, ess })
}

/// Run adjust on the kept plots.
pub fn run(plots: &[PlotStats], s: &FitSettings) -> Result<AdjustOutput, AdjustError> {
    run_with(plots, s, &crate::progress::Progress::none())
}

/// [`run`], reporting to `progress` as each field's length scales are scanned and its fit
/// is done, and when the joint fit is done.
pub fn run_with(
    plots: &[PlotStats],
    s: &FitSettings,
    progress: &crate::progress::Progress,
) -> Result<AdjustOutput, AdjustError> {
    let mut by_field: BTreeMap<&str, Vec<&PlotStats>> = BTreeMap::new();
    for p in plots
        .iter()
        .filter(|p| p.status == "kept" && p.yield_mean.is_finite())
    {
        by_field.entry(&p.field).or_default().push(p);
    }
    let mut warnings = Vec::new();
    let mut preps: Vec<Prepared> = Vec::new();
    for (f, ps) in by_field {
        match prepare(f, ps, s) {
            Ok(p) => preps.push(p),
            Err(w) => warnings.push(w),
        }
    }
    if preps.is_empty() {
        return Err(AdjustError::NothingToFit(warnings));
    }
    let joint = s.pooling == Pooling::Joint && preps.len() > 1;
    let shared = joint && s.shared_range;
    progress.start(
        2 * preps.len() as u64 + u64::from(joint),
        "field scans and fits",
    );
    let lats: Vec<Lattice> = if shared {
        let mut models: Vec<FieldModel> = preps
            .iter_mut()
            .map(|p| std::mem::replace(&mut p.model, placeholder()))
            .collect();
        let lat = scan_shared(&mut models, s);
        for (p, m) in preps.iter_mut().zip(models) {
            p.model = m;
            progress.step();
        }
        vec![lat; preps.len()]
    } else {
        preps
            .par_iter_mut()
            .map(|p| {
                let lat = scan_own(&mut p.model, s);
                progress.step();
                lat
            })
            .collect()
    };
    let (products, global, maps) = effect_priors(&preps, s);
    let fits: Vec<Result<FieldFit, String>> = preps
        .par_iter()
        .zip(lats.par_iter())
        .zip(maps.par_iter())
        .map(|((p, lat), map)| {
            let f = fit_own(p, lat, &global, map, s);
            progress.step();
            f
        })
        .collect();
    let mut out = AdjustOutput {
        comparisons: Vec::new(),
        plots: Vec::new(),
        treatments: Vec::new(),
        hyper: Vec::new(),
        warnings,
        joint_ess: f64::NAN,
    };
    // Fields that failed their own fit leave the joint fit too.
    let mut keep = Vec::new();
    let mut own = Vec::new();
    for (i, f) in fits.into_iter().enumerate() {
        match f {
            Ok(f) => {
                keep.push(i);
                own.push(f);
            }
            Err(w) => out.warnings.push(w),
        }
    }
    if own.is_empty() {
        return Err(AdjustError::NothingToFit(out.warnings));
    }
    let jf = if joint && keep.len() == preps.len() {
        let j = fit_joint(&preps, &lats, shared, &global, &maps, s);
        progress.step();
        j
    } else {
        if joint {
            out.warnings
                .push("the joint fit needs every field; fields were fitted separately".into());
        }
        None
    };
    match jf {
        Some(jf) => {
            out.joint_ess = jf.ess;
            if jf.ess < 100.0 {
                out.warnings.push(format!(
                    "the joint fit's importance draws have an effective sample size of {:.0}; raise adjust.joint_draws",
                    jf.ess
                ));
            }
            for (f, (prep, mut fit)) in preps.iter().zip(own).enumerate() {
                let m = &prep.model;
                let nt = m.treatments.len();
                fit.rows = (0..nt)
                    .map(|t| {
                        let est = Mixture::new(
                            jf.comps
                                .iter()
                                .map(|(w, c, _, _)| (*w, c.est[f][t].0, c.est[f][t].1))
                                .collect(),
                        );
                        let up = (t > 0).then(|| {
                            Mixture::new(
                                jf.comps
                                    .iter()
                                    .map(|(w, c, _, _)| {
                                        (*w, c.delta[f][t - 1].0, c.delta[f][t - 1].1)
                                    })
                                    .collect(),
                            )
                        });
                        let pr = (t > 0).then(|| {
                            let g = maps[f].index[t - 1];
                            (global.mean[g], global.var[g].sqrt())
                        });
                        treatment_row(
                            s,
                            &m.name,
                            &m.treatments[t],
                            prep.counts[t],
                            Some(&est),
                            up.as_ref(),
                            pr,
                        )
                    })
                    .collect();
                let pts: Vec<(f64, [f64; 4])> = jf
                    .comps
                    .iter()
                    .map(|(w, _, _, pick)| {
                        let (k, i) = pick[f];
                        (*w, m.nodes[&k].points[i].theta)
                    })
                    .collect();
                let (range, across, sf, sn, share) = hyper_summaries(m, &pts);
                let h = &mut fit.hyper;
                (h.range_m, h.range_lo95_m, h.range_hi95_m) = (range.mean, range.lo95, range.hi95);
                h.range_across = across;
                (h.spatial_sd, h.spatial_sd_ci) = (sf.mean, sf);
                (h.noise_sd, h.noise_sd_ci) = (sn.mean, sn);
                (h.spatial_share, h.spatial_share_ci) = (share.mean, share);
                fit.plots = joint_plots(prep, f, &jf);
                push_fit(&mut out, fit);
            }
            let inter =
                Summary::from_weighted(jf.comps.iter().map(|(w, _, sv, _)| (*sv, *w)).collect());
            let (range, across) = if shared {
                let pts: Vec<(f64, [f64; 4])> = jf
                    .comps
                    .iter()
                    .map(|(w, _, _, pick)| {
                        let (k, i) = pick[0];
                        (*w, preps[0].model.nodes[&k].points[i].theta)
                    })
                    .collect();
                let (r, a, ..) = hyper_summaries(&preps[0].model, &pts);
                (r, a)
            } else {
                (Summary::NONE, Summary::NONE)
            };
            out.hyper.push(FieldHyper {
                field: "all".into(),
                plots: preps.iter().map(|p| p.model.design.n() as u64).sum(),
                range_m: range.mean,
                range_lo95_m: range.lo95,
                range_hi95_m: range.hi95,
                range_across: across,
                spatial_sd: f64::NAN,
                spatial_sd_ci: Summary::NONE,
                noise_sd: f64::NAN,
                noise_sd_ci: Summary::NONE,
                spatial_share: f64::NAN,
                spatial_share_ci: Summary::NONE,
                interaction_sd: inter,
                log_marginal_likelihood: f64::NAN,
                method: format!("joint, {} draws, ESS {:.0}", jf.comps.len(), jf.ess),
                warning: String::new(),
            });
            let mut pooled: Vec<TreatmentRow> = vec![treatment_row(
                s,
                "all",
                &s.check,
                preps.iter().map(|p| p.counts[0]).sum(),
                None,
                None,
                None,
            )];
            for (g, name) in products.iter().enumerate() {
                let up = Mixture::new(
                    jf.comps
                        .iter()
                        .map(|(w, c, _, _)| (*w, c.beta_mean[g], c.beta_var[g]))
                        .collect(),
                );
                let count = preps
                    .iter()
                    .zip(&maps)
                    .filter_map(|(p, m)| {
                        m.index
                            .iter()
                            .position(|&k| k == g)
                            .map(|t| p.counts[t + 1])
                    })
                    .sum();
                pooled.push(treatment_row(
                    s,
                    "all",
                    name,
                    count,
                    None,
                    Some(&up),
                    Some((global.mean[g], global.var[g].sqrt())),
                ));
            }
            out.treatments.extend(pooled);
        }
        None => {
            let mut pool: BTreeMap<String, Vec<(f64, f64)>> = BTreeMap::new();
            let mut counts: BTreeMap<String, u64> = BTreeMap::new();
            for (i, fit) in own.into_iter().enumerate() {
                let prep = &preps[keep[i]];
                for (t, c) in prep.model.treatments.iter().zip(&prep.counts) {
                    *counts.entry(t.clone()).or_default() += c;
                }
                for (t, u, v) in &fit.uplifts {
                    pool.entry(t.clone()).or_default().push((*u, *v));
                }
                push_fit(&mut out, fit);
            }
            // Pooled rows: inverse-variance weighted over the fields holding the product (a
            // fixed-effect combination of separate fits; each field's uplift already carries
            // the product prior, so an informative prior counts once per field here).
            out.treatments.push(treatment_row(
                s,
                "all",
                &s.check,
                counts[&s.check],
                None,
                None,
                None,
            ));
            for (t, v) in pool {
                let w: f64 = v.iter().map(|x| 1.0 / x.1).sum();
                let up = v.iter().map(|x| x.0 / x.1).sum::<f64>() / w;
                let mix = Mixture::new(vec![(1.0, up, 1.0 / w)]);
                let g = products.iter().position(|p| *p == t).unwrap_or(0);
                out.treatments.push(treatment_row(
                    s,
                    "all",
                    &t,
                    counts[&t],
                    None,
                    Some(&mix),
                    Some((global.mean[g], global.var[g].sqrt())),
                ));
            }
        }
    }
    Ok(out)
}

/// A field's per-plot spatial effects under the joint posterior: its hyperparameter points
/// weighted by the joint draws (the heaviest holding 99.9 % of the mass, at most 64), each
/// with the moments of the field's mean parameters averaged over the draws at that point.
fn joint_plots(prep: &Prepared, f: usize, jf: &JointFit) -> Vec<AdjustedPlot> {
    let m = &prep.model;
    let p = m.design.p;
    let mut by_point: BTreeMap<((i64, i64), usize), (f64, Vec<f64>, Vec<f64>)> = BTreeMap::new();
    for (w, c, _, pick) in &jf.comps {
        let (mb, cb) = &c.b[f];
        let e = by_point
            .entry(pick[f])
            .or_insert_with(|| (0.0, vec![0.0; p], vec![0.0; p * p]));
        e.0 += w;
        for a in 0..p {
            e.1[a] += w * mb[a];
            for b in 0..p {
                e.2[a * p + b] += w * (cb[a * p + b] + mb[a] * mb[b]);
            }
        }
    }
    let mut pts: Vec<(((i64, i64), usize), (f64, Vec<f64>, Vec<f64>))> =
        by_point.into_iter().collect();
    pts.sort_by(|a, b| b.1 .0.total_cmp(&a.1 .0).then(a.0.cmp(&b.0)));
    let mut acc = 0.0;
    let chosen: Vec<_> = pts
        .into_iter()
        .take_while(|x| {
            let go = acc < 0.999;
            acc += x.1 .0;
            go
        })
        .take(64)
        .collect();
    let effects: Vec<(f64, Vec<f64>, Vec<f64>)> = chosen
        .par_iter()
        .filter_map(|((k, i), (w, sm, sm2))| {
            let node = &m.nodes[k];
            let pt = &node.points[*i];
            let repr = node.repr.as_ref()?;
            let mean_b: Vec<f64> = sm.iter().map(|x| x / w).collect();
            let cov_b: Vec<f64> = (0..p * p)
                .map(|k| sm2[k] / w - mean_b[k / p] * mean_b[k % p])
                .collect();
            let parts =
                repr.spatial_parts(&m.design, pt.theta[2].exp(), pt.theta[3].exp(), &pt.fit);
            let n = m.design.n();
            let mean = (0..n)
                .map(|j| parts.mean[j] + parts.shift(j, &pt.fit.b, &mean_b))
                .collect();
            let var = (0..n)
                .map(|j| parts.cond_var[j] + parts.quad(j, &cov_b))
                .collect();
            Some((*w, mean, var))
        })
        .collect();
    adjusted_plots(prep, &effects)
}

/// Plots with their spatial effect from a mixture over hyperparameter points.
fn adjusted_plots(prep: &Prepared, effects: &[(f64, Vec<f64>, Vec<f64>)]) -> Vec<AdjustedPlot> {
    prep.plots
        .iter()
        .enumerate()
        .map(|(j, pl)| {
            let mix = Mixture::new(effects.iter().map(|(w, mu, v)| (*w, mu[j], v[j])).collect());
            let (mu, sdv) = (mix.mean(), mix.var().sqrt());
            AdjustedPlot {
                plot_id: pl.plot_id.clone(),
                field: prep.model.name.clone(),
                treatment: pl.treatment.clone(),
                block: pl.block.clone(),
                raw: pl.yield_mean,
                spatial_mean: mu,
                spatial_sd: sdv,
                adjusted: pl.yield_mean - mu,
                adjusted_sd: sdv,
            }
        })
        .collect()
}

fn push_fit(out: &mut AdjustOutput, f: FieldFit) {
    out.plots.extend(f.plots);
    out.comparisons.push(f.comparison);
    out.treatments.extend(f.rows);
    if !f.hyper.warning.is_empty() {
        out.warnings
            .push(format!("field {}: {}", f.hyper.field, f.hyper.warning));
    }
    out.hyper.push(f.hyper);
}

/// An empty model to stand in while the real ones are scanned together.
fn placeholder() -> FieldModel {
    FieldModel {
        name: String::new(),
        design: Design {
            y: Vec::new(),
            x: Vec::new(),
            p: 0,
            coords: Vec::new(),
            kernel: Kernel::Matern52,
        },
        treatments: Vec::new(),
        sy: 1.0,
        dmin: 1.0,
        anisotropic: false,
        bounds: [(0.0, 1.0); 2],
        rho0: (1.0, 1.0),
        method: Method::Exact,
        nodes: BTreeMap::new(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::plots::PlotStats;

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
        assert!(
            solo.uplift.is_finite() && solo.uplift_sd.is_finite() && solo.p_uplift_gt0.is_finite()
        );
        assert!(
            solo.uplift_sd > a.uplift_sd,
            "{} vs {}",
            solo.uplift_sd,
            a.uplift_sd
        );
    }

    /// A field of `rows` x `cols` plots (18 m x 66 m) with a smooth trend, noise and
    /// treatments "chk", "a", "b" in rotation; "a" adds `effect`.
    fn trend_field(name: &str, rows: usize, cols: usize, effect: f64, seed: u64) -> Vec<PlotStats> {
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
        let _ = scan_own(&mut prep.model, &s);
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
        let c = combine(&refs, &maps, &global, si, false).unwrap();
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
        let x0 = Mat::from_fn(n, 2, |i, j| if rows[i].0 == j { 1.0 } else { 0.0 });
        let llt = cov.llt(Side::Lower).unwrap();
        let l = llt.L();
        let logdet: f64 = (0..n).map(|i| 2.0 * l[(i, i)].ln()).sum();
        let ci_x = llt.solve(&x0);
        let ci_y = llt.solve(&y);
        let a = x0.transpose() * &ci_x;
        let a_llt = a.llt(Side::Lower).unwrap();
        let al = a_llt.L();
        let logdet_a: f64 = (0..2).map(|i| 2.0 * al[(i, i)].ln()).sum();
        let b = a_llt.solve(&(x0.transpose() * &ci_y));
        let r = &y - &x0 * &b;
        let quad: f64 = (0..n).map(|i| r[(i, 0)] * llt.solve(&r)[(i, 0)]).sum();
        let direct =
            -0.5 * ((n - 2) as f64 * (2.0 * std::f64::consts::PI).ln() + logdet + logdet_a + quad);
        assert!(
            ((factored - direct) / direct).abs() < 1e-9,
            "{factored} vs {direct}"
        );
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
            eprintln!("l {l}: exact REML {:.3} hsgp {:.3} basis {basis:?}; uplift {:.4} vs {:.4} (sd {:.4})", ex.reml, hs.reml, ex.b[1], hs.b[1], ex.cov[d.p + 1].sqrt());
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
        assert!((j.uplift - p.uplift).abs() < 0.25 * p.uplift_sd);
        assert!((j.uplift_sd / p.uplift_sd - 1.0).abs() < 0.15);
    }

    #[test]
    fn spectral_evaluation_equals_the_dense_cholesky_evaluation() {
        // The exact spectral form against a fresh dense Cholesky (`evaluate`) at several
        // hyperparameters, with blocks in the mean model: REML, GLS estimates and their
        // covariance to 1e-9, spatial effect means and variances to 1e-8.
        let plots = trend_field("F", 4, 6, 0.3, 17);
        let mut s = settings();
        s.blocks = true;
        let prep = prepare("F", plots.iter().collect(), &s).unwrap();
        let d = &prep.model.design;
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
            let (m, v) = rep.spatial(d, sf, sn, &e);
            for i in 0..d.n() {
                assert!((m[i] - dense.spatial_mean[i]).abs() < 1e-8);
                assert!((v[i] - dense.spatial_var[i]).abs() < 1e-8);
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
}
