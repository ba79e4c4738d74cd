//! Rate trials: response curves fitted with the spatial model, their average, and the rate
//! that pays best with its uncertainty.
//!
//! At one point of the hyperparameter posterior each field speaks to the treatment contrasts
//! only through its GLS estimates, c_f ~ N(delta_f, V_f) (see `joint`). A response curve makes
//! the product effects a function of the rate, beta_k = g(u_k) - g(u_check), on the scaled
//! rate u = (r - r_lo) / (r_hi - r_lo) (the lowest and highest rates tested), with g linear
//! in one or two coefficients once the plateau's join point x is given:
//!
//!   quadratic           g(u) = b1 u + b2 u^2
//!   linear-plateau      g(u) = b min(u, x) / x
//!   quadratic-plateau   g(u) = b (1 - (1 - min(u, x) / x)^2)
//!
//! (Cerrato & Blackmer 1990, Agronomy Journal 82:138-143; the quadratic-plateau joins with
//! zero slope). Each coefficient has the prior N(0, tau^2), tau the weak prior SD of the
//! product effects, so b is the rise from the lowest rate to the plateau (or to u = 1), and
//! the join point is on a grid over (0, 1.5] with equal prior weight (x > 1: the plateau lies
//! beyond the highest rate tested). Given the hyperparameters and x the coefficients are
//! Gaussian and the marginal likelihood exact: the Woodbury sums of `joint::combine` with
//! beta = A(x) b. A curve's hyperparameter posterior is the unordered-treatment model's,
//! reweighted by exp(log C_curve - log C_treatments) at each point (exact on a field's
//! lattice; a joint fit's importance draws are reweighted alike), and the sum of those weights
//! is the curve's Bayes factor against unordered treatments. The three curves are averaged
//! with equal prior probabilities.
//!
//! The optimum, the net return and the flat top are non-linear in the curve, so they are
//! summarised over seeded draws from the mixture (the same bytes on a rerun).

use super::joint::FieldMap;
use super::linalg;
use super::spectral::Inner;
use super::RateSettings;
use crate::util::Rng;

/// The response curves.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Curve {
    Quadratic,
    QuadraticPlateau,
    LinearPlateau,
}

impl Curve {
    pub const ALL: [Curve; 3] = [
        Curve::Quadratic,
        Curve::QuadraticPlateau,
        Curve::LinearPlateau,
    ];

    /// The name in the tables.
    pub fn name(self) -> &'static str {
        match self {
            Curve::Quadratic => "quadratic",
            Curve::QuadraticPlateau => "quadratic_plateau",
            Curve::LinearPlateau => "linear_plateau",
        }
    }

    /// Coefficients.
    fn q(self) -> usize {
        match self {
            Curve::Quadratic => 2,
            _ => 1,
        }
    }

    /// The curve's basis at scaled rate `u` with join `x` (0 at u = 0).
    pub fn basis(self, u: f64, x: f64) -> [f64; 2] {
        match self {
            Curve::Quadratic => [u, u * u],
            Curve::LinearPlateau => [u.min(x) / x, 0.0],
            Curve::QuadraticPlateau => {
                let t = 1.0 - u.min(x) / x;
                [1.0 - t * t, 0.0]
            }
        }
    }

    /// Join points with their prior weight (the quadratic has none: one node of weight 1).
    fn joins(self) -> Vec<f64> {
        match self {
            Curve::Quadratic => vec![f64::NAN],
            _ => (1..=JOINS)
                .map(|i| i as f64 * JOIN_MAX / JOINS as f64)
                .collect(),
        }
    }
}

/// Join points on the scaled rate, up to `JOIN_MAX` (half the tested range beyond the
/// highest rate: a plateau further out is not told apart from a line within the range).
const JOINS: usize = 30;
const JOIN_MAX: f64 = 1.5;

/// One point of a posterior over hyperparameters: its weight, each field's GLS fit, the
/// interaction SD and the unordered-treatment model's log C there.
pub struct PostPoint<'a> {
    pub w: f64,
    pub fits: Vec<&'a Inner>,
    pub s: f64,
    pub log_c: f64,
}

/// The rates of a fit: each global product's scaled rate, the check's, and the range.
#[derive(Clone, Debug)]
pub struct RateDesign {
    pub u: Vec<f64>,
    pub uc: f64,
    pub lo: f64,
    pub hi: f64,
}

impl RateDesign {
    /// From the products' and the check's rates.
    pub fn new(product_rates: &[f64], check_rate: f64) -> RateDesign {
        let lo = product_rates.iter().copied().fold(check_rate, f64::min);
        let hi = product_rates.iter().copied().fold(check_rate, f64::max);
        let span = (hi - lo).max(f64::MIN_POSITIVE);
        RateDesign {
            u: product_rates.iter().map(|r| (r - lo) / span).collect(),
            uc: (check_rate - lo) / span,
            lo,
            hi,
        }
    }
    pub fn rate(&self, u: f64) -> f64 {
        self.lo + u * (self.hi - self.lo)
    }
}

/// A Gaussian piece of a curve's posterior: curve, join, log weight (including the Bayes
/// factor against unordered treatments), coefficient mean and Cholesky factor.
#[derive(Clone, Debug)]
pub struct Piece {
    pub curve: Curve,
    pub x: f64,
    pub log_w: f64,
    pub mean: [f64; 2],
    pub chol: [f64; 3],
}

/// One field's terms at a point: W^-1, W^-1 c and log N(c; 0, W), W = V + s^2 I.
struct Terms {
    d: usize,
    wi: Vec<f64>,
    wic: Vec<f64>,
    log_n: f64,
}

fn terms(fit: &Inner, d: usize, s: f64) -> Option<Terms> {
    let p = (fit.cov.len() as f64).sqrt().round() as usize;
    let idx: Vec<usize> = (1..=d).collect();
    let c: Vec<f64> = idx.iter().map(|&i| fit.b[i]).collect();
    let mut w = linalg::sub(&fit.cov, p, &idx);
    for a in 0..d {
        w[a * d + a] += s * s;
    }
    let l = linalg::chol(&w, d)?;
    let mut wic = c.clone();
    linalg::solve(&l, d, &mut wic);
    let ln2pi = (2.0 * std::f64::consts::PI).ln();
    let log_n = -0.5
        * (d as f64 * ln2pi
            + linalg::logdet(&l, d)
            + c.iter().zip(&wic).map(|(x, y)| x * y).sum::<f64>());
    Some(Terms {
        d,
        wi: linalg::inverse(&l, d),
        wic,
        log_n,
    })
}

/// The curve pieces at one posterior point, every curve and join.
fn pieces_at(pt: &PostPoint, maps: &[FieldMap], rd: &RateDesign, tau2: f64) -> Vec<Piece> {
    let ts: Option<Vec<Terms>> = pt
        .fits
        .iter()
        .zip(maps)
        .map(|(fit, m)| terms(fit, m.index.len(), pt.s))
        .collect();
    let Some(ts) = ts else {
        return Vec::new();
    };
    let log_n: f64 = ts.iter().map(|t| t.log_n).sum();
    let mut out = Vec::new();
    for curve in Curve::ALL {
        let joins = curve.joins();
        let lprior = -(joins.len() as f64).ln();
        let q = curve.q();
        for x in joins {
            let bc = curve.basis(rd.uc, x);
            let a: Vec<[f64; 2]> =
                rd.u.iter()
                    .map(|&u| {
                        let b = curve.basis(u, x);
                        [b[0] - bc[0], b[1] - bc[1]]
                    })
                    .collect();
            let mut prec = [1.0 / tau2, 0.0, if q == 2 { 1.0 / tau2 } else { 1.0 }];
            let mut h = [0.0; 2];
            for (t, m) in ts.iter().zip(maps) {
                let d = t.d;
                for i in 0..d {
                    let ai = a[m.index[i]];
                    h[0] += ai[0] * t.wic[i];
                    h[1] += ai[1] * t.wic[i];
                    for j in 0..d {
                        let aj = a[m.index[j]];
                        let wij = t.wi[i * d + j];
                        prec[0] += ai[0] * wij * aj[0];
                        prec[1] += ai[1] * wij * aj[0];
                        prec[2] += ai[1] * wij * aj[1];
                    }
                }
            }
            if q == 1 {
                prec[1] = 0.0;
                prec[2] = 1.0;
                h[1] = 0.0;
            }
            // Cholesky of the 2 x 2 precision [p0 p1; p1 p2].
            let l0 = prec[0].sqrt();
            let l1 = prec[1] / l0;
            let l2 = (prec[2] - l1 * l1).sqrt();
            if !(l0 > 0.0 && l2 > 0.0) {
                continue;
            }
            let z0 = h[0] / l0;
            let z1 = (h[1] - l1 * z0) / l2;
            let m1 = z1 / l2;
            let m0 = (z0 - l1 * m1) / l0;
            let logdet = 2.0 * (l0.ln() + l2.ln());
            let log_c = log_n - 0.5 * (q as f64 * tau2.ln() + logdet - (z0 * z0 + z1 * z1));
            // Covariance = Prec^-1 and its Cholesky factor.
            let det = prec[0] * prec[2] - prec[1] * prec[1];
            let (c0, c1, c2) = (prec[2] / det, -prec[1] / det, prec[0] / det);
            let k0 = c0.sqrt();
            let k1 = c1 / k0;
            let k2 = if q == 2 {
                (c2 - k1 * k1).max(0.0).sqrt()
            } else {
                0.0
            };
            out.push(Piece {
                curve,
                x,
                log_w: pt.w.ln() + lprior + log_c - pt.log_c,
                mean: [m0, if q == 2 { m1 } else { 0.0 }],
                chol: [k0, if q == 2 { k1 } else { 0.0 }, k2],
            });
        }
    }
    out
}

/// Every piece of every point (points in parallel, in order).
pub fn pieces(points: &[PostPoint], maps: &[FieldMap], rd: &RateDesign, tau: f64) -> Vec<Piece> {
    use rayon::prelude::*;
    points
        .par_iter()
        .map(|pt| pieces_at(pt, maps, rd, tau * tau))
        .collect::<Vec<_>>()
        .into_iter()
        .flatten()
        .filter(|p| p.log_w.is_finite())
        .collect()
}

/// log of the sum of exp over `v`.
fn log_sum(v: impl Iterator<Item = f64>) -> f64 {
    super::field::log_sum_exp(v)
}

/// Each curve's log Bayes factor against unordered treatments.
pub fn log_bayes_factors(ps: &[Piece]) -> [f64; 3] {
    Curve::ALL.map(|c| log_sum(ps.iter().filter(|p| p.curve == c).map(|p| p.log_w)))
}

/// Prices and scales the summaries need.
#[derive(Clone, Debug)]
pub struct Economics {
    /// Grain price per kg (0 = none: the objective is the yield).
    pub price_per_kg: f64,
    /// Cost per hectare of one rate unit (0 = none).
    pub cost_per_ha: f64,
    pub current: Option<f64>,
    /// Net return (or, without a grain price, kg/ha of yield) within which rates are
    /// near the best.
    pub within: f64,
}

impl Economics {
    /// From the settings and the trial's mean yield (kg/ha), grain price per tonne.
    pub fn new(r: &RateSettings, grain_price_per_t: f64, mean_yield: f64) -> Economics {
        let price_per_kg = grain_price_per_t.max(0.0) / 1000.0;
        let cost = if r.cost_per_ha.is_finite() {
            r.cost_per_ha
        } else {
            0.0
        };
        let within = if r.flat_top_within_per_ha > 0.0 && price_per_kg > 0.0 {
            r.flat_top_within_per_ha
        } else if price_per_kg > 0.0 {
            0.01 * mean_yield * price_per_kg
        } else {
            0.01 * mean_yield
        };
        Economics {
            price_per_kg,
            cost_per_ha: if price_per_kg > 0.0 { cost } else { 0.0 },
            current: r.current,
            within,
        }
    }
}

/// Draws from the curve's posterior and what they say.
#[derive(Clone, Debug, Default)]
pub struct CurveSummary {
    /// Posterior probability of the curve (1 for the average).
    pub probability: f64,
    pub log_bayes_factor: f64,
    /// The rate that maximises the expected objective (net return, or yield without prices).
    pub optimum: f64,
    /// Quantiles of the draws' optima: 5, 95, 2.5, 97.5 %.
    pub optimum_q: [f64; 4],
    /// Share of draws whose optimum is the highest rate tested (the curve still pays there).
    pub p_at_highest: f64,
    pub gain_at_optimum: f64,
    pub net_return_at_optimum: f64,
    pub p_optimum_beats_lowest: f64,
    pub p_optimum_beats_current: f64,
    pub flat_top: (f64, f64),
    /// On the grid: rate, gain mean, lo95, hi95, net return mean, lo95, hi95,
    /// P(beats lowest), P(beats current).
    pub grid: Vec<[f64; 9]>,
}

/// Grid of scaled rates the optimum is searched on.
const GRID: usize = 400;
/// Draws per summary.
pub const DRAWS: usize = 4000;

/// Summarise the pieces (already restricted to what the row covers): `DRAWS` seeded draws of
/// the curve, each evaluated on the grid.
/// With `bands`, the curve's band on every tenth grid rate and at each rate tested.
pub fn summarise(
    ps: &[Piece],
    rd: &RateDesign,
    e: &Economics,
    seed: u64,
    bands: bool,
) -> CurveSummary {
    let top = log_sum(ps.iter().map(|p| p.log_w));
    let mut cdf = Vec::with_capacity(ps.len());
    let mut acc = 0.0;
    for p in ps {
        acc += (p.log_w - top).exp();
        cdf.push(acc);
    }
    // The grid: GRID + 1 even steps, the rates tested and the current rate exactly; bands
    // on every tenth step and at the rates tested.
    let to_u = |r: f64| ((r - rd.lo) / (rd.hi - rd.lo)).clamp(0.0, 1.0);
    let mut pts: Vec<(f64, bool)> = (0..=GRID)
        .map(|i| (i as f64 / GRID as f64, bands && i % 10 == 0))
        .collect();
    pts.extend(
        rd.u.iter()
            .chain(std::iter::once(&rd.uc))
            .map(|&u| (u, bands)),
    );
    if let Some(c) = e.current {
        pts.push((to_u(c), false));
    }
    pts.sort_by(|a, b| a.0.total_cmp(&b.0));
    let mut merged: Vec<(f64, bool)> = Vec::with_capacity(pts.len());
    for (u, b) in pts {
        match merged.last_mut() {
            Some(last) if (u - last.0).abs() < 1e-12 => last.1 |= b,
            _ => merged.push((u, b)),
        }
    }
    let us: Vec<f64> = merged.iter().map(|x| x.0).collect();
    let last = us.len() - 1;
    let rates: Vec<f64> = us.iter().map(|&u| rd.rate(u)).collect();
    let cur_i = e.current.map(|c| {
        let u = to_u(c);
        us.iter().position(|&x| (x - u).abs() < 1e-12).unwrap_or(0)
    });
    let money = e.price_per_kg > 0.0;
    let mut rng = Rng::new(seed);
    let mut gains = vec![vec![0.0; DRAWS]; us.len()];
    let mut opt = Vec::with_capacity(DRAWS);
    let objective = |g: f64, r: f64| {
        if money {
            e.price_per_kg * g - e.cost_per_ha * (r - rd.lo)
        } else {
            g
        }
    };
    for k in 0..DRAWS {
        let v = rng.uniform() * acc;
        let i = cdf.partition_point(|&c| c < v).min(ps.len() - 1);
        let p = &ps[i];
        let (z0, z1) = (rng.normal(), rng.normal());
        let b0 = p.mean[0] + p.chol[0] * z0;
        let b1 = p.mean[1] + p.chol[1] * z0 + p.chol[2] * z1;
        let mut best = (f64::NEG_INFINITY, 0);
        for (j, &u) in us.iter().enumerate() {
            let bs = p.curve.basis(u, p.x);
            let g = b0 * bs[0] + b1 * bs[1];
            gains[j][k] = g;
            let o = objective(g, rates[j]);
            if o > best.0 + 1e-12 {
                best = (o, j);
            }
        }
        opt.push(best.1);
    }
    let obj: Vec<Vec<f64>> = gains
        .iter()
        .zip(&rates)
        .map(|(g, &r)| g.iter().map(|&x| objective(x, r)).collect())
        .collect();
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    let mean_obj: Vec<f64> = obj.iter().map(|o| mean(o)).collect();
    let jopt = (0..us.len()).fold(0, |b, j| {
        if mean_obj[j] > mean_obj[b] + 1e-12 {
            j
        } else {
            b
        }
    });
    let share =
        |f: &dyn Fn(usize) -> bool| (0..DRAWS).filter(|&k| f(k)).count() as f64 / DRAWS as f64;
    let mut optima: Vec<f64> = opt.iter().map(|&j| rates[j]).collect();
    optima.sort_by(f64::total_cmp);
    let q = |p: f64| quantile_sorted(&optima, p);
    // The flat top: the rates around the optimum whose expected objective is within reach.
    let near = |j: usize| mean_obj[j] >= mean_obj[jopt] - e.within;
    let (mut a, mut b) = (jopt, jopt);
    while a > 0 && near(a - 1) {
        a -= 1;
    }
    while b < last && near(b + 1) {
        b += 1;
    }
    let nr = |j: usize, k: usize| {
        if money {
            obj[j][k]
        } else {
            f64::NAN
        }
    };
    let at: Vec<usize> = (0..us.len()).filter(|&j| merged[j].1).collect();
    let grid = at
        .into_iter()
        .map(|j| {
            let mut g = gains[j].clone();
            g.sort_by(f64::total_cmp);
            let mut n: Vec<f64> = (0..DRAWS).map(|k| nr(j, k)).collect();
            n.sort_by(f64::total_cmp);
            let beats_cur = cur_i.map_or(f64::NAN, |c| share(&|k| obj[j][k] > obj[c][k]));
            [
                rates[j],
                mean(&gains[j]),
                quantile_sorted(&g, 0.025),
                quantile_sorted(&g, 0.975),
                if money { mean(&n) } else { f64::NAN },
                quantile_sorted(&n, 0.025),
                quantile_sorted(&n, 0.975),
                share(&|k| obj[j][k] > 0.0),
                beats_cur,
            ]
        })
        .collect();
    CurveSummary {
        probability: 1.0,
        log_bayes_factor: top,
        optimum: rates[jopt],
        optimum_q: [q(0.05), q(0.95), q(0.025), q(0.975)],
        p_at_highest: share(&|k| opt[k] == last),
        gain_at_optimum: mean(&gains[jopt]),
        net_return_at_optimum: if money { mean_obj[jopt] } else { f64::NAN },
        p_optimum_beats_lowest: share(&|k| obj[jopt][k] > 0.0),
        p_optimum_beats_current: cur_i.map_or(f64::NAN, |c| share(&|k| obj[jopt][k] > obj[c][k])),
        flat_top: (rates[a], rates[b]),
        grid,
    }
}

/// The `q` quantile of sorted values, interpolated between neighbours (NaN when any is NaN).
fn quantile_sorted(v: &[f64], q: f64) -> f64 {
    if v.is_empty() || v.iter().any(|x| x.is_nan()) {
        return f64::NAN;
    }
    let h = (v.len() - 1) as f64 * q;
    let (i, f) = (h.floor() as usize, h - h.floor());
    if i + 1 < v.len() {
        v[i] + f * (v[i + 1] - v[i])
    } else {
        v[i]
    }
}
