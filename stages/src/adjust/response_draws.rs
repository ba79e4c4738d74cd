//! What a rate trial's curve posterior says about the rate to apply: the expected curve and
//! net return (exact, from the Gaussian pieces' means), the optimum of each of 4,000 seeded
//! draws of the curve (in closed form per curve), and bands at chosen rates.
//!
//! With the net return over the lowest rate o(u) = P g(u) - K u on the scaled rate (P the
//! grain price per kg, K the input cost of the whole tested range per hectare; without a
//! grain price P = 1, K = 0: the yield), each curve's best u in [0, 1]:
//!
//!   quadratic          b2 < 0: u = (K / P - b1) / (2 b2), clamped; otherwise 0 or 1
//!   linear-plateau     min(x, 1) when P b / x > K, else 0
//!   quadratic-plateau  b > 0: x (1 - K x / (2 P b)), clamped to [0, min(x, 1)]; else 0
//!
//! (where a plateau is reached the lowest rate that reaches it).

use super::response::{Curve, Piece, RateDesign, JOIN_STEP};
use super::RateSettings;
use crate::util::Rng;

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

    /// (P, K) of the objective on the scaled rate.
    fn scaled(&self, rd: &RateDesign) -> (f64, f64) {
        if self.price_per_kg > 0.0 {
            (self.price_per_kg, self.cost_per_ha * (rd.hi - rd.lo))
        } else {
            (1.0, 0.0)
        }
    }
}

/// Draws from the curve's posterior and what they say.
#[derive(Clone, Debug, Default)]
pub struct CurveSummary {
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
    /// On the band rates: rate, gain mean, lo95, hi95, net return mean, lo95, hi95,
    /// P(beats lowest), P(beats current).
    pub grid: Vec<[f64; 9]>,
    /// In a field that was not in the trial (a joint fit's pooled rows; NaN elsewhere): the
    /// optimum's 5, 95, 2.5 and 97.5 % quantiles and P(the pooled optimum beats the lowest
    /// rate there).
    pub new_field_q: [f64; 4],
    pub new_field_beats_lowest: f64,
}

/// Grid of scaled rates the expected net return is maximised on.
const GRID: usize = 400;
/// Draws per summary.
pub const DRAWS: usize = 4000;

/// A curve drawn: its piece, join and coefficients.
struct Draw<'a> {
    p: &'a Piece,
    x: f64,
    b: [f64; 2],
}

impl Draw<'_> {
    fn gain(&self, u: f64) -> f64 {
        let bs = self.p.curve.basis(u, self.x);
        self.b[0] * bs[0] + self.b[1] * bs[1]
    }
    /// The best scaled rate for objective P g(u) - K u (see the module's notes).
    fn best(&self, pk: (f64, f64)) -> f64 {
        let (p, k) = pk;
        let (b, x) = (self.b, self.x);
        match self.p.curve {
            Curve::Quadratic => {
                if b[1] < 0.0 {
                    ((k / p - b[0]) / (2.0 * b[1])).clamp(0.0, 1.0)
                } else if p * (b[0] + b[1]) - k > 0.0 {
                    1.0
                } else {
                    0.0
                }
            }
            Curve::LinearPlateau => {
                if p * b[0] / x > k {
                    x.min(1.0)
                } else {
                    0.0
                }
            }
            Curve::QuadraticPlateau => {
                if b[0] > 0.0 {
                    (x * (1.0 - k * x / (2.0 * p * b[0]))).clamp(0.0, x.min(1.0))
                } else {
                    0.0
                }
            }
        }
    }
}

/// Summarise the pieces (already restricted to what the row covers). With `bands`, the
/// curve's band on every tenth grid rate and at each rate tested; with `new_field`, the
/// optimum in a field that was not in the trial.
pub fn summarise(
    ps: &[Piece],
    rd: &RateDesign,
    e: &Economics,
    seed: u64,
    bands: bool,
    new_field: bool,
) -> CurveSummary {
    let top = super::field::log_sum_exp(ps.iter().map(|p| p.log_w));
    let ws: Vec<f64> = ps.iter().map(|p| (p.log_w - top).exp()).collect();
    let pk = e.scaled(rd);
    let money = e.price_per_kg > 0.0;
    let objective = |g: f64, u: f64| pk.0 * g - pk.1 * u;
    // The expected gain, exactly: each (curve, join) group's weighted mean coefficients.
    let mut groups: std::collections::BTreeMap<(u8, u64), (f64, f64, f64, &Piece)> =
        Default::default();
    for (p, w) in ps.iter().zip(&ws) {
        let e = groups
            .entry((p.curve as u8, p.x.to_bits()))
            .or_insert((0.0, 0.0, 0.0, p));
        e.0 += w;
        e.1 += w * p.mean[0];
        e.2 += w * p.mean[1];
    }
    let total: f64 = ws.iter().sum();
    let mean_gain = |u: f64| {
        groups
            .values()
            .map(|(_, m0, m1, p)| {
                let bs = p.curve.basis(u, p.x);
                m0 * bs[0] + m1 * bs[1]
            })
            .sum::<f64>()
            / total
    };
    // The grid: GRID + 1 even steps and the rates tested exactly; bands on every tenth step
    // and at the rates tested.
    let to_u = |r: f64| ((r - rd.lo) / (rd.hi - rd.lo)).clamp(0.0, 1.0);
    let grid = rate_grid(rd, bands);
    let mean_obj: Vec<f64> = grid
        .iter()
        .map(|g| objective(mean_gain(g.0), g.0))
        .collect();
    let jopt = (0..grid.len()).fold(0, |b, j| {
        if mean_obj[j] > mean_obj[b] + 1e-12 {
            j
        } else {
            b
        }
    });
    let uopt = grid[jopt].0;
    let (a, b) = flat_top(&mean_obj, jopt, e.within);
    // Seeded draws of the curve.
    let mut cdf = Vec::with_capacity(ws.len());
    let mut acc = 0.0;
    for w in &ws {
        acc += w;
        cdf.push(acc);
    }
    let mut rng = Rng::new(seed);
    let draws: Vec<Draw> = (0..DRAWS)
        .map(|_| {
            let v = rng.uniform() * acc;
            let p = &ps[cdf.partition_point(|&c| c < v).min(ps.len() - 1)];
            let (z0, z1) = (rng.normal(), rng.normal());
            // The join's prior is flat: a draw takes it anywhere in its node's cell.
            let jitter = rng.uniform() - 0.5;
            Draw {
                p,
                x: if p.curve == Curve::Quadratic {
                    p.x
                } else {
                    p.x + jitter * JOIN_STEP
                },
                b: [
                    p.mean[0] + p.chol[0] * z0,
                    p.mean[1] + p.chol[1] * z0 + p.chol[2] * z1,
                ],
            }
        })
        .collect();
    let ucur = e.current.map(to_u);
    let obj_at = |d: &Draw, u: f64| objective(d.gain(u), u);
    let share =
        |f: &dyn Fn(&Draw) -> bool| draws.iter().filter(|d| f(d)).count() as f64 / DRAWS as f64;
    let mut optima: Vec<f64> = draws.iter().map(|d| d.best(pk)).collect();
    let p_at_highest = optima.iter().filter(|&&u| u >= 1.0 - 1e-12).count() as f64 / DRAWS as f64;
    optima.sort_by(f64::total_cmp);
    let q = |p: f64| rd.rate(quantile_sorted(&optima, p));
    let bands_at = grid
        .iter()
        .filter(|g| g.1)
        .map(|&(u, _)| {
            let mut g: Vec<f64> = draws.iter().map(|d| d.gain(u)).collect();
            let mut n: Vec<f64> = draws.iter().map(|d| obj_at(d, u)).collect();
            let beats_low = n.iter().filter(|&&x| x > 0.0).count() as f64 / DRAWS as f64;
            let beats_cur = ucur.map_or(f64::NAN, |c| share(&|d| obj_at(d, u) > obj_at(d, c)));
            let mg = mean_gain(u);
            let gq = quantile_pair(&mut g, [0.025, 0.975]);
            let nq = if money {
                quantile_pair(&mut n, [0.025, 0.975])
            } else {
                [f64::NAN; 2]
            };
            [
                rd.rate(u),
                mg,
                gq[0],
                gq[1],
                if money { objective(mg, u) } else { f64::NAN },
                nq[0],
                nq[1],
                beats_low,
                beats_cur,
            ]
        })
        .collect();
    let (new_field_q, new_field_beats_lowest) = if new_field {
        let us: Vec<f64> = grid.iter().map(|g| g.0).collect();
        let jlow = us.iter().position(|&u| u == 0.0).unwrap_or(0);
        new_field_optima(&draws, rd, &us, &objective, &mut rng, jopt, jlow)
    } else {
        ([f64::NAN; 4], f64::NAN)
    };
    CurveSummary {
        new_field_q,
        new_field_beats_lowest,
        log_bayes_factor: top,
        optimum: rd.rate(uopt),
        optimum_q: [q(0.05), q(0.95), q(0.025), q(0.975)],
        p_at_highest,
        gain_at_optimum: mean_gain(uopt),
        net_return_at_optimum: if money { mean_obj[jopt] } else { f64::NAN },
        p_optimum_beats_lowest: share(&|d| obj_at(d, uopt) > 0.0),
        p_optimum_beats_current: ucur
            .map_or(f64::NAN, |c| share(&|d| obj_at(d, uopt) > obj_at(d, c))),
        flat_top: (rd.rate(grid[a].0), rd.rate(grid[b].0)),
        grid: bands_at,
    }
}

/// The scaled rates the expected net return is maximised on: GRID + 1 even steps and the
/// rates tested exactly, each marked where a band is wanted (every tenth step and the rates
/// tested, with `bands`).
fn rate_grid(rd: &RateDesign, bands: bool) -> Vec<(f64, bool)> {
    let mut pts: Vec<(f64, bool)> = (0..=GRID)
        .map(|i| (i as f64 / GRID as f64, bands && i % 10 == 0))
        .collect();
    pts.extend(
        rd.u.iter()
            .chain(std::iter::once(&rd.uc))
            .map(|&u| (u, bands)),
    );
    pts.sort_by(|a, b| a.0.total_cmp(&b.0));
    let mut grid: Vec<(f64, bool)> = Vec::with_capacity(pts.len());
    for (u, b) in pts {
        match grid.last_mut() {
            Some(last) if (u - last.0).abs() < 1e-12 => last.1 |= b,
            _ => grid.push((u, b)),
        }
    }
    grid
}

/// The flat top: the grid indices around `jopt` whose expected objective is within `within`
/// of its.
fn flat_top(mean_obj: &[f64], jopt: usize, within: f64) -> (usize, usize) {
    let near = |j: usize| mean_obj[j] >= mean_obj[jopt] - within;
    let (mut a, mut b) = (jopt, jopt);
    while a > 0 && near(a - 1) {
        a -= 1;
    }
    while b + 1 < mean_obj.len() && near(b + 1) {
        b += 1;
    }
    (a, b)
}

/// A new field's optimum: each draw's curve plus the field's own deviation at each rate
/// tested (N(0, s^2) of the draw's interaction SD, none at the check's rate, as the joint
/// model's treatment x field interaction), linear between the rates tested; its best rate on
/// the grid `us`. The optimum's quantiles (rates) and the share of draws in which the grid's
/// `jopt` beats its `jlow`.
fn new_field_optima(
    draws: &[Draw],
    rd: &RateDesign,
    us: &[f64],
    objective: &dyn Fn(f64, f64) -> f64,
    rng: &mut Rng,
    jopt: usize,
    jlow: usize,
) -> ([f64; 4], f64) {
    // The rates tested in order: (scaled rate, product index or None for the check).
    let mut tested: Vec<(f64, Option<usize>)> =
        rd.u.iter()
            .enumerate()
            .map(|(k, &u)| (u, Some(k)))
            .collect();
    tested.push((rd.uc, None));
    tested.sort_by(|a, b| a.0.total_cmp(&b.0));
    // Each grid rate between two rates tested: (left, right, weight of the right).
    let brackets: Vec<(usize, usize, f64)> = us
        .iter()
        .map(|&u| {
            let r = tested.partition_point(|t| t.0 < u).min(tested.len() - 1);
            let l = r.saturating_sub(1);
            let span = tested[r].0 - tested[l].0;
            if r == l || span <= 0.0 {
                (r, r, 0.0)
            } else {
                (l, r, ((u - tested[l].0) / span).clamp(0.0, 1.0))
            }
        })
        .collect();
    let mut optima = Vec::with_capacity(draws.len());
    let mut beats = 0usize;
    let mut dev = vec![0.0; tested.len()];
    for d in draws {
        for (k, t) in tested.iter().enumerate() {
            dev[k] = t.1.map_or(0.0, |_| d.p.s * rng.normal());
        }
        let at = |j: usize| {
            let (l, r, w) = brackets[j];
            objective(d.gain(us[j]) + (1.0 - w) * dev[l] + w * dev[r], us[j])
        };
        let mut best = (f64::NEG_INFINITY, 0);
        for j in 0..us.len() {
            let o = at(j);
            if o > best.0 + 1e-12 {
                best = (o, j);
            }
        }
        optima.push(us[best.1]);
        beats += usize::from(at(jopt) > at(jlow));
    }
    optima.sort_by(f64::total_cmp);
    let q = |p: f64| rd.rate(quantile_sorted(&optima, p));
    (
        [q(0.05), q(0.95), q(0.025), q(0.975)],
        beats as f64 / draws.len() as f64,
    )
}

/// Two quantiles of unsorted values (reordered), interpolated as [`quantile_sorted`], by
/// selection rather than a sort.
fn quantile_pair(v: &mut [f64], qs: [f64; 2]) -> [f64; 2] {
    if v.is_empty() || v.iter().any(|x| x.is_nan()) {
        return [f64::NAN; 2];
    }
    qs.map(|q| {
        let h = (v.len() - 1) as f64 * q;
        let (i, f) = (h.floor() as usize, h - h.floor());
        let (_, a, rest) = v.select_nth_unstable_by(i, f64::total_cmp);
        let a = *a;
        match rest.iter().copied().min_by(f64::total_cmp) {
            Some(b) if f > 0.0 => a + f * (b - a),
            _ => a,
        }
    })
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
