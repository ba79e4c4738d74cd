//! Random design factors (rows, columns, incomplete blocks) beside the spatial field.
//!
//! A row-column or alpha-lattice design is analysed as designed when its rows and columns
//! (or incomplete blocks) are random effects with their own variances (Gilmour, Cullis &
//! Verbyla 1997, JABES 2:269, fit them beside a spatial term). Here each factor's levels are
//! u_g ~ N(0, s_g^2 I), integrated exactly given the hyperparameters by the mixed-model
//! equations (`spectral::Repr::evaluate_groups`); each s_g has the same penalised-complexity
//! prior as the spatial and noise SDs (P(s_g > 2 x SD of the plot yields) = 0.05).
//!
//! Integration over (ln s_f, ln s_n, ln s_g...) at each length scale: the joint conditional
//! mode (Nelder-Mead, restarted once), the Hessian there by central differences, and a
//! lattice along its principal axes spaced `STEP` standard deviations, grown outward from
//! the mode while points lie within `DROP` of the highest log density found (the grid
//! strategy of Rue, Martino & Chopin 2009, JRSS-B 71:319, section 6.5, with a wider
//! threshold than their 2.5 so that tail probabilities keep their mass). Each layer of the
//! growth is evaluated in parallel and its points kept in a fixed order, so reruns give the
//! same bytes.

use super::field::{FieldModel, Node, Point, PC_ALPHA_LN};
use super::spectral::{Inner, Repr};
use super::*;
use faer::{Mat, Side};

/// Lattice spacing along each principal axis, in posterior SDs.
const STEP: f64 = 1.25;
/// Points whose log density is more than this below the highest are not kept or grown from
/// (4 keeps a Gaussian posterior's points out to 2.8 SD).
const DROP: f64 = 4.0;
/// At most this many steps from the mode along an axis.
const MAX_STEPS: i64 = 30;

impl FieldModel {
    /// log prior of a random factor's SD on the log scale (as [`FieldModel::log_prior_sd`]).
    fn log_prior_group(&self, ls: f64) -> f64 {
        let lam = PC_ALPHA_LN / (2.0 * self.sy);
        lam.ln() - lam * ls.exp() + ls
    }

    /// The node at length scales `l` for a design with random factors (module notes).
    pub(crate) fn node_random(
        &self,
        l: (f64, f64),
        warm: Option<Vec<f64>>,
        repr: Option<Repr>,
    ) -> Node {
        let empty = |repr| Node {
            l,
            lz: f64::NEG_INFINITY,
            points: Vec::new(),
            repr,
            basis: None,
        };
        let Some(repr) = repr else {
            return empty(None);
        };
        let g = self.design.groups.len();
        let k = 2 + g;
        let (lo, hi) = ((1e-4 * self.sy).ln(), (20.0 * self.sy).ln());
        let inside = |t: &[f64]| t.iter().all(|v| *v >= lo && *v <= hi);
        let prior = |t: &[f64]| {
            self.log_prior_sd(t[0], t[1])
                + t[2..].iter().map(|v| self.log_prior_group(*v)).sum::<f64>()
        };
        let sds = |t: &[f64]| -> Vec<f64> { t[2..].iter().map(|v| v.exp()).collect() };
        let eval = |t: &[f64]| -> Option<(f64, Inner)> {
            if !inside(t) {
                return None;
            }
            let e = repr.evaluate_groups(t[0].exp(), t[1].exp(), &sds(t))?;
            Some((e.reml + prior(t), e))
        };
        // The search needs the density only (no covariance).
        let lp = |t: &[f64]| -> f64 {
            if !inside(t) {
                return f64::NEG_INFINITY;
            }
            repr.reml_groups(t[0].exp(), t[1].exp(), &sds(t))
                .map_or(f64::NEG_INFINITY, |reml| reml + prior(t))
        };
        let start = warm.filter(|w| w.len() == k).unwrap_or_else(|| {
            let mut v = vec![(0.7 * self.sy).ln(); 2];
            v.extend(std::iter::repeat_n((0.3 * self.sy).ln(), g));
            v
        });
        let (m1, _) = super::nelder_mead(&|t| -lp(t), &start, 0.4, 400);
        let (mode, _) = super::nelder_mead(&|t| -lp(t), &m1, 0.15, 400);
        let lp0 = lp(&mode);

        if !lp0.is_finite() {
            return empty(Some(repr));
        }
        let (dirs, axis_sd) = principal_axes(&lp, &mode, lp0);
        let at = |z: &[i64]| -> Vec<f64> {
            let mut t = mode.clone();
            for (j, &zj) in z.iter().enumerate() {
                if zj != 0 {
                    for (a, ta) in t.iter_mut().enumerate() {
                        *ta += zj as f64 * STEP * axis_sd[j] * dirs[j][a];
                    }
                }
            }
            t
        };
        let mut visited: BTreeSet<Vec<i64>> = BTreeSet::new();
        let origin = vec![0i64; k];
        visited.insert(origin.clone());
        let mut frontier = vec![origin];
        let mut found: Vec<(Vec<f64>, f64, Inner)> = Vec::new();
        let mut peak = lp0;
        while !frontier.is_empty() {
            let evals: Vec<Option<(f64, Inner)>> =
                frontier.par_iter().map(|z| eval(&at(z))).collect();
            peak = evals.iter().flatten().map(|x| x.0).fold(peak, f64::max);
            let mut next = Vec::new();
            for (z, v) in frontier.iter().zip(evals) {
                let Some((v, fit)) = v else { continue };
                if v <= peak - DROP {
                    continue;
                }
                found.push((at(z), v, fit));
                for j in 0..k {
                    for s in [-1, 1] {
                        let mut nz = z.clone();
                        nz[j] += s;
                        if nz[j].abs() <= MAX_STEPS && visited.insert(nz.clone()) {
                            next.push(nz);
                        }
                    }
                }
            }
            frontier = next;
        }
        let vol: f64 = axis_sd.iter().map(|s| (STEP * s).ln()).sum();
        let (ll0, ll1) = (l.0.ln(), l.1.ln());
        let points: Vec<Point> = found
            .into_iter()
            .filter(|(_, v, _)| *v > peak - DROP)
            .map(|(t, v, fit)| Point {
                lw: v + vol,
                theta: [ll0, ll1, t[0], t[1]],
                groups: t[2..].to_vec(),
                fit,
            })
            .collect();
        Node::new(l, points, repr)
    }
}

/// Principal axes of the log density at its mode (unit vectors) and the SD along each, from
/// the Hessian by central differences; the coordinate axes with conditional SDs where the
/// Hessian is not negative definite. SDs are kept within 0.03..2 on the log scale.
fn principal_axes(lp: &dyn Fn(&[f64]) -> f64, mode: &[f64], lp0: f64) -> (Vec<Vec<f64>>, Vec<f64>) {
    let k = mode.len();
    let h = 0.05;
    let shifted = |moves: &[(usize, f64)]| {
        let mut t = mode.to_vec();
        for &(a, d) in moves {
            t[a] += d;
        }
        lp(&t)
    };
    let mut hess = vec![0.0; k * k];
    for a in 0..k {
        hess[a * k + a] = (shifted(&[(a, h)]) - 2.0 * lp0 + shifted(&[(a, -h)])) / (h * h);
        for b in 0..a {
            let v = (shifted(&[(a, h), (b, h)])
                - shifted(&[(a, h), (b, -h)])
                - shifted(&[(a, -h), (b, h)])
                + shifted(&[(a, -h), (b, -h)]))
                / (4.0 * h * h);
            hess[a * k + b] = v;
            hess[b * k + a] = v;
        }
    }
    let clamp = |curv: f64| {
        if curv.is_finite() && curv > 0.0 {
            (1.0 / curv.sqrt()).clamp(0.03, 2.0)
        } else {
            0.5
        }
    };
    if hess.iter().all(|v| v.is_finite()) {
        let m = Mat::from_fn(k, k, |a, b| -hess[a * k + b]);
        let e = m.self_adjoint_eigen(Side::Lower);
        super::linalg::after_faer();
        if let Ok(e) = e {
            let s = e.S().column_vector();
            if (0..k).all(|j| s[j] > 0.0) {
                let u = e.U();
                return (
                    (0..k)
                        .map(|j| (0..k).map(|a| u[(a, j)]).collect())
                        .collect(),
                    (0..k).map(|j| clamp(s[j])).collect(),
                );
            }
        }
    }
    (
        (0..k)
            .map(|j| (0..k).map(|a| if a == j { 1.0 } else { 0.0 }).collect())
            .collect(),
        (0..k).map(|j| clamp(-hess[j * k + j])).collect(),
    )
}

/// Posterior summaries of each random factor's SD (kg/ha) from weighted points, in the
/// order of the design's groups.
pub(crate) fn group_summaries(pts: &[(f64, &[f64])]) -> Vec<Summary> {
    let g = pts.first().map_or(0, |p| p.1.len());
    (0..g)
        .map(|j| Summary::from_weighted(pts.iter().map(|(w, t)| (t[j].exp(), *w)).collect()))
        .collect()
}

/// The same mean model without the spatial field: the random factors' SDs and the noise SD
/// at their REML estimates (the usual row-column or incomplete-block analysis). Returns the
/// fit (fixed estimates with the factors' BLUPs, their covariance) or None.
pub(crate) fn fit_without_spatial(d: &spectral::Design, sy: f64) -> Option<Inner> {
    let repr = Repr::white(d);
    let g = d.groups.len();
    let (lo, hi) = ((1e-4 * sy).ln(), (20.0 * sy).ln());
    let reml = |t: &[f64]| -> f64 {
        if t.iter().any(|v| *v < lo || *v > hi) {
            return f64::NEG_INFINITY;
        }
        let sg: Vec<f64> = t[1..].iter().map(|v| v.exp()).collect();
        repr.reml_groups(0.0, t[0].exp(), &sg)
            .unwrap_or(f64::NEG_INFINITY)
    };
    let mut start = vec![(0.7 * sy).ln()];
    start.extend(std::iter::repeat_n((0.3 * sy).ln(), g));
    let (m1, _) = super::nelder_mead(&|t| -reml(t), &start, 0.4, 600);
    let (mode, _) = super::nelder_mead(&|t| -reml(t), &m1, 0.15, 600);
    let sg: Vec<f64> = mode[1..].iter().map(|v| v.exp()).collect();
    repr.evaluate_groups(0.0, mode[0].exp(), &sg)
}
