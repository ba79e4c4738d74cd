//! Lattices over the length scale(s): coarse scan, refinement where the mass is, shared
//! scans across fields, and the interaction-SD nodes of a joint fit.

use super::*;

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
pub(crate) fn eval_nodes(
    m: &mut FieldModel,
    keys: &[(i64, i64)],
    bounds: [(f64, f64); 2],
    h: [f64; 2],
) {
    let mut warm = m.nodes.values().last().and_then(FieldModel::node_mode);
    let lat = Lattice {
        keys: Vec::new(),
        bounds,
        h,
        rho0: m.rho0,
        at_bound: [false; 2],
        lvol: 0.0,
    };
    // The spectral forms do not depend on the warm starts: built in parallel first.
    let todo: Vec<(i64, i64)> = keys
        .iter()
        .filter(|k| !m.nodes.contains_key(k))
        .cloned()
        .collect();
    let model: &FieldModel = m;
    let mut reprs: Vec<Option<spectral::Repr>> = todo
        .par_iter()
        .map(|&k| model.repr(lat.l(k, model.anisotropic)))
        .collect();
    for (&k, repr) in todo.iter().zip(reprs.iter_mut()) {
        if m.nodes.contains_key(&k) {
            continue;
        }
        let node = m.node_from(lat.l(k, m.anisotropic), warm.clone(), repr.take());
        warm = FieldModel::node_mode(&node).or(warm);
        m.nodes.insert(k, node);
    }
}

/// The fine spacing of the lattice for `bounds` (see `field::range_lattice`).
pub(crate) fn lattice_h(dims: usize, bounds: [(f64, f64); 2], coarse: usize) -> [f64; 2] {
    let refine = if dims == 1 { 3.0 } else { 2.0 };
    let nc = coarse.max(3) as f64;
    [
        (bounds[0].1 - bounds[0].0) / ((nc - 1.0) * refine),
        (bounds[1].1 - bounds[1].0) / ((nc - 1.0) * refine),
    ]
}

/// Scans one field's length scales on its own lattice (`eager`: see `field::range_lattice`).
pub(crate) fn scan_own(m: &mut FieldModel, s: &FitSettings, eager: bool) -> Lattice {
    let dims = if m.anisotropic { 2 } else { 1 };
    let bounds = m.bounds;
    let h = lattice_h(dims, bounds, s.range_grid_points);
    let rho0 = m.rho0;
    let mut masses = |keys: &[(i64, i64)], kept: Option<&[(i64, i64)]>| -> Vec<f64> {
        if let Some(kept) = kept {
            release_unused(m, kept);
        }
        eval_nodes(m, keys, bounds, h);
        keys.iter()
            .map(|k| {
                let node = &m.nodes[k];
                node.lz + m.log_prior_range(node.l, rho0)
            })
            .collect()
    };
    lattice(dims, bounds, rho0, s.range_grid_points, eager, &mut masses)
}

/// Frees the spectral forms of the nodes other than `keys`: called with the coarse nodes that
/// stay in the refined box before the box's new nodes are evaluated, so that afterwards only
/// `Lattice::keys` hold forms (every later step reads only those, and a form of an exact
/// kernel holds an n x n matrix).
fn release_unused(m: &mut FieldModel, keys: &[(i64, i64)]) {
    for (k, node) in m.nodes.iter_mut() {
        if !keys.contains(k) {
            node.repr = None;
        }
    }
}

/// Scans all fields on one shared lattice of length scales (`eager`: see
/// `field::range_lattice`).
pub(crate) fn scan_shared(models: &mut [FieldModel], s: &FitSettings, eager: bool) -> Lattice {
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
    let mut masses = |keys: &[(i64, i64)], kept: Option<&[(i64, i64)]>| -> Vec<f64> {
        models.par_iter_mut().for_each(|m| {
            if let Some(kept) = kept {
                release_unused(m, kept);
            }
            eval_nodes(m, keys, bounds, h)
        });
        keys.iter()
            .map(|k| {
                let l = models[0].nodes[k].l;
                models.iter().map(|m| m.nodes[k].lz).sum::<f64>()
                    + models[0].log_prior_range(l, rho0)
            })
            .collect()
    };
    lattice(dims, bounds, rho0, s.range_grid_points, eager, &mut masses)
}

/// The refined length-scale lattice (`field::range_lattice`) as a [`Lattice`].
pub(crate) fn lattice(
    dims: usize,
    bounds: [(f64, f64); 2],
    rho0: (f64, f64),
    coarse: usize,
    eager: bool,
    masses: &mut dyn FnMut(&[(i64, i64)], Option<&[(i64, i64)]>) -> Vec<f64>,
) -> Lattice {
    let (keys, h, at_bound) = range_lattice(dims, bounds, coarse, eager, masses);
    Lattice {
        keys,
        bounds,
        h,
        rho0,
        at_bound,
        lvol: h[0].ln() + if dims == 2 { h[1].ln() } else { 0.0 },
    }
}

/// A weighted point of one field's posterior: (log weight, node key, point index).
pub(crate) type Weighted = (f64, (i64, i64), usize);

/// Normalised weights from log weights, keeping those above 1e-10 of the largest, at most
/// `cap` (the largest).
pub(crate) fn top_weights(mut v: Vec<Weighted>, cap: usize) -> Vec<Weighted> {
    v.sort_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(&b.1)).then(a.2.cmp(&b.2)));
    let top = v.first().map_or(0.0, |x| x.0);
    v.retain(|x| x.0 > top - 23.0);
    v.truncate(cap);
    let z = log_sum_exp(v.iter().map(|x| x.0));
    v.into_iter()
        .map(|(w, k, i)| ((w - z).exp(), k, i))
        .collect()
}

/// Interaction SD nodes and the log prior mass of the cell around each: s = 0 and a
/// geometric ladder from 0.01 U to 4 U, cells split at (geometric) midpoints, under the PC
/// prior s ~ Exp(l) with P(s > U) = 0.05.
pub(crate) fn interaction_nodes(u: f64) -> Vec<(f64, f64)> {
    interaction_ladder(u, 14)
}

/// [`interaction_nodes`] with `k` rungs on the ladder (the season's stage two, where each
/// node costs little, uses a fine one).
pub(crate) fn interaction_ladder(u: f64, k: usize) -> Vec<(f64, f64)> {
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
