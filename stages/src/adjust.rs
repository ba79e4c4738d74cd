//! Adjust: Gaussian-process spatial adjustment of plot yields and treatment contrasts.
//!
//! Model, per field (Rasmussen & Williams 2006, "Gaussian Processes for Machine Learning",
//! section 2.7, explicit basis functions):
//!
//!   y = X b + f + e,  f ~ GP(0, k),  e ~ N(0, s_n^2 I),
//!
//! where y are plot mean yields, X holds one indicator column per treatment (plus
//! sum-to-zero block columns when `adjust.blocks`), and k is the Matern 5/2 kernel
//! k(d) = s_f^2 (1 + sqrt5 d/l + 5 d^2 / (3 l^2)) exp(-sqrt5 d/l) (R&W eq. 4.17) on plot
//! centroid distances in metres. With a flat prior on b the hyperparameters (l, s_f, s_n)
//! maximise the restricted (REML) log marginal likelihood
//!
//!   -1/2 [(n-p) log 2pi + log|K_y| + log|X' K_y^-1 X| + r' K_y^-1 r],  r = y - X b_hat
//!
//! searched by Nelder-Mead on the log scale from a grid of starts, within bounds scaled to the
//! field (`adjust.min_range_m`, `adjust.max_range_m`; 1e-3 to 10 times the SD of y for both
//! SDs). Given them, b_hat = (X' K_y^-1 X)^-1 X' K_y^-1 y with covariance (X' K_y^-1 X)^-1,
//! and the spatial effect at the plots has mean K K_y^-1 r and covariance
//! K - K K_y^-1 K + R' (X' K_y^-1 X)^-1 R with R = X' K_y^-1 K (R&W eq. 2.42).
//!
//! Beside it the same mean model is fitted without the spatial field (the usual RCBD
//! analysis when `adjust.blocks`), with the REML log marginal likelihoods of both, the
//! efficiency (ratio of contrast variances), products whose ranking changes, and the
//! residual Moran's I of both. With a grain price and product costs, each product also gets
//! its break-even uplift (cost / price), P(uplift > break-even) and expected net return.
//!
//! The hyperparameters carry penalised-complexity priors (Fuglstad et al. 2019) and are
//! integrated numerically around their posterior mode: every estimate, SD, interval and
//! probability is a mixture over a grid of hyperparameter values, not a plug-in. The
//! comparison with the no-spatial-field model uses the mode. Fields are fitted independently (in parallel); the pooled rows combine
//! the per-field uplifts by inverse-variance weighting (a fixed-effect combination).
//!
//! Errors: [`AdjustError`] when no field can be fitted; a field that cannot be fitted (one
//! treatment, no kept check plot, fewer plots than parameters + 2, all yields equal) is
//! skipped with a warning that names it.
//! Complexity: O(n^3) per likelihood evaluation for n plots in a field (dense Cholesky, faer).

use crate::plots::PlotStats;
use crate::util::{normal_cdf, sd};
use faer::linalg::solvers::Solve;
use faer::{Mat, Side};
use rayon::prelude::*;
use std::collections::{BTreeMap, BTreeSet};

/// z value of a two-sided 95 % normal interval.
const Z95: f64 = 1.959_963_984_540_054;

/// No field could be fitted.
#[derive(Debug, thiserror::Error)]
pub enum AdjustError {
    #[error("no field could be adjusted:\n  {}", .0.join("\n  "))]
    NothingToFit(Vec<String>),
}

/// Settings of the fit (from `[adjust]`).
#[derive(Clone, Debug)]
pub struct FitSettings {
    pub check: String,
    pub blocks: bool,
    pub min_range_m: f64,
    pub max_range_m: f64,
    pub starts_per_axis: usize,
    pub kernel: Kernel,
    /// Grain price per tonne at standard moisture (0 = no economics).
    pub grain_price_per_t: f64,
    /// Product cost per hectare, by treatment.
    pub product_cost_per_ha: BTreeMap<String, f64>,
    /// Converts t/ha to the output unit.
    pub t_ha_to_unit: f64,
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
    pub estimate: f64,
    pub sd: f64,
    pub lo95: f64,
    pub hi95: f64,
    /// Uplift over the check; NaN for the check itself.
    pub uplift: f64,
    pub uplift_sd: f64,
    pub uplift_lo95: f64,
    pub uplift_hi95: f64,
    pub p_uplift_gt0: f64,
    /// Uplift that pays for the product (cost / price), in the output unit; NaN without
    /// economics.
    pub break_even: f64,
    pub p_uplift_gt_break_even: f64,
    /// Expected uplift x price - cost, per hectare.
    pub expected_net_return_per_ha: f64,
}

/// Fitted hyperparameters of one field.
#[derive(Clone, Debug, PartialEq)]
pub struct FieldHyper {
    pub field: String,
    pub plots: u64,
    /// Posterior mean of the range and its 95 % interval (from the integration grid).
    pub range_m: f64,
    pub range_lo95_m: f64,
    pub range_hi95_m: f64,
    pub spatial_sd: f64,
    pub noise_sd: f64,
    pub spatial_share: f64,
    pub log_marginal_likelihood: f64,
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
}

/// Matern 5/2 covariance at distance `d` (R&W 2006 eq. 4.17).
pub fn matern52(d: f64, range: f64, sd: f64) -> f64 {
    let r = 5f64.sqrt() * d / range;
    sd * sd * (1.0 + r + r * r / 3.0) * (-r).exp()
}

/// Spatial covariance functions (R&W 2006 eq. 4.9 and 4.16-4.17).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum Kernel {
    /// Matern 1/2 (exponential): s^2 exp(-d/l).
    Matern12,
    /// Matern 3/2: s^2 (1 + sqrt3 d/l) exp(-sqrt3 d/l).
    Matern32,
    /// Matern 5/2: s^2 (1 + sqrt5 d/l + 5 d^2/(3 l^2)) exp(-sqrt5 d/l).
    #[default]
    Matern52,
    /// Squared exponential: s^2 exp(-d^2 / (2 l^2)).
    SquaredExponential,
}

impl Kernel {
    /// The kernel named in `adjust.kernel`.
    pub fn from_name(name: &str) -> Option<Kernel> {
        Some(match name {
            "matern12" => Kernel::Matern12,
            "matern32" => Kernel::Matern32,
            "matern52" => Kernel::Matern52,
            "squared_exponential" => Kernel::SquaredExponential,
            _ => return None,
        })
    }
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

/// Break-even uplift, P(uplift > break-even) and expected net return for one product.
fn economics(s: &FitSettings, treatment: &str, uplift: f64, sd: f64) -> (f64, f64, f64) {
    let cost = s.product_cost_per_ha.get(treatment).copied().unwrap_or(0.0);
    if !(s.grain_price_per_t > 0.0) || uplift.is_nan() {
        return (f64::NAN, f64::NAN, f64::NAN);
    }
    let be = cost / s.grain_price_per_t * s.t_ha_to_unit;
    let up_t = uplift / s.t_ha_to_unit;
    (
        be,
        normal_cdf((uplift - be) / sd),
        up_t * s.grain_price_per_t - cost,
    )
}

/// Fit result of one field.
struct FieldFit {
    comparison: Comparison,
    plots: Vec<AdjustedPlot>,
    treatments: Vec<TreatmentRow>,
    hyper: FieldHyper,
    /// (treatment, uplift, variance) for pooling.
    uplifts: Vec<(String, f64, f64, f64, f64, u64)>,
}

fn fit_field(field: &str, plots: &[&PlotStats], s: &FitSettings) -> Result<FieldFit, String> {
    let treatments: Vec<String> = {
        let set: BTreeSet<&str> = plots.iter().map(|p| p.treatment.as_str()).collect();
        let mut v: Vec<String> = set.into_iter().map(String::from).collect();
        // Check first, the rest sorted.
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
    let p = treatments.len() + blocks.len().saturating_sub(1);
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
    let x: Vec<Vec<f64>> = plots
        .iter()
        .map(|pl| {
            let mut row = vec![0.0; p];
            let t = treatments
                .iter()
                .position(|t| *t == pl.treatment)
                .unwrap_or(0);
            row[t] = 1.0;
            if blocks.len() > 1 {
                let b = blocks.iter().position(|b| *b == pl.block).unwrap_or(0);
                for j in 1..blocks.len() {
                    row[treatments.len() + j - 1] = if b == j {
                        1.0
                    } else if b == 0 {
                        -1.0
                    } else {
                        0.0
                    };
                }
            }
            row
        })
        .collect();
    let xy: Vec<(f64, f64)> = plots
        .iter()
        .map(|p| (p.centroid_x_m, p.centroid_y_m))
        .collect();
    let data = FieldData {
        y,
        xy: xy.clone(),
        x,
        p,
        kernel: s.kernel,
    };
    // Bounds of the length scale from the plot layout.
    let mut dmin = f64::INFINITY;
    let mut dmax: f64 = 0.0;
    for i in 0..n {
        for j in i + 1..n {
            let d = ((xy[i].0 - xy[j].0).powi(2) + (xy[i].1 - xy[j].1).powi(2)).sqrt();
            if d > 0.0 {
                dmin = dmin.min(d);
            }
            dmax = dmax.max(d);
        }
    }
    let lo_r = if s.min_range_m > 0.0 {
        s.min_range_m
    } else {
        0.5 * dmin
    };
    let hi_r = if s.max_range_m > 0.0 {
        s.max_range_m
    } else {
        10.0 * dmax
    };
    let bounds = [
        (lo_r.ln(), hi_r.ln()),
        ((1e-3 * sy).ln(), (10.0 * sy).ln()),
        ((1e-3 * sy).ln(), (10.0 * sy).ln()),
    ];
    // Penalised-complexity priors (Fuglstad et al. 2019, JASA 114:445): in 2-D, 1/range ~
    // Exp(l1) with l1 = -ln(a) x rho0, so P(range < rho0) = a; each SD ~ Exp(l) with
    // l = -ln(a) / s0, so P(SD > s0) = a. Here a = 0.05, rho0 = the smallest distance between
    // plot centres and s0 = twice the SD of the plot yields. On the log scale each density
    // gains its Jacobian (the value itself).
    let a_ln = -(0.05f64.ln());
    let (l1, l_sd) = (a_ln * dmin, a_ln / (2.0 * sy));
    let log_prior = |t: &[f64]| -> f64 {
        let (r, f, e) = (t[0].exp(), t[1].exp(), t[2].exp());
        (l1.ln() - 2.0 * t[0] - l1 / r + t[0])
            + (l_sd.ln() - l_sd * f + t[1])
            + (l_sd.ln() - l_sd * e + t[2])
    };
    let objective = |t: &[f64]| -> f64 {
        if t.iter().zip(&bounds).any(|(v, (lo, hi))| v < lo || v > hi) {
            return f64::INFINITY;
        }
        match evaluate(&data, t[0].exp(), t[1].exp(), t[2].exp(), false) {
            Some(e) => -(e.reml + log_prior(t)),
            None => f64::INFINITY,
        }
    };
    let k = s.starts_per_axis.max(1);
    let frac = |i: usize| {
        if k == 1 {
            0.5
        } else {
            0.15 + 0.7 * i as f64 / (k - 1) as f64
        }
    };
    let mut best: Option<(Vec<f64>, f64)> = None;
    for i in 0..k {
        for j in 0..k {
            // Range spread over its log bounds; the spatial share over (0.15..0.85).
            let lr = bounds[0].0 + (bounds[0].1 - bounds[0].0) * (0.1 + 0.5 * frac(i));
            let share = frac(j);
            let start = [
                lr,
                (sy * share.sqrt()).ln(),
                (sy * (1.0 - share).sqrt()).ln(),
            ];
            let r = nelder_mead(&objective, &start, 0.5, 400);
            if best.as_ref().is_none_or(|b| r.1 < b.1) {
                best = Some(r);
            }
        }
    }
    let (theta, _) = best.expect("at least one start");
    let (range, sf, sn) = (theta[0].exp(), theta[1].exp(), theta[2].exp());
    let e = evaluate(&data, range, sf, sn, true)
        .ok_or_else(|| format!("field {field}: covariance not positive definite at the optimum"))?;
    let mut warning = String::new();
    if theta[0] - bounds[0].0 < 0.05 || bounds[0].1 - theta[0] < 0.05 {
        warning = format!(
            "range {range:.1} m is at a bound of its search ({lo_r:.1}..{hi_r:.1} m); the field may be too small to tell"
        );
    }
    // Integrate the hyperparameters numerically on the log scale around the posterior mode
    // (a grid in the spirit of Rue, Martino & Chopin 2009): 7 points per axis at
    // 0, +-0.75, +-1.5, +-2.25 posterior SDs (from the curvature at the mode, widened where
    // the tails are heavier), weights proportional to the posterior density, points below
    // 1e-4 of the mode's dropped.
    let lp = |t: &[f64]| -objective(t);
    let lp0 = lp(&theta);
    let h = 0.05;
    let axis_sd: Vec<f64> = (0..3)
        .map(|k| {
            let mut up = theta.clone();
            let mut dn = theta.clone();
            up[k] += h;
            dn[k] -= h;
            let d2 = (lp(&up) - 2.0 * lp0 + lp(&dn)) / (h * h);
            if d2.is_finite() && d2 < 0.0 {
                (1.0 / (-d2).sqrt()).clamp(0.02, 1.5)
            } else {
                0.5
            }
        })
        .collect();
    let zs = [-2.25, -1.5, -0.75, 0.0, 0.75, 1.5, 2.25];
    // An axis whose outermost grid points hold more than 10 % of the mass is widened by 1.6
    // and the grid evaluated again (up to twice): the curvature at the mode understates
    // heavy tails.
    let mut axis_sd = axis_sd;
    let mut evals: Vec<(f64, [f64; 3], Evaluation)> = Vec::new();
    for round in 0..3 {
        evals.clear();
        for &z0 in &zs {
            for &z1 in &zs {
                for &z2 in &zs {
                    let t = [
                        theta[0] + z0 * axis_sd[0],
                        theta[1] + z1 * axis_sd[1],
                        theta[2] + z2 * axis_sd[2],
                    ];
                    let w = (lp(&t) - lp0).exp();
                    if !(w > 1e-4) {
                        continue;
                    }
                    if let Some(ev) = evaluate(&data, t[0].exp(), t[1].exp(), t[2].exp(), false) {
                        evals.push((w, t, ev));
                    }
                }
            }
        }
        let total: f64 = evals.iter().map(|x| x.0).sum();
        let mut widened = false;
        for k in 0..3 {
            let edge: f64 = evals
                .iter()
                .filter(|(_, t, _)| ((t[k] - theta[k]) / axis_sd[k]).abs() > 2.0)
                .map(|(w, _, _)| w)
                .sum::<f64>()
                / total.max(1e-300);
            if edge > 0.10 && round < 2 {
                axis_sd[k] *= 1.6;
                widened = true;
            }
        }
        if !widened {
            break;
        }
    }
    // The full evaluation (spatial effects) only at the grid points kept.
    let mut full = Vec::with_capacity(evals.len());
    for (w, t, _) in evals {
        if let Some(ev) = evaluate(&data, t[0].exp(), t[1].exp(), t[2].exp(), true) {
            full.push((w, t, ev));
        }
    }
    let mut evals = full;
    if evals.is_empty() {
        return Err(format!(
            "field {field}: the hyperparameter posterior could not be evaluated"
        ));
    }
    let wsum: f64 = evals.iter().map(|x| x.0).sum();
    for x in evals.iter_mut() {
        x.0 /= wsum;
    }
    // A mixture of normals over the grid: (weight, mean, variance) per grid point.
    let mixture = |f: &dyn Fn(&Evaluation) -> (f64, f64)| -> Vec<(f64, f64, f64)> {
        evals
            .iter()
            .map(|(w, _, ev)| {
                let (m, v) = f(ev);
                (*w, m, v.max(1e-300))
            })
            .collect()
    };
    let moments = |mix: &[(f64, f64, f64)]| -> (f64, f64) {
        let m: f64 = mix.iter().map(|(w, mu, _)| w * mu).sum();
        let v: f64 = mix
            .iter()
            .map(|(w, mu, var)| w * (var + mu * mu))
            .sum::<f64>()
            - m * m;
        (m, v.max(0.0))
    };
    let cdf = |mix: &[(f64, f64, f64)], x: f64| -> f64 {
        mix.iter()
            .map(|(w, mu, var)| w * normal_cdf((x - mu) / var.sqrt()))
            .sum()
    };
    let quantile = |mix: &[(f64, f64, f64)], q: f64| -> f64 {
        let (m, v) = moments(mix);
        let (mut lo, mut hi) = (m - 10.0 * v.sqrt() - 1e-12, m + 10.0 * v.sqrt() + 1e-12);
        for _ in 0..100 {
            let mid = 0.5 * (lo + hi);
            if cdf(mix, mid) < q {
                lo = mid
            } else {
                hi = mid
            }
        }
        0.5 * (lo + hi)
    };
    let adjusted = plots
        .iter()
        .enumerate()
        .map(|(i, pl)| {
            let (m, v) = moments(&mixture(&|ev| (ev.spatial_mean[i], ev.spatial_var[i])));
            AdjustedPlot {
                plot_id: pl.plot_id.clone(),
                field: field.to_string(),
                treatment: pl.treatment.clone(),
                block: pl.block.clone(),
                raw: pl.yield_mean,
                spatial_mean: m,
                spatial_sd: v.sqrt(),
                adjusted: pl.yield_mean - m,
                adjusted_sd: v.sqrt(),
            }
        })
        .collect();
    let mut rows = Vec::new();
    let mut uplifts = Vec::new();
    for (t, name) in treatments.iter().enumerate() {
        let count = plots.iter().filter(|p| &p.treatment == name).count() as u64;
        let est_mix = mixture(&|ev| (ev.b[t], ev.cov_b[(t, t)]));
        let (est, v) = moments(&est_mix);
        let mut row = TreatmentRow {
            field: field.to_string(),
            treatment: name.clone(),
            plots: count,
            estimate: est,
            sd: v.sqrt(),
            lo95: quantile(&est_mix, 0.025),
            hi95: quantile(&est_mix, 0.975),
            uplift: f64::NAN,
            uplift_sd: f64::NAN,
            uplift_lo95: f64::NAN,
            uplift_hi95: f64::NAN,
            p_uplift_gt0: f64::NAN,
            break_even: f64::NAN,
            p_uplift_gt_break_even: f64::NAN,
            expected_net_return_per_ha: f64::NAN,
        };
        if t > 0 {
            let up_mix = mixture(&|ev| {
                (
                    ev.b[t] - ev.b[0],
                    ev.cov_b[(t, t)] + ev.cov_b[(0, 0)] - 2.0 * ev.cov_b[(t, 0)],
                )
            });
            let (up, upv) = moments(&up_mix);
            row.uplift = up;
            row.uplift_sd = upv.sqrt();
            row.uplift_lo95 = quantile(&up_mix, 0.025);
            row.uplift_hi95 = quantile(&up_mix, 0.975);
            row.p_uplift_gt0 = 1.0 - cdf(&up_mix, 0.0);
            let (be, _, ret) = economics(s, name, up, upv.sqrt());
            row.break_even = be;
            row.expected_net_return_per_ha = ret;
            if be.is_finite() {
                row.p_uplift_gt_break_even = 1.0 - cdf(&up_mix, be);
            }
            uplifts.push((name.clone(), up, upv, est, v, count));
        }
        rows.push(row);
    }
    // Posterior means of the hyperparameters over the grid.
    let post = |k: usize| evals.iter().map(|(w, t, _)| w * t[k].exp()).sum::<f64>();
    let (range_pm, sf_pm, sn_pm) = (post(0), post(1), post(2));
    // Weighted quantiles of the range over the grid points (as coarse as the grid).
    let range_q = |q: f64| -> f64 {
        let mut v: Vec<(f64, f64)> = evals.iter().map(|(w, t, _)| (t[0].exp(), *w)).collect();
        v.sort_by(|a, b| a.0.total_cmp(&b.0));
        let mut acc = 0.0;
        for (r, w) in &v {
            acc += w;
            if acc >= q {
                return *r;
            }
        }
        v.last().map(|x| x.0).unwrap_or(f64::NAN)
    };
    let (range_lo, range_hi) = (range_q(0.025), range_q(0.975));
    // Posterior mass on the outermost grid points of the range axis: the grid (or the prior)
    // may be cutting the posterior off.
    let edge: f64 = evals
        .iter()
        .filter(|(_, t, _)| ((t[0] - theta[0]) / axis_sd[0]).abs() > 2.0)
        .map(|(w, _, _)| w)
        .sum();
    if edge > 0.15 && warning.is_empty() {
        warning = format!(
            "{:.0} % of the range posterior lies on the edge of the integration grid; the field may be too small to tell the range",
            100.0 * edge
        );
    }
    let share_pm: f64 = evals
        .iter()
        .map(|(w, t, _)| {
            let (f, e) = (t[1].exp(), t[2].exp());
            w * f * f / (f * f + e * e)
        })
        .sum();
    // The same mean model without the spatial field: REML noise variance RSS / (n - p).
    let ols = evaluate(&data, range, 0.0, 1.0, false)
        .ok_or_else(|| format!("field {field}: the design matrix is singular"))?;
    let rss: f64 = (0..n)
        .map(|i| (data.y[i] - (0..p).map(|j| data.x[i][j] * ols.b[j]).sum::<f64>()).powi(2))
        .sum();
    let rcbd = evaluate(
        &data,
        range,
        0.0,
        (rss / (n - p) as f64).sqrt().max(1e-9),
        false,
    )
    .ok_or_else(|| format!("field {field}: the RCBD fit failed"))?;
    let contrast_var =
        |e: &Evaluation, t: usize| e.cov_b[(t, t)] + e.cov_b[(0, 0)] - 2.0 * e.cov_b[(t, 0)];
    let nt = treatments.len();
    let efficiency = (1..nt)
        .map(|t| contrast_var(&rcbd, t) / contrast_var(&e, t))
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
    let (rs, rr) = (rank(&e.b), rank(&rcbd.b));
    let rank_changes: Vec<String> = (1..nt)
        .filter(|&t| rs[t] != rr[t])
        .map(|t| treatments[t].clone())
        .collect();
    let resid = |b: &[f64], f: Option<&[f64]>| -> Vec<f64> {
        (0..n)
            .map(|i| {
                data.y[i]
                    - (0..p).map(|j| data.x[i][j] * b[j]).sum::<f64>()
                    - f.map_or(0.0, |f| f[i])
            })
            .collect()
    };
    let cutoff = 1.5 * dmin;
    let comparison = Comparison {
        field: field.to_string(),
        log_ml_spatial: e.reml,
        log_ml_rcbd: rcbd.reml,
        efficiency,
        moran_rcbd: morans_i(&xy, &resid(&rcbd.b, None), cutoff),
        moran_spatial: morans_i(&xy, &resid(&e.b, Some(&e.spatial_mean)), cutoff),
        rank_changes,
    };
    let check_count = plots.iter().filter(|p| p.treatment == s.check).count() as u64;
    uplifts.push((
        s.check.clone(),
        f64::NAN,
        f64::NAN,
        e.b[0],
        e.cov_b[(0, 0)],
        check_count,
    ));
    Ok(FieldFit {
        comparison,
        plots: adjusted,
        treatments: rows,
        hyper: FieldHyper {
            field: field.to_string(),
            plots: n as u64,
            range_m: range_pm,
            range_lo95_m: range_lo,
            range_hi95_m: range_hi,
            spatial_sd: sf_pm,
            noise_sd: sn_pm,
            spatial_share: share_pm,
            log_marginal_likelihood: e.reml,
            warning,
        },
        uplifts,
    })
}

/// Run adjust on the kept plots.
pub fn run(plots: &[PlotStats], s: &FitSettings) -> Result<AdjustOutput, AdjustError> {
    let mut fields: BTreeMap<&str, Vec<&PlotStats>> = BTreeMap::new();
    for p in plots
        .iter()
        .filter(|p| p.status == "kept" && p.yield_mean.is_finite())
    {
        fields.entry(&p.field).or_default().push(p);
    }
    let fits: Vec<(String, Result<FieldFit, String>)> = fields
        .par_iter()
        .map(|(f, ps)| (f.to_string(), fit_field(f, ps, s)))
        .collect();
    let mut out = AdjustOutput {
        comparisons: Vec::new(),
        plots: Vec::new(),
        treatments: Vec::new(),
        hyper: Vec::new(),
        warnings: Vec::new(),
    };
    let mut pool: BTreeMap<String, Vec<(f64, f64, f64, f64, u64)>> = BTreeMap::new();
    for (_, fit) in fits {
        match fit {
            Ok(f) => {
                out.plots.extend(f.plots);
                out.comparisons.push(f.comparison);
                out.treatments.extend(f.treatments);
                if !f.hyper.warning.is_empty() {
                    out.warnings
                        .push(format!("field {}: {}", f.hyper.field, f.hyper.warning));
                }
                out.hyper.push(f.hyper);
                for (t, u, uv, est, v, c) in f.uplifts {
                    pool.entry(t).or_default().push((u, uv, est, v, c));
                }
            }
            Err(w) => out.warnings.push(w),
        }
    }
    if out.hyper.is_empty() {
        return Err(AdjustError::NothingToFit(out.warnings));
    }
    // Pooled rows: inverse-variance weighted over the fields holding the treatment.
    let mut pooled: Vec<TreatmentRow> = pool
        .into_iter()
        .map(|(t, v)| {
            let w_est: f64 = v.iter().map(|x| 1.0 / x.3).sum();
            let est = v.iter().map(|x| x.2 / x.3).sum::<f64>() / w_est;
            let is_check = t == s.check;
            let (up, upv) = if is_check {
                (f64::NAN, f64::NAN)
            } else {
                let w: f64 = v.iter().map(|x| 1.0 / x.1).sum();
                (v.iter().map(|x| x.0 / x.1).sum::<f64>() / w, 1.0 / w)
            };
            let usd = upv.sqrt();
            let esd = (1.0 / w_est).sqrt();
            TreatmentRow {
                field: "all".into(),
                treatment: t.clone(),
                plots: v.iter().map(|x| x.4).sum(),
                estimate: est,
                sd: esd,
                lo95: est - Z95 * esd,
                hi95: est + Z95 * esd,
                uplift: up,
                uplift_sd: usd,
                uplift_lo95: up - Z95 * usd,
                uplift_hi95: up + Z95 * usd,
                p_uplift_gt0: if is_check {
                    f64::NAN
                } else {
                    normal_cdf(up / usd)
                },
                break_even: f64::NAN,
                p_uplift_gt_break_even: f64::NAN,
                expected_net_return_per_ha: f64::NAN,
            }
        })
        .map(|mut r| {
            (
                r.break_even,
                r.p_uplift_gt_break_even,
                r.expected_net_return_per_ha,
            ) = economics(s, &r.treatment, r.uplift, r.uplift_sd);
            r
        })
        .collect();
    pooled.sort_by_key(|r| (r.treatment != s.check, r.treatment.clone()));
    out.treatments.extend(pooled);
    Ok(out)
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
        FitSettings {
            check: "chk".into(),
            blocks: false,
            min_range_m: 0.0,
            max_range_m: 0.0,
            starts_per_axis: 2,
            kernel: Kernel::Matern52,
            grain_price_per_t: 0.0,
            product_cost_per_ha: BTreeMap::new(),
            t_ha_to_unit: 1.0,
        }
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
}
