//! The treatment-level equations that join fields.
//!
//! Within a field, given its hyperparameters, the likelihood of the plot yields factorises
//! exactly into the REML likelihood and a Gaussian in the field's GLS estimates:
//! N(y; X b, K_y) = REML(theta) x N(b; b_hat, (X' K_y^-1 X)^-1) (R&W 2006 section 2.7). With
//! flat priors on the field mean and block effects, the field therefore speaks to the
//! treatment contrasts only through c_hat ~ N(delta, V), V the contrast block of the GLS
//! covariance. The fields share the product effects beta with a Gaussian prior N(m0, S0) and
//! may differ by a treatment x field interaction: delta_f = H_f beta + u_f, u_f ~ N(0, s^2 I)
//! (H_f picks the products the field holds). This is the Woodbury identity applied to
//! K_y + Z s^2 Z' and X S0 X': the n x n problem reduces to sums of p x p matrices,
//!
//!   W_f = V_f + s^2 I,  Prec = S0^-1 + Sum_f H_f' W_f^-1 H_f,  h = S0^-1 m0 + Sum_f H_f' W_f^-1 c_f,
//!   beta | . ~ N(Prec^-1 h, Prec^-1),
//!   log C = Sum_f log N(c_f; 0, W_f) - 1/2 (log|S0| + m0' S0^-1 m0 + log|Prec| - h' Prec^-1 h),
//!
//! and log p(y | all hyperparameters) = Sum_f REML_f + log C. Each field's own effects are
//! delta_f | . with mean c_f - G_f (c_f - H_f m_beta) and covariance V_f - G_f V_f +
//! G_f H_f S_beta H_f' G_f', G_f = V_f W_f^-1 (no division by s, so s = 0 is the shared-effect
//! model). The field mean b0 follows from its regression on the contrasts within the field.

use super::linalg;
use super::spectral::Inner;

/// The prior on the product effects (global product order): means and variances.
#[derive(Clone, Debug)]
pub struct EffectPrior {
    pub mean: Vec<f64>,
    pub var: Vec<f64>,
}

/// Which global products a field holds: its treatments 1..T map to `index`.
#[derive(Clone, Debug)]
pub struct FieldMap {
    pub index: Vec<usize>,
}

/// Moments of one component (one set of hyperparameters) of the posterior.
#[derive(Clone, Debug)]
pub struct Component {
    pub log_c: f64,
    /// Product effects (global order): means and variances.
    pub beta_mean: Vec<f64>,
    pub beta_var: Vec<f64>,
    /// Per field: uplift of each of its products (mean, variance), and each treatment's
    /// mean yield (check first) (mean, variance).
    pub delta: Vec<Vec<(f64, f64)>>,
    pub est: Vec<Vec<(f64, f64)>>,
    /// Per field: the posterior mean (p) and covariance (p x p) of all its mean parameters
    /// (field mean, contrasts, blocks) given its contrasts' joint posterior:
    /// E b = b_hat + M (E delta - c_hat), Cov b = C - M C_c. + M Cov(delta) M', M = C_.c V^-1.
    pub b: Vec<(Vec<f64>, Vec<f64>)>,
}

/// One field's contrasts at a fit and their covariance with the interaction added:
/// c_hat, V, W = V + s^2 I, the log-determinant of W, W^-1 and W^-1 c_hat (None when W is not
/// positive definite).
struct FieldTerms {
    c: Vec<f64>,
    v: Vec<f64>,
    w: Vec<f64>,
    logdet_w: f64,
    /// Cholesky factor of W.
    lw: Vec<f64>,
    wi: Vec<f64>,
    wic: Vec<f64>,
}

fn field_terms(fit: &Inner, d: usize, s: f64) -> Option<FieldTerms> {
    let p = (fit.cov.len() as f64).sqrt().round() as usize;
    let idx: Vec<usize> = (1..=d).collect();
    let c: Vec<f64> = idx.iter().map(|&i| fit.b[i]).collect();
    let v = linalg::sub(&fit.cov, p, &idx);
    let mut w = v.clone();
    for a in 0..d {
        w[a * d + a] += s * s;
    }
    let l = linalg::chol(&w, d)?;
    let wi = linalg::inverse(&l, d);
    let mut wic = c.clone();
    linalg::solve(&l, d, &mut wic);
    Some(FieldTerms {
        c,
        v,
        w,
        logdet_w: linalg::logdet(&l, d),
        lw: l,
        wi,
        wic,
    })
}

/// What [`combine`] computes beside log C.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Moments {
    /// log C only.
    None,
    /// The product effects, uplifts and treatment means (`Component::b` left empty).
    Rows,
    /// Those and every mean parameter's moments (`Component::b`, for per-plot effects).
    All,
}

/// Joins one GLS fit per field at interaction SD `s`, computing what `moments` asks for.
pub fn combine(
    fits: &[&Inner],
    maps: &[FieldMap],
    prior: &EffectPrior,
    s: f64,
    moments: Moments,
) -> Option<Component> {
    let np = prior.mean.len();
    let ln2pi = (2.0 * std::f64::consts::PI).ln();
    let mut prec = vec![0.0; np * np];
    let mut h = vec![0.0; np];
    for k in 0..np {
        prec[k * np + k] = 1.0 / prior.var[k];
        h[k] = prior.mean[k] / prior.var[k];
    }
    let mut log_c = -0.5
        * (0..np)
            .map(|k| prior.var[k].ln() + prior.mean[k].powi(2) / prior.var[k])
            .sum::<f64>();
    let mut locals = Vec::with_capacity(fits.len());
    for (fit, map) in fits.iter().zip(maps) {
        let d = map.index.len();
        let t = field_terms(fit, d, s)?;
        log_c -= 0.5
            * (d as f64 * ln2pi
                + t.logdet_w
                + t.c.iter().zip(&t.wic).map(|(x, y)| x * y).sum::<f64>());
        for a in 0..d {
            h[map.index[a]] += t.wic[a];
            for b in 0..d {
                prec[map.index[a] * np + map.index[b]] += t.wi[a * d + b];
            }
        }
        locals.push(t);
    }
    let lp = linalg::chol(&prec, np)?;
    let mut mb = h.clone();
    linalg::solve(&lp, np, &mut mb);
    log_c -= 0.5 * (linalg::logdet(&lp, np) - h.iter().zip(&mb).map(|(x, y)| x * y).sum::<f64>());
    if moments == Moments::None {
        return Some(Component {
            log_c,
            beta_mean: Vec::new(),
            beta_var: Vec::new(),
            delta: Vec::new(),
            est: Vec::new(),
            b: Vec::new(),
        });
    }
    let sb = linalg::inverse(&lp, np);
    let mut delta = Vec::with_capacity(fits.len());
    let mut est = Vec::with_capacity(fits.len());
    let mut bs = Vec::with_capacity(fits.len());
    for ((fit, map), loc) in fits.iter().zip(maps).zip(&locals) {
        let d = map.index.len();
        let p = (fit.cov.len() as f64).sqrt().round() as usize;
        let hm: Vec<f64> = map.index.iter().map(|&k| mb[k]).collect();
        let hsh: Vec<f64> = (0..d * d)
            .map(|k| sb[map.index[k / d] * np + map.index[k % d]])
            .collect();
        let (dm, dc) = if s == 0.0 && d >= linalg::LARGE {
            // Without an interaction G = V V^-1 = I: the field's effects are the shared ones
            // (many products: taken exactly rather than through four d x d products).
            (hm, hsh)
        } else {
            let g = linalg::matmul(&loc.v, &loc.wi, d, d, d);
            let diff: Vec<f64> = (0..d).map(|a| loc.c[a] - hm[a]).collect();
            let gd = linalg::matmul(&g, &diff, d, d, 1);
            let dm: Vec<f64> = (0..d).map(|a| loc.c[a] - gd[a]).collect();
            let gv = linalg::matmul(&g, &loc.v, d, d, d);
            let ghsh = linalg::matmul(&g, &hsh, d, d, d);
            let gt: Vec<f64> = (0..d * d).map(|k| g[(k % d) * d + k / d]).collect();
            let ghshg = linalg::matmul(&ghsh, &gt, d, d, d);
            let dc: Vec<f64> = (0..d * d).map(|k| loc.v[k] - gv[k] + ghshg[k]).collect();
            (dm, dc)
        };
        // The field mean given its contrasts: b0 = b0_hat + g'(delta - c_hat), g = V^-1 cov(c, b0).
        let cov_cb0: Vec<f64> = (1..=d).map(|i| fit.cov[i * p]).collect();
        // V's factor: W's when there is no interaction (W = V + 0 I, the same numbers).
        let lv = if s == 0.0 {
            loc.lw.clone()
        } else {
            linalg::chol(&loc.v, d)?
        };
        let mut gb = cov_cb0.clone();
        linalg::solve(&lv, d, &mut gb);
        let b0_mean = fit.b[0] + (0..d).map(|a| gb[a] * (dm[a] - loc.c[a])).sum::<f64>();
        let gvg: f64 = (0..d).map(|a| gb[a] * cov_cb0[a]).sum();
        let dcg = linalg::matmul(&dc, &gb, d, d, 1);
        let gdcg: f64 = (0..d).map(|a| gb[a] * dcg[a]).sum();
        let b0_var = (fit.cov[0] - gvg + gdcg).max(0.0);
        let mut e = vec![(b0_mean, b0_var)];
        for a in 0..d {
            e.push((
                b0_mean + dm[a],
                (b0_var + dc[a * d + a] + 2.0 * dcg[a]).max(0.0),
            ));
        }
        delta.push((0..d).map(|a| (dm[a], dc[a * d + a].max(0.0))).collect());
        est.push(e);
        if moments == Moments::Rows {
            continue;
        }
        // All mean parameters: M = C_.c V^-1 (p x d), row r solving V x = C_c,r.
        let c_c: Vec<f64> = (0..d * p)
            .map(|k| fit.cov[(k / p + 1) * p + k % p])
            .collect();
        let mut vic = c_c.clone();
        linalg::solve_many(&lv, d, &mut vic, p);
        let m: Vec<f64> = (0..p * d).map(|k| vic[(k % d) * p + k / d]).collect();
        let shift: Vec<f64> = (0..d).map(|a| dm[a] - loc.c[a]).collect();
        let mean_b: Vec<f64> = (0..p)
            .map(|r| fit.b[r] + (0..d).map(|a| m[r * d + a] * shift[a]).sum::<f64>())
            .collect();
        let mcc = linalg::matmul(&m, &c_c, p, d, p);
        let mdc = linalg::matmul(&m, &dc, p, d, d);
        let mt: Vec<f64> = (0..d * p).map(|k| m[(k % p) * d + k / p]).collect();
        let mdcm = linalg::matmul(&mdc, &mt, p, d, p);
        let cov_b: Vec<f64> = (0..p * p).map(|k| fit.cov[k] - mcc[k] + mdcm[k]).collect();
        bs.push((mean_b, cov_b));
    }
    Some(Component {
        log_c,
        beta_mean: mb,
        beta_var: (0..np).map(|k| sb[k * np + k].max(0.0)).collect(),
        delta,
        est,
        b: bs,
    })
}

/// A proposal for importance sampling the joint fit: each field's hyperparameter points are
/// tilted by the leave-one-out predictive density of the field's contrasts given the other
/// fields, log N(c_f; H_f m_-f, W_f + H_f S_-f H_f'), where (m_-f, S_-f) is the product-effect
/// posterior from the prior and the other fields' precision contributions averaged over their
/// (tilted) proposals: a cavity in the manner of expectation propagation (Minka 2001), updated
/// `passes` times. Any proposal leaves the importance estimator exact; this one keeps the
/// weights even when many fields each move the contrasts a little. `cands[f]` holds each
/// point's fit and normalised log probability; returns the log tilt of every point (-inf
/// where its covariance fails).
pub fn cavity_tilt(
    cands: &[Vec<(&Inner, f64)>],
    maps: &[FieldMap],
    prior: &EffectPrior,
    s: f64,
    passes: usize,
) -> Vec<Vec<f64>> {
    let np = prior.mean.len();
    let ln2pi = (2.0 * std::f64::consts::PI).ln();
    let locals: Vec<Vec<Option<FieldTerms>>> = cands
        .iter()
        .zip(maps)
        .map(|(cs, map)| {
            cs.iter()
                .map(|(fit, _)| field_terms(fit, map.index.len(), s))
                .collect()
        })
        .collect();
    let mut lnf: Vec<Vec<f64>> = cands.iter().map(|c| vec![0.0; c.len()]).collect();
    for _ in 0..passes {
        // Precision contributions of each field, averaged over its current proposal.
        let contrib: Vec<(Vec<f64>, Vec<f64>)> = cands
            .iter()
            .zip(maps)
            .enumerate()
            .map(|(f, (cs, map))| {
                let d = map.index.len();
                let lq: Vec<f64> = cs.iter().zip(&lnf[f]).map(|((_, lp), t)| lp + t).collect();
                let z = super::field::log_sum_exp(lq.iter().cloned());
                let mut lam = vec![0.0; np * np];
                let mut eta = vec![0.0; np];
                for (i, loc) in locals[f].iter().enumerate() {
                    let (Some(loc), q) = (loc, (lq[i] - z).exp()) else {
                        continue;
                    };
                    if !(q > 0.0) {
                        continue;
                    }
                    for a in 0..d {
                        eta[map.index[a]] += q * loc.wic[a];
                        for b in 0..d {
                            lam[map.index[a] * np + map.index[b]] += q * loc.wi[a * d + b];
                        }
                    }
                }
                (lam, eta)
            })
            .collect();
        let mut lam = vec![0.0; np * np];
        let mut eta = vec![0.0; np];
        for k in 0..np {
            lam[k * np + k] = 1.0 / prior.var[k];
            eta[k] = prior.mean[k] / prior.var[k];
        }
        for (l, e) in &contrib {
            for k in 0..np * np {
                lam[k] += l[k];
            }
            for k in 0..np {
                eta[k] += e[k];
            }
        }
        for (f, map) in maps.iter().enumerate() {
            let d = map.index.len();
            let lc: Vec<f64> = (0..np * np).map(|k| lam[k] - contrib[f].0[k]).collect();
            let Some(l) = linalg::chol(&lc, np) else {
                continue;
            };
            let sc = linalg::inverse(&l, np);
            let mut mc: Vec<f64> = (0..np).map(|k| eta[k] - contrib[f].1[k]).collect();
            linalg::solve(&l, np, &mut mc);
            for (i, loc) in locals[f].iter().enumerate() {
                lnf[f][i] = match loc {
                    None => f64::NEG_INFINITY,
                    Some(loc) => {
                        let q: Vec<f64> = (0..d * d)
                            .map(|k| loc.w[k] + sc[map.index[k / d] * np + map.index[k % d]])
                            .collect();
                        match linalg::chol(&q, d) {
                            None => f64::NEG_INFINITY,
                            Some(lq) => {
                                let r: Vec<f64> =
                                    (0..d).map(|a| loc.c[a] - mc[map.index[a]]).collect();
                                let mut qr = r.clone();
                                linalg::solve(&lq, d, &mut qr);
                                -0.5 * (d as f64 * ln2pi
                                    + linalg::logdet(&lq, d)
                                    + r.iter().zip(&qr).map(|(x, y)| x * y).sum::<f64>())
                            }
                        }
                    }
                };
            }
        }
    }
    lnf
}

/// A weighted mixture of normals: moments, CDF and quantiles.
#[derive(Clone, Debug, Default)]
pub struct Mixture {
    /// (weight, mean, variance), weights summing to one.
    pub parts: Vec<(f64, f64, f64)>,
}

impl Mixture {
    pub fn new(parts: Vec<(f64, f64, f64)>) -> Mixture {
        let total: f64 = parts.iter().map(|p| p.0).sum();
        Mixture {
            parts: parts
                .into_iter()
                .map(|(w, m, v)| (w / total, m, v.max(1e-300)))
                .collect(),
        }
    }
    pub fn mean(&self) -> f64 {
        self.parts.iter().map(|(w, m, _)| w * m).sum()
    }
    pub fn var(&self) -> f64 {
        let m = self.mean();
        (self
            .parts
            .iter()
            .map(|(w, mu, v)| w * (v + mu * mu))
            .sum::<f64>()
            - m * m)
            .max(0.0)
    }
    pub fn cdf(&self, x: f64) -> f64 {
        self.parts
            .iter()
            .map(|(w, m, v)| w * crate::util::normal_cdf((x - m) / v.sqrt()))
            .sum()
    }
    #[cfg(test)]
    fn pdf(&self, x: f64) -> f64 {
        self.parts
            .iter()
            .map(|(w, m, v)| {
                let sd = v.sqrt();
                w * (-0.5 * ((x - m) / sd).powi(2)).exp() / (sd * 2.506_628_274_631_000_5)
            })
            .sum()
    }

    /// CDF and density at `x` in one pass, from each part's SD and density constant made
    /// beforehand (`sds`: (sd, sd x sqrt(2 pi))); term by term and in order the same sums as
    /// [`Mixture::cdf`] and [`Mixture::pdf`].
    fn cdf_pdf(&self, x: f64, sds: &[(f64, f64)]) -> (f64, f64) {
        let (mut c, mut d) = (-0.0, -0.0);
        for ((w, m, _), (sd, norm)) in self.parts.iter().zip(sds) {
            let z = (x - m) / sd;
            c += w * crate::util::normal_cdf(z);
            d += w * (-0.5 * z.powi(2)).exp() / norm;
        }
        (c, d)
    }

    /// The q quantile: Newton steps from the normal approximation, kept inside a bracket
    /// that bisection narrows whenever a step leaves it.
    pub fn quantile(&self, q: f64) -> f64 {
        let sds: Vec<(f64, f64)> = self
            .parts
            .iter()
            .map(|(_, _, v)| {
                let sd = v.sqrt();
                (sd, sd * 2.506_628_274_631_000_5)
            })
            .collect();
        let mut lo = self
            .parts
            .iter()
            .map(|(_, m, v)| m - 10.0 * v.sqrt())
            .fold(f64::INFINITY, f64::min);
        let mut hi = self
            .parts
            .iter()
            .map(|(_, m, v)| m + 10.0 * v.sqrt())
            .fold(f64::NEG_INFINITY, f64::max);
        let z = crate::util::normal_quantile_approx(1.0 - q);
        let mut x = (self.mean() + z * self.var().sqrt()).clamp(lo, hi);
        for _ in 0..100 {
            let (cdf, d) = self.cdf_pdf(x, &sds);
            let f = cdf - q;
            if f < 0.0 {
                lo = x;
            } else {
                hi = x;
            }
            let step = if d > 0.0 { x - f / d } else { f64::NAN };
            let next = if step > lo && step < hi {
                step
            } else {
                0.5 * (lo + hi)
            };
            if (next - x).abs() < 1e-10 * (1.0 + x.abs()) || hi - lo < 1e-12 * (1.0 + x.abs()) {
                return next;
            }
            x = next;
        }
        x
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn one_pass_cdf_and_density_equal_the_separate_sums_bit_for_bit() {
        // 300 random mixtures of 1 to 2,000 parts, each at 20 points across its range.
        let mut rng = crate::util::Rng::new(17);
        for case in 0..300 {
            let k = 1 + (rng.uniform() * 2000.0) as usize * usize::from(case % 3 != 0);
            let parts: Vec<(f64, f64, f64)> = (0..k)
                .map(|_| {
                    (
                        rng.uniform(),
                        rng.normal() * 300.0,
                        (rng.normal() * 3.0).exp() * 100.0,
                    )
                })
                .collect();
            let mix = Mixture::new(parts);
            let sds: Vec<(f64, f64)> = mix
                .parts
                .iter()
                .map(|(_, _, v)| (v.sqrt(), v.sqrt() * 2.506_628_274_631_000_5))
                .collect();
            for i in 0..20 {
                let x = -2000.0 + 200.0 * i as f64 + rng.normal();
                let (c, d) = mix.cdf_pdf(x, &sds);
                assert_eq!(c.to_bits(), mix.cdf(x).to_bits(), "cdf, case {case}, x {x}");
                assert_eq!(d.to_bits(), mix.pdf(x).to_bits(), "pdf, case {case}, x {x}");
            }
        }
    }

    #[test]
    fn one_field_without_interaction_is_the_conjugate_normal_update() {
        // One field, one product: c_hat = 1.0 with variance 0.25, prior N(0.5, 1):
        // posterior precision 4 + 1 = 5, mean (4 x 1 + 0.5) / 5 = 0.9, variance 0.2;
        // log C = log N(1; 0.5, 1.25) (arithmetic).
        let fit = Inner {
            reml: 0.0,
            b: vec![10.0, 1.0],
            cov: vec![0.2, -0.1, -0.1, 0.25],
        };
        let prior = EffectPrior {
            mean: vec![0.5],
            var: vec![1.0],
        };
        let map = FieldMap { index: vec![0] };
        let c = combine(&[&fit], &[map], &prior, 0.0, Moments::All).unwrap();
        assert!((c.beta_mean[0] - 0.9).abs() < 1e-12);
        assert!((c.beta_var[0] - 0.2).abs() < 1e-12);
        let ln = -0.5 * ((2.0 * std::f64::consts::PI * 1.25).ln() + 0.25 / 1.25);
        assert!((c.log_c - ln).abs() < 1e-12);
        assert!((c.delta[0][0].0 - 0.9).abs() < 1e-12);
        // b0 | c: regression slope cov(c, b0) / V = -0.4: 10 - 0.4 x (0.9 - 1) = 10.04.
        assert!((c.est[0][0].0 - 10.04).abs() < 1e-12);
        // var b0 = 0.2 - 0.1^2 / 0.25 + 0.4^2 x 0.2 = 0.192.
        assert!((c.est[0][0].1 - 0.192).abs() < 1e-12);
        // All mean parameters together: (b0, c) means (10.04, 0.9); covariance
        // [[0.192, -0.08], [-0.08, 0.2]] with cov(b0, c) = -0.4 x 0.2.
        let (mb, cb) = &c.b[0];
        for (x, e) in mb.iter().zip([10.04, 0.9]) {
            assert!((x - e).abs() < 1e-12);
        }
        for (x, e) in cb.iter().zip([0.192, -0.08, -0.08, 0.2]) {
            assert!((x - e).abs() < 1e-12, "{x} vs {e}");
        }
    }

    #[test]
    fn many_products_without_interaction_take_the_shared_effects_exactly() {
        // 20 products (from linalg::LARGE on, s = 0 takes G = I exactly): the rows equal
        // those of the general formula, reached with an interaction SD so small that W = V
        // in floating point (1e-200^2 underflows to 0) but G = V W^-1 is formed.
        let d = 20;
        let p = d + 1;
        let mut rng = crate::util::Rng::new(3);
        let g: Vec<f64> = (0..p * p).map(|_| 0.3 * rng.normal()).collect();
        let mut cov = vec![0.0; p * p];
        for i in 0..p {
            for j in 0..p {
                cov[i * p + j] = (0..p).map(|k| g[i * p + k] * g[j * p + k]).sum::<f64>()
                    + if i == j { 0.5 } else { 0.0 };
            }
        }
        let fit = Inner {
            reml: 0.0,
            b: (0..p).map(|i| 10.0 + 0.1 * i as f64).collect(),
            cov,
        };
        let prior = EffectPrior {
            mean: vec![0.2; d],
            var: vec![4.0; d],
        };
        let map = FieldMap {
            index: (0..d).collect(),
        };
        let maps = std::slice::from_ref(&map);
        let exact = combine(&[&fit], maps, &prior, 0.0, Moments::All).unwrap();
        let general = combine(&[&fit], maps, &prior, 1e-200, Moments::All).unwrap();
        assert!((exact.log_c - general.log_c).abs() < 1e-10);
        for a in 0..d {
            let (x, y) = (exact.delta[0][a], general.delta[0][a]);
            assert!(
                (x.0 - y.0).abs() < 1e-10 && (x.1 - y.1).abs() < 1e-10,
                "{a}"
            );
        }
        for (x, y) in exact.est[0].iter().zip(&general.est[0]) {
            assert!((x.0 - y.0).abs() < 1e-10 && (x.1 - y.1).abs() < 1e-10);
        }
        for (x, y) in exact.b[0].1.iter().zip(&general.b[0].1) {
            assert!((x - y).abs() < 1e-10);
        }
        // Rows leaves the per-parameter moments out and nothing else.
        let rows = combine(&[&fit], maps, &prior, 0.0, Moments::Rows).unwrap();
        assert!(rows.b.is_empty());
        assert_eq!(rows.delta, exact.delta);
        assert_eq!(rows.est, exact.est);
    }

    #[test]
    fn mixture_quantiles_of_one_normal() {
        let m = Mixture::new(vec![(2.0, 1.0, 4.0)]);
        assert!((m.quantile(0.975) - (1.0 + 2.0 * 1.959_964)).abs() < 1e-5);
        assert!((m.cdf(1.0) - 0.5).abs() < 1e-7);
        assert!((m.var() - 4.0).abs() < 1e-12);
        // Two equal normals at 0 and 4: the median is 2 by symmetry; every quantile solves
        // cdf(x) = q.
        let m = Mixture::new(vec![(1.0, 0.0, 1.0), (1.0, 4.0, 1.0)]);
        assert!((m.quantile(0.5) - 2.0).abs() < 1e-9);
        for q in [0.025, 0.05, 0.3, 0.95, 0.975] {
            assert!((m.cdf(m.quantile(q)) - q).abs() < 1e-9, "{q}");
        }
        assert!((crate::util::normal_quantile_approx(0.025) - 1.959_964).abs() < 5e-4);
    }
}
