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
/// The spacing of the joins: a draw takes its join uniformly within its node's cell.
pub const JOIN_STEP: f64 = JOIN_MAX / JOINS as f64;

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
    /// The treatment x field interaction SD at the piece's point (0 for a field alone).
    pub s: f64,
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
/// Each curve and join: its log prior weight and the products' contrasts per coefficient.
type Designs = Vec<(Curve, f64, f64, Vec<[f64; 2]>)>;

fn designs(rd: &RateDesign) -> Designs {
    let mut out = Vec::new();
    for curve in Curve::ALL {
        let joins = curve.joins();
        let lprior = -(joins.len() as f64).ln();
        for x in joins {
            let bc = curve.basis(rd.uc, x);
            let a =
                rd.u.iter()
                    .map(|&u| {
                        let b = curve.basis(u, x);
                        [b[0] - bc[0], b[1] - bc[1]]
                    })
                    .collect();
            out.push((curve, x, lprior, a));
        }
    }
    out
}

fn pieces_at(pt: &PostPoint, maps: &[FieldMap], designs: &Designs, tau2: f64) -> Vec<Piece> {
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
    let mut out = Vec::with_capacity(designs.len());
    for (curve, x, lprior, a) in designs {
        let (curve, x, lprior) = (*curve, *x, *lprior);
        let q = curve.q();
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
            s: pt.s,
        });
    }
    out
}

/// Every piece of every point (points in parallel, in order).
pub fn pieces(points: &[PostPoint], maps: &[FieldMap], rd: &RateDesign, tau: f64) -> Vec<Piece> {
    use rayon::prelude::*;
    let designs = designs(rd);
    let mut out: Vec<Piece> = points
        .par_iter()
        .map(|pt| pieces_at(pt, maps, &designs, tau * tau))
        .collect::<Vec<_>>()
        .into_iter()
        .flatten()
        .filter(|p| p.log_w.is_finite())
        .collect();
    // Pieces below e^-25 of their curve's heaviest carry nothing any summary can show.
    let top = Curve::ALL.map(|c| {
        out.iter()
            .filter(|p| p.curve == c)
            .map(|p| p.log_w)
            .fold(f64::NEG_INFINITY, f64::max)
    });
    out.retain(|p| p.log_w > top[p.curve as usize] - 25.0);
    out
}

/// log of the sum of exp over `v`.
fn log_sum(v: impl Iterator<Item = f64>) -> f64 {
    super::field::log_sum_exp(v)
}

/// Each curve's log Bayes factor against unordered treatments.
pub fn log_bayes_factors(ps: &[Piece]) -> [f64; 3] {
    Curve::ALL.map(|c| log_sum(ps.iter().filter(|p| p.curve == c).map(|p| p.log_w)))
}

pub use super::response_draws::*;
