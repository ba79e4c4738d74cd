//! One field's model and the numerical integration over its hyperparameters.
//!
//! Hyperparameters, all on the log scale: the length scale (one, or one along and one across
//! the plot grid with anisotropy), the spatial SD s_f and the noise SD s_n. Priors are
//! penalised-complexity priors (Fuglstad et al. 2019, JASA 114:445): in 2-D, 1/l ~ Exp(l1) with
//! l1 = -ln(0.05) x rho0, so P(l < rho0) = 0.05, rho0 = the smallest distance between plot
//! centres (per axis with anisotropy: a simplification, each axis with its own smallest
//! spacing); each SD ~ Exp(l2) with P(SD > 2 x SD of the plot yields) = 0.05.
//!
//! Integration (in the spirit of Rue, Martino & Chopin 2009, JRSS-B 71:319): the length
//! scale on a lattice in log space, coarse over its bounds and then refined (three times finer
//! in 1-D, twice in 2-D) over the box holding the mass; at each length scale the kernel is put
//! in spectral form once (see `spectral`) and (s_f, s_n) are integrated on a lattice around
//! their conditional mode, spaced 0.75 conditional SDs and widened until its edges hold less
//! than 1e-4 of the peak. Every point carries its weight (prior x likelihood x cell volume).

use super::spectral::{Design, Inner, Method, Repr};
use rayon::prelude::*;
use std::collections::BTreeMap;

/// -ln(0.05): the PC priors' tail probability 0.05 on the log scale.
pub const PC_ALPHA_LN: f64 = 2.995_732_273_553_991;

/// One point of the (s_f, s_n) lattice at a length scale.
#[derive(Clone, Debug)]
pub struct Point {
    /// log prior of (s_f, s_n) + REML + log cell volume (without the length scale's prior).
    pub lw: f64,
    /// ln l0, ln l1, ln s_f, ln s_n.
    pub theta: [f64; 4],
    /// ln SD of each random design factor (none without them).
    pub groups: Vec<f64>,
    pub fit: Inner,
}

/// All points at one length scale.
pub struct Node {
    /// Length scales (l0, l1), metres (equal without anisotropy).
    pub l: (f64, f64),
    /// log Sum exp(lw) over the points.
    pub lz: f64,
    pub points: Vec<Point>,
    pub repr: Option<Repr>,
    /// Reduced rank: basis functions per axis and whether the size cap bound.
    pub basis: Option<(usize, usize, bool)>,
}

impl Node {
    /// The node at length scales `l` holding `points` of the representation `repr`.
    pub fn new(l: (f64, f64), points: Vec<Point>, repr: Repr) -> Node {
        Node {
            l,
            lz: log_sum_exp(points.iter().map(|p| p.lw)),
            points,
            basis: repr.basis,
            repr: Some(repr),
        }
    }
}

/// A field ready to fit.
pub struct FieldModel {
    pub name: String,
    pub design: Design,
    /// Check first, then the products in order.
    pub treatments: Vec<String>,
    pub sy: f64,
    pub dmin: f64,
    pub anisotropic: bool,
    /// Log bounds of the length scale per axis.
    pub bounds: [(f64, f64); 2],
    /// Smallest spacing per axis (the PC prior's rho0).
    pub rho0: (f64, f64),
    pub method: Method,
    pub nodes: BTreeMap<(i64, i64), Node>,
}

impl FieldModel {
    /// log prior of the length scale(s) on the log scale.
    pub fn log_prior_range(&self, l: (f64, f64), rho0: (f64, f64)) -> f64 {
        let one = |l: f64, r0: f64| {
            let lam = PC_ALPHA_LN * r0;
            lam.ln() - lam / l - l.ln()
        };
        if self.anisotropic {
            one(l.0, rho0.0) + one(l.1, rho0.1)
        } else {
            one(l.0, rho0.0)
        }
    }

    /// log prior of (s_f, s_n) on the log scale.
    pub fn log_prior_sd(&self, lsf: f64, lsn: f64) -> f64 {
        let lam = PC_ALPHA_LN / (2.0 * self.sy);
        2.0 * lam.ln() - lam * (lsf.exp() + lsn.exp()) + lsf + lsn
    }

    /// Builds the spectral form at length scales `l`.
    pub fn repr(&self, l: (f64, f64)) -> Option<Repr> {
        match self.method {
            Method::Exact => Repr::exact(&self.design, l),
            Method::Hsgp {
                max_basis,
                min_boundary,
            } => Repr::hsgp(&self.design, l, max_basis, min_boundary),
        }
    }

    /// Integrates (s_f, s_n) at length scales `l` (see the module notes), with the SDs of
    /// random design factors when the design has them (see `random`). `warm` is a nearby
    /// conditional mode to start the search from.
    pub fn node(&self, l: (f64, f64), warm: Option<Vec<f64>>) -> Node {
        self.node_from(l, warm, self.repr(l))
    }

    /// [`FieldModel::node`] from the spectral form at `l` built beforehand.
    pub fn node_from(&self, l: (f64, f64), warm: Option<Vec<f64>>, repr: Option<Repr>) -> Node {
        if !self.design.groups.is_empty() {
            return self.node_random(l, warm, repr);
        }
        let warm = warm.map(|w| [w[0], w[1]]);
        let Some(repr) = repr else {
            return Node {
                l,
                lz: f64::NEG_INFINITY,
                points: Vec::new(),
                repr: None,
                basis: None,
            };
        };
        let (lo, hi) = ((1e-4 * self.sy).ln(), (20.0 * self.sy).ln());
        let lp = |t: &[f64]| -> f64 {
            if t.iter().any(|v| *v < lo || *v > hi) {
                return f64::NEG_INFINITY;
            }
            match repr.reml_groups(t[0].exp(), t[1].exp(), &[]) {
                Some(reml) => reml + self.log_prior_sd(t[0], t[1]),
                None => f64::NEG_INFINITY,
            }
        };
        let start = warm.unwrap_or([(0.7 * self.sy).ln(), (0.7 * self.sy).ln()]);
        let (mode, _) = super::nelder_mead(&|t| -lp(t), &start, 0.4, 200);
        let lp0 = lp(&mode);
        let h = 0.05;
        let sd: Vec<f64> = (0..2)
            .map(|k| {
                let mut up = mode.clone();
                let mut dn = mode.clone();
                up[k] += h;
                dn[k] -= h;
                let d2 = (lp(&up) - 2.0 * lp0 + lp(&dn)) / (h * h);
                if d2.is_finite() && d2 < 0.0 {
                    (1.0 / (-d2).sqrt()).clamp(0.03, 2.0)
                } else {
                    0.5
                }
            })
            .collect();
        let step = [0.75 * sd[0], 0.75 * sd[1]];
        // The lattice i, j in [lo_k, hi_k], widened by 3 on a side whose edge holds more than
        // 1e-4 of the peak (at most 30 steps from the mode).
        let mut ext = [[-4i64, 4], [-4, 4]];
        let mut cache: BTreeMap<(i64, i64), Option<(f64, Inner)>> = BTreeMap::new();
        let at = |i: i64, j: i64| [mode[0] + i as f64 * step[0], mode[1] + j as f64 * step[1]];
        for _ in 0..12 {
            // The new points of the lattice, evaluated in parallel (each on its own).
            let new: Vec<(i64, i64)> = (ext[0][0]..=ext[0][1])
                .flat_map(|i| (ext[1][0]..=ext[1][1]).map(move |j| (i, j)))
                .filter(|k| !cache.contains_key(k))
                .collect();
            let values: Vec<Option<(f64, Inner)>> = new
                .par_iter()
                .map(|&(i, j)| {
                    let t = at(i, j);
                    if t.iter().any(|v| *v < lo || *v > hi) {
                        return None;
                    }
                    let e = repr.evaluate(t[0].exp(), t[1].exp())?;
                    Some((e.reml + self.log_prior_sd(t[0], t[1]), e))
                })
                .collect();
            cache.extend(new.into_iter().zip(values));
            let value = |i: i64, j: i64| {
                cache
                    .get(&(i, j))
                    .and_then(|v| v.as_ref().map(|x| x.0))
                    .unwrap_or(f64::NEG_INFINITY)
            };
            let peak = cache
                .values()
                .filter_map(|v| v.as_ref().map(|x| x.0))
                .fold(f64::NEG_INFINITY, f64::max);
            let mut grow = [[false; 2]; 2];
            for (axis, g) in grow.iter_mut().enumerate() {
                for (side, gs) in g.iter_mut().enumerate() {
                    let fixed = ext[axis][side];
                    let (a, b) = (ext[1 - axis][0], ext[1 - axis][1]);
                    let e = (a..=b)
                        .map(|o| {
                            if axis == 0 {
                                value(fixed, o)
                            } else {
                                value(o, fixed)
                            }
                        })
                        .fold(f64::NEG_INFINITY, f64::max);
                    *gs = e > peak - 9.2 && fixed.abs() < 30;
                }
            }
            if !grow.iter().flatten().any(|g| *g) {
                break;
            }
            for axis in 0..2 {
                if grow[axis][0] {
                    ext[axis][0] -= 3;
                }
                if grow[axis][1] {
                    ext[axis][1] += 3;
                }
            }
        }
        let vol = (step[0] * step[1]).ln();
        let (ll0, ll1) = (l.0.ln(), l.1.ln());
        let mut points: Vec<Point> = cache
            .into_iter()
            .filter_map(|((i, j), v)| {
                let (v, fit) = v?;
                Some(Point {
                    lw: v + vol,
                    theta: [
                        ll0,
                        ll1,
                        mode[0] + i as f64 * step[0],
                        mode[1] + j as f64 * step[1],
                    ],
                    groups: Vec::new(),
                    fit,
                })
            })
            .collect();
        let top = points
            .iter()
            .map(|p| p.lw)
            .fold(f64::NEG_INFINITY, f64::max);
        points.retain(|p| p.lw > top - 16.0);
        Node::new(l, points, repr)
    }

    /// The conditional mode of (ln s_f, ln s_n, ln SDs of random factors) at a node: a warm
    /// start for its neighbour.
    pub fn node_mode(node: &Node) -> Option<Vec<f64>> {
        node.points
            .iter()
            .max_by(|a, b| a.lw.total_cmp(&b.lw))
            .map(|p| {
                [p.theta[2], p.theta[3]]
                    .into_iter()
                    .chain(p.groups.iter().copied())
                    .collect()
            })
    }
}

/// log Sum exp(v), -inf for none.
pub fn log_sum_exp(v: impl Iterator<Item = f64>) -> f64 {
    let v: Vec<f64> = v.collect();
    let m = v.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    if !m.is_finite() {
        return m;
    }
    m + v.iter().map(|x| (x - m).exp()).sum::<f64>().ln()
}

/// The lattice of length-scale nodes: coarse over the bounds, then refined where the mass is.
/// `dims` is 1 or 2; `masses` evaluates a batch of lattice nodes (integer coordinates on the
/// fine lattice) and returns each one's log mass (prior + log Z); it is also given, when
/// nodes may be let go, the nodes that stay (every other node's spectral form is freed).
/// Returns the fine nodes kept, the fine spacing per axis and whether the mass touches a
/// bound. `eager`: the fine walk evaluates both neighbours of a node at once (see [`walk`]).
///
/// One axis: a walk over the coarse nodes (`coarse_walk`), then the same walk over the fine
/// nodes from the best coarse one (`fine_walk`): the fine nodes kept are a run from the one
/// below to the one above those within e^10 of the highest. Two axes: every coarse node,
/// then every fine node of the box one coarse step beyond the coarse nodes within e^10.
pub fn range_lattice(
    dims: usize,
    bounds: [(f64, f64); 2],
    coarse: usize,
    eager: bool,
    masses: &mut dyn FnMut(&[(i64, i64)], Option<&[(i64, i64)]>) -> Vec<f64>,
) -> (Vec<(i64, i64)>, [f64; 2], [bool; 2]) {
    let refine: i64 = if dims == 1 { 3 } else { 2 };
    let nc = coarse.max(3) as i64;
    let h: Vec<f64> = (0..2)
        .map(|d| (bounds[d].1 - bounds[d].0) / ((nc - 1) * refine) as f64)
        .collect();
    let maxc = (nc - 1) * refine;
    if dims == 1 {
        let (coarse_nodes, m) = coarse_walk(nc, refine, masses);
        let (keys, at_bound) = fine_walk(&coarse_nodes, &m, refine, maxc, eager, masses);
        return (keys, [h[0], h[1]], [at_bound, false]);
    }
    let coarse_nodes: Vec<(i64, i64)> = (0..nc)
        .flat_map(|i| (0..nc).map(move |j| (i * refine, j * refine)))
        .collect();
    let m = masses(&coarse_nodes, None);
    let top = m.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let sig: Vec<(i64, i64)> = coarse_nodes
        .iter()
        .zip(&m)
        .filter(|(_, v)| **v > top - 10.0)
        .map(|(n, _)| *n)
        .collect();
    let span = |f: fn(&(i64, i64)) -> i64| {
        (
            (sig.iter().map(f).min().unwrap_or(0) - refine).max(0),
            (sig.iter().map(f).max().unwrap_or(maxc) + refine).min(maxc),
        )
    };
    let ((lo0, hi0), (lo1, hi1)) = (span(|n| n.0), span(|n| n.1));
    let fine: Vec<(i64, i64)> = (lo0..=hi0)
        .flat_map(|i| (lo1..=hi1).map(move |j| (i, j)))
        .collect();
    let new: Vec<(i64, i64)> = fine
        .iter()
        .filter(|n| !coarse_nodes.contains(n))
        .cloned()
        .collect();
    // The coarse nodes that stay in the lattice, so that the others can free their forms
    // before the new nodes are evaluated.
    let kept: Vec<(i64, i64)> = coarse_nodes
        .iter()
        .filter(|n| fine.contains(n))
        .cloned()
        .collect();
    masses(&new, Some(&kept));
    // The box touches a bound where mass is not negligible there.
    let at_bound = [
        sig.iter().any(|n| n.0 == 0 || n.0 == maxc),
        sig.iter().any(|n| n.1 == 0 || n.1 == maxc),
    ];
    (fine, [h[0], h[1]], at_bound)
}

/// How far below the highest fine node (log mass) the fine walk goes on: 30, as far as the
/// joint fit's screen of its cells reaches (it leaves out cells below e^-30 of the largest),
/// so that every node the joint fit could draw from is kept, and its cells keep their places
/// (each cell's draws are seeded by its place).
const FINE_KEEP: f64 = 30.0;

/// The fine nodes of one length-scale axis, by the walk of [`coarse_walk`] on the fine
/// lattice: from the best coarse node uphill to the highest fine node, then outwards on each
/// side until a node's log mass falls more than [`FINE_KEEP`] below it (or the box's end is
/// reached).
/// `coarse`/`m` are the coarse walk's nodes and log masses (fine coordinates). Returns the
/// run of fine nodes from one end to the other (every one evaluated) and whether a node within
/// e^10 of the highest lies on a bound.
///
/// The walk stays inside the box one coarse step beyond the coarse nodes within e^10 (the
/// box the two-axis lattice evaluates whole, and the one lattice before the fine walk), and
/// where the mass has one mode the nodes of that box it leaves out each carry less than
/// e^-30 of the highest node's mass: the shared range of many fields, whose mass sits on one
/// or two fine nodes, needs a few fine nodes instead of the whole box.
fn fine_walk(
    coarse: &[(i64, i64)],
    m: &[f64],
    refine: i64,
    maxc: i64,
    eager: bool,
    masses: &mut dyn FnMut(&[(i64, i64)], Option<&[(i64, i64)]>) -> Vec<f64>,
) -> (Vec<(i64, i64)>, bool) {
    let mut seen: BTreeMap<i64, f64> = coarse.iter().map(|k| k.0).zip(m.iter().copied()).collect();
    let coarse_top = m.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    // The coarse nodes that may stay: those of the box one coarse step beyond the coarse
    // nodes within e^10 (the others free their forms before any fine node is evaluated).
    let sig: Vec<i64> = seen
        .iter()
        .filter(|(_, v)| **v > coarse_top - 10.0)
        .map(|(i, _)| *i)
        .collect();
    let box_lo = (sig.iter().min().copied().unwrap_or(0) - refine).max(0);
    let box_hi = (sig.iter().max().copied().unwrap_or(maxc) + refine).min(maxc);
    let mut kept: Option<Vec<(i64, i64)>> = Some(
        seen.keys()
            .filter(|i| (box_lo..=box_hi).contains(*i))
            .map(|&i| (i, 0))
            .collect(),
    );
    let mut eval = |idx: &[i64], seen: &mut BTreeMap<i64, f64>| {
        let todo: Vec<i64> = idx
            .iter()
            .copied()
            .filter(|i| (box_lo..=box_hi).contains(i) && !seen.contains_key(i))
            .collect();
        let keys: Vec<(i64, i64)> = todo.iter().map(|&i| (i, 0)).collect();
        let release = kept.take();
        if todo.is_empty() && release.is_none() {
            return;
        }
        for (i, v) in todo.into_iter().zip(masses(&keys, release.as_deref())) {
            seen.insert(i, if v.is_nan() { f64::NEG_INFINITY } else { v });
        }
    };
    let best = *seen
        .iter()
        .max_by(|a, b| a.1.total_cmp(b.1).then(b.0.cmp(a.0)))
        .map(|(i, _)| i)
        .unwrap_or(&0);
    let (lo, hi, top) = walk(
        &mut seen,
        best,
        box_lo..=box_hi,
        FINE_KEEP,
        eager,
        &mut eval,
    );
    let keys: Vec<(i64, i64)> = (lo..=hi).map(|i| (i, 0)).collect();
    // Only the kept nodes hold forms from here on.
    masses(&[], Some(&keys));
    let at_bound = [0, maxc]
        .into_iter()
        .any(|i| (lo..=hi).contains(&i) && at(&seen, i) > top - 10.0);
    (keys, at_bound)
}

/// The log mass of node `i` as far as seen (no mass where not evaluated).
fn at(seen: &BTreeMap<i64, f64>, i: i64) -> f64 {
    seen.get(&i).copied().unwrap_or(f64::NEG_INFINITY)
}

/// The walk both axes' lattices share: from `best` uphill one node at a time to the highest,
/// evaluating the neighbours of each node it reaches (both at once when `eager`, so that they
/// are evaluated side by side; otherwise the left one only where the right one is not higher
/// or the left one was seen: a walk that starts uphill to the right never needs the node left
/// of its start, which saves a node where other work keeps the threads busy), then
/// outwards on each side until a node's log mass falls more than `drop` below the highest or
/// `range` ends (both sides in one batch, so that their nodes are evaluated side by side).
/// `eval` evaluates the nodes it is given that are in range and not yet seen. Returns the
/// run's ends and the highest log mass.
fn walk(
    seen: &mut BTreeMap<i64, f64>,
    mut best: i64,
    range: std::ops::RangeInclusive<i64>,
    drop: f64,
    eager: bool,
    eval: &mut dyn FnMut(&[i64], &mut BTreeMap<i64, f64>),
) -> (i64, i64, f64) {
    loop {
        let here = at(seen, best);
        if eager {
            eval(&[best - 1, best + 1], seen);
        } else {
            eval(&[best + 1], seen);
        }
        // Uphill to the right with the left neighbour not seen: no need to see it.
        let left_unseen = range.contains(&(best - 1)) && !seen.contains_key(&(best - 1));
        if left_unseen && at(seen, best + 1) > here {
            best += 1;
            continue;
        }
        eval(&[best - 1], seen);
        let (l, r) = (at(seen, best - 1), at(seen, best + 1));
        best = if l > here && l >= r {
            best - 1
        } else if r > here {
            best + 1
        } else {
            break;
        };
    }
    let top = at(seen, best);
    let (mut lo, mut hi) = (best, best);
    loop {
        let open = |seen: &BTreeMap<i64, f64>, i: i64, step: i64| {
            range.contains(&(i + step)) && at(seen, i) > top - drop
        };
        let (go_lo, go_hi) = (open(seen, lo, -1), open(seen, hi, 1));
        if !go_lo && !go_hi {
            break;
        }
        let next: Vec<i64> = [(go_lo, lo - 1), (go_hi, hi + 1)]
            .into_iter()
            .filter(|x| x.0)
            .map(|x| x.1)
            .collect();
        eval(&next, seen);
        lo -= i64::from(go_lo);
        hi += i64::from(go_hi);
    }
    (lo, hi, top)
}

/// The coarse nodes of one length-scale axis that decide the refined box, found by a walk
/// instead of evaluating all `nc`: from the middle node and its two neighbours, uphill to the
/// highest coarse node, then outwards on each side until a node's log mass falls more than
/// 10 below the highest (or the bound is reached). Where the mass over the length scale has
/// one mode, the box is the one the full coarse scan gives; the nodes far from the mass, whose
/// only use was to show that it is not there, are not evaluated. Returns the nodes evaluated
/// (in the order of the axis) and their log masses.
fn coarse_walk(
    nc: i64,
    refine: i64,
    masses: &mut dyn FnMut(&[(i64, i64)], Option<&[(i64, i64)]>) -> Vec<f64>,
) -> (Vec<(i64, i64)>, Vec<f64>) {
    let mut seen: BTreeMap<i64, f64> = BTreeMap::new();
    let mut eval = |idx: &[i64], seen: &mut BTreeMap<i64, f64>| {
        let todo: Vec<i64> = idx
            .iter()
            .copied()
            .filter(|i| (0..nc).contains(i) && !seen.contains_key(i))
            .collect();
        if todo.is_empty() {
            return;
        }
        let keys: Vec<(i64, i64)> = todo.iter().map(|&i| (i * refine, 0)).collect();
        for (i, v) in todo.into_iter().zip(masses(&keys, None)) {
            // A node that could not be evaluated counts as carrying no mass.
            seen.insert(i, if v.is_nan() { f64::NEG_INFINITY } else { v });
        }
    };
    let best = (nc - 1) / 2;
    eval(&[best - 1, best, best + 1], &mut seen);
    walk(&mut seen, best, 0..=nc - 1, 10.0, true, &mut eval);
    seen.into_iter().map(|(i, v)| ((i * refine, 0), v)).unzip()
}

#[cfg(test)]
mod tests {
    use super::range_lattice;

    /// The refined box (first and last fine node along the axis, whether it touches a bound)
    /// of the full coarse scan: every coarse node evaluated, the box one coarse step beyond
    /// the nodes within e^10 of the best.
    fn full_scan_box(f: &dyn Fn(i64) -> f64, nc: i64, refine: i64) -> (i64, i64, bool) {
        let m: Vec<f64> = (0..nc).map(|i| f(i * refine)).collect();
        let top = m.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let sig: Vec<i64> = (0..nc).filter(|&i| m[i as usize] > top - 10.0).collect();
        let maxc = (nc - 1) * refine;
        let lo = (sig.iter().min().unwrap() * refine - refine).max(0);
        let hi = (sig.iter().max().unwrap() * refine + refine).min(maxc);
        let at_bound = sig.iter().any(|&i| i == 0 || i == nc - 1);
        (lo, hi, at_bound)
    }

    #[test]
    fn the_walks_keep_the_mass_of_the_full_scans_box_with_fewer_nodes() {
        // Log masses with one mode anywhere on the axis (also at either bound), narrow and
        // wide. The full scan evaluates every coarse node and then every fine node of the box
        // one coarse step beyond those within e^10. The walks keep a run of fine nodes inside
        // that box holding every node within e^10 of the highest fine node (the nodes left
        // out hold less than 1e-4 of the box's mass), say whether such a node lies on a
        // bound, evaluate no more nodes than the full scan and, for a narrow mode, fewer.
        let bounds = [(0.0, 1.0), (0.0, 0.0)];
        let (nc, refine) = (9i64, 3i64);
        let mut fewer = 0;
        let mut cases = 0;
        for (mu, sd, eager) in [-4.0, 0.0, 2.0, 5.5, 12.0, 17.0, 23.0, 24.0, 30.0]
            .into_iter()
            .flat_map(|mu| [0.3, 0.7, 2.0, 5.0, 40.0].map(|sd| (mu, sd)))
            .flat_map(|(mu, sd)| [(mu, sd, false), (mu, sd, true)])
        {
            {
                let f = |x: i64| -0.5 * ((x as f64 - mu) / sd).powi(2);
                let mut evaluated = std::collections::BTreeSet::new();
                let mut masses = |keys: &[(i64, i64)], _: Option<&[(i64, i64)]>| -> Vec<f64> {
                    evaluated.extend(keys.iter().map(|k| k.0));
                    keys.iter().map(|k| f(k.0)).collect()
                };
                let (fine, _, at_bound) = range_lattice(1, bounds, nc as usize, eager, &mut masses);
                let (lo, hi, _) = full_scan_box(&f, nc, refine);
                let full = (nc + (hi - lo + 1)
                    - (lo..=hi).filter(|i| i % refine == 0).count() as i64)
                    as usize;
                let (a, b) = (fine[0].0, fine[fine.len() - 1].0);
                assert!(
                    lo <= a && b <= hi,
                    "mode at {mu}, SD {sd}: {a}..{b} in {lo}..{hi}"
                );
                assert_eq!(fine.len() as i64, b - a + 1);
                assert!(fine.iter().all(|k| evaluated.contains(&k.0)));
                let top = (lo..=hi).map(f).fold(f64::NEG_INFINITY, f64::max);
                let heavy: Vec<i64> = (lo..=hi).filter(|&i| f(i) > top - 10.0).collect();
                assert!(
                    heavy.iter().all(|i| (a..=b).contains(i)),
                    "mode at {mu}, SD {sd}"
                );
                let mass =
                    |r: &mut dyn Iterator<Item = i64>| r.map(|i| (f(i) - top).exp()).sum::<f64>();
                let left = mass(&mut (lo..=hi).filter(|i| !(a..=b).contains(i)));
                assert!(
                    left < 1e-4 * mass(&mut (lo..=hi)),
                    "mode at {mu}, SD {sd}: {left}"
                );
                let bound = heavy.iter().any(|&i| i == 0 || i == (nc - 1) * refine);
                assert_eq!(at_bound[0], bound, "mode at {mu}, SD {sd}");
                assert!(
                    evaluated.len() <= full,
                    "{} nodes, full scan {full}",
                    evaluated.len()
                );
                fewer += usize::from(evaluated.len() < full);
                cases += 1;
                if sd < 1.0 {
                    assert!(evaluated.len() < full, "mode at {mu}, SD {sd}");
                }
            }
        }
        assert!(fewer * 2 > cases, "fewer nodes in {fewer} of {cases} cases");
    }

    #[test]
    fn a_failed_node_counts_as_no_mass() {
        // A node whose evaluation fails (NaN) is taken as carrying no mass, not as a mode.
        let bounds = [(0.0, 1.0), (0.0, 0.0)];
        let mut masses = |keys: &[(i64, i64)], _: Option<&[(i64, i64)]>| -> Vec<f64> {
            keys.iter()
                .map(|k| {
                    if k.0 == 12 {
                        f64::NAN
                    } else {
                        -0.5 * ((k.0 as f64 - 3.0) / 0.5).powi(2)
                    }
                })
                .collect()
        };
        let (fine, _, at_bound) = range_lattice(1, bounds, 9, false, &mut masses);
        assert_eq!(
            (fine[0].0, fine[fine.len() - 1].0, at_bound[0]),
            (0, 6, false)
        );
    }
}
