//! Slow, independent integrations of one field's hyperparameter posterior, to check the
//! lattice integration against: a brute-force dense grid and a slice sampler. Both evaluate
//! the likelihood by a fresh dense Cholesky at every point ([`super::evaluate`]), not by the
//! spectral form, and neither uses curvature, warm starts or the lattice refinement.

use super::field::log_sum_exp;
use super::joint::{combine, EffectPrior, FieldMap, Moments};
use super::spectral::Inner;
use super::{evaluate, FieldData, Prepared};
use crate::util::{normal_cdf, Rng};

/// Posterior of each product's uplift: (mean, SD, P(uplift > 0)), and the posterior mean of
/// the range.
#[derive(Clone, Debug)]
pub struct OracleResult {
    pub uplift: Vec<(f64, f64, f64)>,
    pub range_mean: f64,
}

struct Target<'a> {
    prep: &'a Prepared<'a>,
    data: FieldData,
    prior: EffectPrior,
    map: FieldMap,
    lo: f64,
    hi: f64,
}

impl<'a> Target<'a> {
    fn new(prep: &'a Prepared<'a>, prior: EffectPrior) -> Target<'a> {
        let d = &prep.model.design;
        let data = FieldData::from_design(d);
        let map = FieldMap {
            index: (0..prior.mean.len()).collect(),
        };
        let sy = prep.model.sy;
        Target {
            prep,
            data,
            prior,
            map,
            lo: (1e-4 * sy).ln(),
            hi: (20.0 * sy).ln(),
        }
    }

    /// log posterior density of (ln l, ln s_f, ln s_n) and the GLS fit there.
    fn eval(&self, t: &[f64; 3]) -> Option<(f64, Inner)> {
        let m = &self.prep.model;
        if t[0] < m.bounds[0].0 || t[0] > m.bounds[0].1 {
            return None;
        }
        if t[1..].iter().any(|v| *v < self.lo || *v > self.hi) {
            return None;
        }
        let e = evaluate(&self.data, t[0].exp(), t[1].exp(), t[2].exp(), false)?;
        let p = self.data.p;
        let fit = Inner {
            reml: e.reml,
            b: e.b.clone(),
            cov: (0..p * p).map(|k| e.cov_b[(k / p, k % p)]).collect(),
        };
        let c = combine(
            &[&fit],
            std::slice::from_ref(&self.map),
            &self.prior,
            0.0,
            Moments::None,
        )?;
        let l = t[0].exp();
        let lp = e.reml + c.log_c + m.log_prior_range((l, l), m.rho0) + m.log_prior_sd(t[1], t[2]);
        Some((lp, fit))
    }

    /// Conditional uplift moments (mean, variance) per product at a fit.
    fn moments(&self, fit: &Inner) -> Vec<(f64, f64)> {
        let c = combine(
            &[fit],
            std::slice::from_ref(&self.map),
            &self.prior,
            0.0,
            Moments::Rows,
        )
        .expect("the fit was evaluated");
        c.delta[0].clone()
    }
}

fn summarise(parts: &[(f64, Vec<(f64, f64)>, f64)], d: usize) -> OracleResult {
    let total: f64 = parts.iter().map(|p| p.0).sum();
    let uplift = (0..d)
        .map(|k| {
            let m: f64 = parts.iter().map(|p| p.0 * p.1[k].0).sum::<f64>() / total;
            let v: f64 = parts
                .iter()
                .map(|p| p.0 * (p.1[k].1 + p.1[k].0.powi(2)))
                .sum::<f64>()
                / total
                - m * m;
            let pr: f64 = parts
                .iter()
                .map(|p| p.0 * normal_cdf(p.1[k].0 / p.1[k].1.sqrt()))
                .sum::<f64>()
                / total;
            (m, v.max(0.0).sqrt(), pr)
        })
        .collect();
    OracleResult {
        uplift,
        range_mean: parts.iter().map(|p| p.0 * p.2).sum::<f64>() / total,
    }
}

/// Brute-force quadrature: a uniform `k`^3 grid over the whole search box to find where the
/// mass is, then a uniform `k`^3 grid over the box holding everything above 1e-6 of the peak.
pub fn brute_force(prep: &Prepared, prior: EffectPrior, k: usize) -> OracleResult {
    let t = Target::new(prep, prior);
    let m = &prep.model;
    let mut bx = [(m.bounds[0].0, m.bounds[0].1), (t.lo, t.hi), (t.lo, t.hi)];
    let mut parts = Vec::new();
    for stage in 0..2 {
        let h: Vec<f64> = (0..3)
            .map(|a| (bx[a].1 - bx[a].0) / (k - 1) as f64)
            .collect();
        let mut pts: Vec<([f64; 3], f64, Inner)> = Vec::new();
        for i in 0..k {
            for j in 0..k {
                for l in 0..k {
                    let th = [
                        bx[0].0 + i as f64 * h[0],
                        bx[1].0 + j as f64 * h[1],
                        bx[2].0 + l as f64 * h[2],
                    ];
                    if let Some((lp, fit)) = t.eval(&th) {
                        pts.push((th, lp, fit));
                    }
                }
            }
        }
        let top = pts.iter().map(|p| p.1).fold(f64::NEG_INFINITY, f64::max);
        if stage == 0 {
            for a in 0..3 {
                let sig = pts.iter().filter(|p| p.1 > top - 13.8);
                let lo = sig.clone().map(|p| p.0[a]).fold(f64::INFINITY, f64::min);
                let hi = sig.map(|p| p.0[a]).fold(f64::NEG_INFINITY, f64::max);
                bx[a] = ((lo - h[a]).max(bx[a].0), (hi + h[a]).min(bx[a].1));
            }
        } else {
            let z = log_sum_exp(pts.iter().map(|p| p.1));
            parts = pts
                .iter()
                .map(|(th, lp, fit)| ((lp - z).exp(), t.moments(fit), th[0].exp()))
                .collect();
        }
    }
    summarise(&parts, t.prior.mean.len())
}

/// Univariate slice sampling with stepping out (Neal 2003, Annals of Statistics 31:705) on
/// (ln l, ln s_f, ln s_n), one coordinate at a time, started at the best of a coarse grid;
/// `iters` sweeps after `iters / 10` of burn-in, Rao-Blackwellised (each sweep contributes
/// its conditional normal moments).
pub fn slice_sampler(prep: &Prepared, prior: EffectPrior, iters: usize, seed: u64) -> OracleResult {
    let t = Target::new(prep, prior);
    let m = &prep.model;
    let mut rng = Rng::new(seed);
    let mut x = [0.0; 3];
    let mut best = f64::NEG_INFINITY;
    for i in 0..8 {
        for j in 0..8 {
            for l in 0..8 {
                let th = [
                    m.bounds[0].0 + (m.bounds[0].1 - m.bounds[0].0) * (i as f64 + 0.5) / 8.0,
                    (m.sy * 0.05).ln() + 4.0 * (j as f64 + 0.5) / 8.0,
                    (m.sy * 0.05).ln() + 4.0 * (l as f64 + 0.5) / 8.0,
                ];
                if let Some((lp, _)) = t.eval(&th) {
                    if lp > best {
                        best = lp;
                        x = th;
                    }
                }
            }
        }
    }
    let lp = |th: &[f64; 3]| t.eval(th).map_or(f64::NEG_INFINITY, |e| e.0);
    let mut cur = lp(&x);
    let w = 0.5;
    let burn = iters / 10;
    let mut parts = Vec::with_capacity(iters);
    for it in 0..burn + iters {
        for a in 0..3 {
            let level = cur + rng.uniform().ln();
            let mut lo = x;
            let mut hi = x;
            lo[a] -= w * rng.uniform();
            hi[a] = lo[a] + w;
            for _ in 0..50 {
                if lp(&lo) <= level {
                    break;
                }
                lo[a] -= w;
            }
            for _ in 0..50 {
                if lp(&hi) <= level {
                    break;
                }
                hi[a] += w;
            }
            loop {
                let mut cand = x;
                cand[a] = lo[a] + rng.uniform() * (hi[a] - lo[a]);
                let v = lp(&cand);
                if v > level {
                    x = cand;
                    cur = v;
                    break;
                }
                if cand[a] < x[a] {
                    lo[a] = cand[a];
                } else {
                    hi[a] = cand[a];
                }
            }
        }
        if it >= burn {
            if let Some((_, fit)) = t.eval(&x) {
                parts.push((1.0, t.moments(&fit), x[0].exp()));
            }
        }
    }
    summarise(&parts, t.prior.mean.len())
}
