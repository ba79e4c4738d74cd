//! The joint fit over fields: importance sampling of the shared hyperparameters from the
//! fields' own lattices, the treatment-level combination (see `joint`) and the per-plot
//! effects under the joint posterior.

use super::*;

/// Result of the joint fit.
pub(crate) struct JointFit {
    /// (weight, component, interaction SD, chosen point (node key, index) per field).
    pub(crate) comps: Vec<(f64, Component, f64, Vec<((i64, i64), usize)>)>,
    pub(crate) ess: f64,
    /// Importance draws with a finite weight (the ESS is at most this).
    pub(crate) draws: usize,
}

/// All fields in one model (see `joint`): importance sampling of the fields' hyperparameters
/// from their own lattices (one group per shared length scale, or one group), on a grid of
/// the interaction SD; a pilot of 16 draws per cell, then `joint_draws` spread over the
/// cells by their estimated mass.
pub(crate) fn fit_joint(
    preps: &[Prepared],
    lats: &[Lattice],
    shared: bool,
    global: &EffectPrior,
    maps: &[FieldMap],
    s: &FitSettings,
) -> Option<JointFit> {
    let nf = preps.len();
    let groups = groups_of(preps, lats, shared);
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
    let fit_of = |g: usize, f: usize, i: usize| fit_at(preps, &groups, g, f, i);
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
            let lc = combine(&fits, maps, global, snodes[j].0, Moments::None)
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
    let cell_props = proposals(preps, &groups, &cells, &snodes, maps, global);
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
        combine(&fits, maps, global, snodes[j].0, Moments::None)
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
    let chosen = keep_draws(&ws);
    let comps = chosen
        .par_iter()
        .filter_map(|&(w, i)| {
            let (_, ci, pick) = &weighted[i];
            let (g, j, _) = cells[*ci];
            let fits: Vec<&spectral::Inner> = (0..nf).map(|f| fit_of(g, f, pick[f])).collect();
            let c = combine(&fits, maps, global, snodes[j].0, Moments::All)?;
            let pts = (0..nf)
                .map(|f| {
                    let (_, k, idx) = groups[g].1[f][pick[f]];
                    (k, idx)
                })
                .collect();
            Some((w, c, snodes[j].0, pts))
        })
        .collect();
    Some(JointFit {
        comps,
        ess,
        draws: weighted.len(),
    })
}

/// A group of the importance proposal: its log weight and, per field, the candidate points
/// (log weight, node key, index).
type Group = (f64, Vec<Vec<(f64, (i64, i64), usize)>>);

/// Groups: one per shared length scale (each field's points at it), or one group (each
/// field's points over its whole lattice).
fn groups_of(preps: &[Prepared], lats: &[Lattice], shared: bool) -> Vec<Group> {
    let mut groups: Vec<Group> = Vec::new();
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
    groups
}

/// Point `i` of field `f` in group `g`: its inner fit.
fn fit_at<'a>(
    preps: &'a [Prepared],
    groups: &[Group],
    g: usize,
    f: usize,
    i: usize,
) -> &'a spectral::Inner {
    let (_, k, idx) = groups[g].1[f][i];
    &preps[f].model.nodes[&k].points[idx].fit
}

/// Per cell (group, interaction SD) and field: the proposal (the field's own posterior over
/// its points, tilted by `cavity_tilt`) as a cumulative distribution, and the log tilt of
/// each point. Points below 1e-8 of a field's total are left out.
struct Prop {
    cdf: Vec<f64>,
    lnf: Vec<f64>,
}

/// Each cell's log weight before the draws (group, interaction node and the proposals'
/// normalisers) and its proposals, cells in parallel.
fn proposals(
    preps: &[Prepared],
    groups: &[Group],
    cells: &[(usize, usize)],
    snodes: &[(f64, f64)],
    maps: &[FieldMap],
    global: &EffectPrior,
) -> Vec<(f64, Vec<Prop>)> {
    cells
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
                                fit_at(preps, groups, g, f, i),
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
        .collect()
}

/// The draws kept, as (weight, index): those above 1e-10 of the largest weight; beyond
/// 3,000, resampled systematically.
fn keep_draws(ws: &[f64]) -> Vec<(f64, usize)> {
    let mut idx: Vec<usize> = (0..ws.len()).collect();
    idx.sort_by(|&a, &b| ws[b].total_cmp(&ws[a]).then(a.cmp(&b)));
    let wmax = ws[idx[0]];
    idx.retain(|&i| ws[i] > 1e-10 * wmax);
    if idx.len() > 3000 {
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
    }
}

/// A field's per-plot spatial effects under the joint posterior: its hyperparameter points
/// weighted by the joint draws (the heaviest holding 99.9 % of the mass, at most 64), each
/// with the moments of the field's mean parameters averaged over the draws at that point.
pub(crate) fn joint_plots(prep: &Prepared, f: usize, jf: &JointFit) -> Vec<AdjustedPlot> {
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
                repr.spatial_parts(&m.design, pt.theta[2].exp(), pt.theta[3].exp(), &pt.fit)?;
            let n = m.design.n();
            let mean = (0..n)
                .map(|j| parts.mean[j] + parts.shift(j, &pt.fit.b, &mean_b))
                .collect();
            let quad = parts.quads(&cov_b);
            let var = (0..n).map(|j| parts.cond_var[j] + quad[j]).collect();
            Some((*w, mean, var))
        })
        .collect();
    adjusted_plots(prep, &effects)
}
