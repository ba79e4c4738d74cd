//! Automatic flow (and moisture) delay estimation.
//!
//! Method (after Chung, Sudduth & Drummond, Transactions of the ASAE): a wrong delay moves
//! each reading along the direction of travel, so on adjacent passes driven in opposite
//! directions the errors go opposite ways and neighbouring points disagree. For every
//! candidate lag L the objective is the mean squared difference between the value at a point
//! and at its nearest neighbour on an opposite-direction pass, each value taken L seconds
//! after the point's own time (averaged over five records to damp noise; the largest 2 % of
//! differences are left out so that sensor spikes cannot decide). The chosen lag minimises it,
//! refined on a quarter-step grid and by a parabola through the best fine lag and its two
//! neighbours.
//!
//! Parameters: the points to pair (positions, times, headings, passes), the export's time
//! line of the quantity (mass flow over speed x width for yield, or moisture), the candidate
//! grid and the pairing distance.
//! Returns: the lag, the objective curve and the number of pairs; `None` when there are
//! fewer pairs than `min_pairs` (the caller then uses the fixed delay).
//! Complexity: O(n) to pair on a grid of cells the pairing distance wide, then O(n x lags).

use super::passes;
use super::settings::DelayMode;
pub use super::work::DelayEstimate;
use super::work::Export;
use crate::util::median;
use std::collections::BTreeMap;

/// One point offered for pairing.
#[derive(Clone, Copy, Debug)]
pub struct PairPoint {
    pub x: f64,
    pub y: f64,
    pub time_s: f64,
    /// Heading in degrees (0 = north, clockwise).
    pub heading_deg: f64,
    pub pass: u32,
    /// Divides the interpolated series value (speed x width for yield, 1 for moisture).
    pub divisor: f64,
}

pub(crate) fn angle_diff(a: f64, b: f64) -> f64 {
    let x = a - b;
    // `rem_euclid(360)` without the division where it is exact: for |x| < 360, x % 360 is
    // x itself, so the remainder is x, or x + 360 below zero (the same bits).
    let d = if x.abs() < 360.0 {
        if x < 0.0 {
            x + 360.0
        } else {
            x
        }
    } else {
        x.rem_euclid(360.0)
    };
    if d > 180.0 {
        360.0 - d
    } else {
        d
    }
}

/// Pair each point with its nearest neighbour on an opposite-direction pass within `dist`.
pub fn opposite_pairs(pts: &[PairPoint], dist: f64) -> Vec<(usize, usize)> {
    let xy: Vec<(f64, f64)> = pts.iter().map(|p| (p.x, p.y)).collect();
    let grid = super::grid::Grid::new(&xy, dist);
    let mut pairs = Vec::new();
    for (i, p) in pts.iter().enumerate() {
        let best = grid
            .within(p.x, p.y, dist * dist)
            .filter(|&g| {
                let q = &pts[g];
                q.pass != p.pass && angle_diff(p.heading_deg, q.heading_deg) > 135.0
            })
            .min_by(|&a, &b| {
                let da = (pts[a].x - p.x).powi(2) + (pts[a].y - p.y).powi(2);
                let db = (pts[b].x - p.x).powi(2) + (pts[b].y - p.y).powi(2);
                da.total_cmp(&db).then(a.cmp(&b))
            });
        if let Some(g) = best {
            pairs.push((i.min(g), i.max(g)));
        }
    }
    pairs.sort_unstable();
    pairs.dedup();
    pairs
}

pub use super::settings::WIDEST;

/// The lag with the most pairs' agreement (`scan(lo, hi)`: [`estimate`] over `lo..=hi`
/// by `step`); with `widen`, while
/// the best coarse lag sits at an edge of the scan, the scan is widened past that edge by
/// its width (at most twice, within [`WIDEST`]) and the lag estimated again. The
/// returned curve covers the scan that was finally used.
pub fn estimate_widening(
    scan: impl Fn(f64, f64) -> Option<DelayEstimate>,
    lo: f64,
    hi: f64,
    step: f64,
    widen: bool,
) -> Option<DelayEstimate> {
    let (mut lo, mut hi) = (lo, hi);
    let mut e = scan(lo, hi)?;
    if !widen {
        return Some(e);
    }
    for _ in 0..2 {
        let k = coarse_best(&e.curve);
        let by = (hi - lo).max(2.0 * step);
        let (nlo, nhi) = if k == 0 && lo > WIDEST.0 {
            ((lo - by).max(WIDEST.0), hi)
        } else if k + 1 == e.curve.len() && hi < WIDEST.1 {
            (lo, (hi + by).min(WIDEST.1))
        } else {
            break;
        };
        match scan(nlo, nhi) {
            Some(x) => {
                e = x;
                (lo, hi) = (nlo, nhi);
            }
            None => break,
        }
    }
    Some(e)
}

/// Index of the smallest objective on the coarse curve.
pub fn coarse_best(curve: &[(f64, f64)]) -> usize {
    (0..curve.len())
        .min_by(|&a, &b| curve[a].1.total_cmp(&curve[b].1))
        .unwrap_or(0)
}

/// Estimate the lag over the grid `lo..=hi` by `step`, judged on the `candidate` pairs of
/// `pts` ([`opposite_pairs`], found once per export and shared by flow and moisture).
#[allow(clippy::too_many_arguments)]
pub fn estimate(
    pts: &[PairPoint],
    times: &[f64],
    series: &[f64],
    max_gap: f64,
    lo: f64,
    hi: f64,
    step: f64,
    candidate: &[(usize, usize)],
    min_pairs: usize,
) -> Option<DelayEstimate> {
    let lags: Vec<f64> = {
        let n = ((hi - lo) / step).floor() as usize;
        (0..=n).map(|k| lo + k as f64 * step).collect()
    };
    // Sample each point's series on a fine grid of offsets (a quarter of the lag step) from
    // lo - 2 s to hi + 2 s once, walking the time line forward; every objective evaluation
    // then only reads these samples.
    let fine_step = step / 4.0;
    let base = lo - 2.0;
    let n_samples = ((hi + 2.0 - base) / fine_step).round() as usize + 1;
    // Each paired point's slot (its place in `order`).
    let mut slot = vec![u32::MAX; pts.len()];
    let mut order: Vec<usize> = Vec::new();
    for &(i, j) in candidate {
        for k in [i, j] {
            if slot[k] == u32::MAX {
                slot[k] = order.len() as u32;
                order.push(k);
            }
        }
    }
    let mut sa = Sampler {
        pts,
        times,
        series,
        max_gap,
        base,
        fine_step,
        n_samples,
        offsets: (-2..=2)
            .map(|k| (k as f64 / fine_step).round() as isize)
            .collect(),
        slot,
        order,
        sm: vec![Vec::new(); n_samples],
        raw: vec![f64::NAN; n_samples],
    };
    // Only the samples the lags read are taken: first those of the coarse lags and the
    // scan's ends, later those of the fine lags.
    let coarse: Vec<usize> = lags
        .iter()
        .chain([lo, hi].iter())
        .map(|&l| sa.centre(l))
        .filter(|&c| c < n_samples)
        .collect();
    sa.fill(&coarse);
    // Keep pairs whose values exist at both ends of the lag range, so that each lag is
    // judged on (nearly) the same pairs.
    let pairs: Vec<(usize, usize)> = candidate
        .iter()
        .copied()
        .filter(|&(i, j)| {
            [lo, hi]
                .iter()
                .all(|&l| sa.at(i, l).is_finite() && sa.at(j, l).is_finite())
        })
        .collect();
    if pairs.len() < min_pairs {
        return None;
    }
    // Each pair's two slots (both points are paired, so both have one).
    let slots: Vec<(usize, usize)> = pairs
        .iter()
        .map(|&(i, j)| (sa.slot[i] as usize, sa.slot[j] as usize))
        .collect();
    let mut d: Vec<f64> = Vec::with_capacity(pairs.len());
    let curve: Vec<(f64, f64)> = lags
        .iter()
        .map(|&l| (l, objective(&sa.sm, sa.centre(l), &slots, &mut d)))
        .collect();
    let k = coarse_best(&curve);
    // Refine on a quarter-step grid around the best lag, then a parabola through the best
    // fine lag and its neighbours.
    let fine_lags: Vec<f64> = (-6..=6)
        .map(|j| curve[k].0 + j as f64 * fine_step)
        .filter(|l| *l >= lo && *l <= hi)
        .collect();
    let centres: Vec<usize> = fine_lags
        .iter()
        .map(|&l| sa.centre(l))
        .filter(|&c| c < n_samples)
        .collect();
    sa.fill(&centres);
    let fine: Vec<(f64, f64)> = fine_lags
        .iter()
        .map(|&l| (l, objective(&sa.sm, sa.centre(l), &slots, &mut d)))
        .collect();
    let f = (0..fine.len())
        .min_by(|&a, &b| fine[a].1.total_cmp(&fine[b].1))
        .unwrap_or(0);
    let mut lag = fine[f].0;
    if f > 0 && f + 1 < fine.len() {
        let (f0, f1, f2) = (fine[f - 1].1, fine[f].1, fine[f + 1].1);
        let denom = f0 - 2.0 * f1 + f2;
        if denom > 0.0 {
            lag += (0.5 * (f0 - f2) / denom).clamp(-0.5, 0.5) * fine_step;
        }
    }
    Some(DelayEstimate {
        lag_s: lag,
        pairs: pairs.len(),
        curve,
    })
}

/// Robust objective at sample centre `c`: the mean of the pairs' squared differences without
/// the largest 2 %, so a sensor spike or a stray pair cannot decide the lag (`d`: a buffer).
fn objective(sm: &[Vec<f64>], c: usize, slots: &[(usize, usize)], d: &mut Vec<f64>) -> f64 {
    d.clear();
    if let Some(col) = sm.get(c).filter(|col| !col.is_empty()) {
        d.extend(
            slots
                .iter()
                .map(|&(a, b)| (col[a] - col[b]).powi(2))
                .filter(|v| v.is_finite()),
        );
    }
    let keep = ((d.len() as f64 * 0.98).ceil() as usize).min(d.len());
    if keep == 0 {
        return f64::INFINITY;
    }
    if keep < d.len() {
        d.select_nth_unstable_by(keep - 1, |a, b| a.total_cmp(b));
    }
    d[..keep].iter().sum::<f64>() / keep as f64
}

/// The paired points' series, sampled on a fine grid of offsets from each point's time and
/// smoothed, kept lag by lag: `sm[c]` holds every paired point's value at sample centre c,
/// by slot, so that the objective reads one short column per lag instead of one long block
/// per point. A sample's value does not depend on which others were taken (see `sample`),
/// so they are taken as the scan needs them.
struct Sampler<'a> {
    pts: &'a [PairPoint],
    times: &'a [f64],
    series: &'a [f64],
    max_gap: f64,
    /// The first offset (s) and the grid's step.
    base: f64,
    fine_step: f64,
    n_samples: usize,
    /// The five samples one second apart around a centre, in samples.
    offsets: Vec<isize>,
    /// Each point's slot, u32::MAX for a point in no pair, and the points by slot.
    slot: Vec<u32>,
    order: Vec<usize>,
    /// By sample centre, every paired point's smoothed value (empty: not taken yet).
    sm: Vec<Vec<f64>>,
    /// One point's samples, reused from point to point: every index read was written for
    /// that point in the same call.
    raw: Vec<f64>,
}

impl Sampler<'_> {
    /// The series at sample k of point p (time + base + k x fine_step), walking the time
    /// line forward from `j` (the record index reached for an earlier sample of p): the
    /// index found for a sample depends only on where the walk started, so a point's
    /// samples can be taken in any increasing subset.
    fn sample(&self, p: &PairPoint, k: usize, j: &mut usize) -> f64 {
        let (times, series) = (self.times, self.series);
        let t = p.time_s + self.base + k as f64 * self.fine_step;
        while *j < times.len() && times[*j] < t {
            *j += 1;
        }
        let j = *j;
        let v = if t < times[0] || j >= times.len() {
            if times.last() == Some(&t) {
                series[times.len() - 1]
            } else {
                f64::NAN
            }
        } else if times[j] == t {
            series[j]
        } else {
            let dt = times[j] - times[j - 1];
            if dt > self.max_gap {
                f64::NAN
            } else {
                let w = (t - times[j - 1]) / dt;
                series[j - 1] * (1.0 - w) + series[j] * w
            }
        };
        v / p.divisor
    }

    /// Where a point's walk along the time line starts.
    fn walk_start(&self, p: &PairPoint) -> usize {
        self.times
            .partition_point(|&x| x < p.time_s + self.base)
            .max(1)
    }

    /// The sample centre of a lag.
    fn centre(&self, lag: f64) -> usize {
        ((lag - self.base) / self.fine_step).round() as usize
    }

    /// Take the smoothed values at these centres (the mean of five samples one second apart
    /// around time + lag, damping point noise), for every paired point.
    fn fill(&mut self, centres: &[usize]) {
        let n_samples = self.n_samples;
        let mut todo: Vec<usize> = centres
            .iter()
            .copied()
            .filter(|&c| c < n_samples && self.sm[c].is_empty())
            .collect();
        todo.sort_unstable();
        todo.dedup();
        if todo.is_empty() {
            return;
        }
        let offsets = &self.offsets;
        let mut need: Vec<usize> = todo
            .iter()
            .flat_map(|&c| offsets.iter().map(move |o| c as isize + o))
            .filter(|&m| m >= 0 && (m as usize) < n_samples)
            .map(|m| m as usize)
            .collect();
        need.sort_unstable();
        need.dedup();
        let mut cols: Vec<Vec<f64>> = todo
            .iter()
            .map(|_| vec![f64::NAN; self.order.len()])
            .collect();
        let mut raw = std::mem::take(&mut self.raw);
        for (b, &k) in self.order.iter().enumerate() {
            let p = &self.pts[k];
            let mut j = self.walk_start(p);
            for &m in &need {
                raw[m] = self.sample(p, m, &mut j);
            }
            for (col, &c) in cols.iter_mut().zip(&todo) {
                col[b] = self
                    .offsets
                    .iter()
                    .map(|o| {
                        raw.get((c as isize + o) as usize)
                            .copied()
                            .unwrap_or(f64::NAN)
                    })
                    .sum::<f64>()
                    / 5.0;
            }
        }
        self.raw = raw;
        for (col, c) in cols.into_iter().zip(todo) {
            self.sm[c] = col;
        }
    }

    /// Point k's smoothed value at a lag (NaN for a point in no pair or a value not taken).
    fn at(&self, k: usize, lag: f64) -> f64 {
        match self.slot[k] {
            u32::MAX => f64::NAN,
            b => self
                .sm
                .get(self.centre(lag))
                .and_then(|col| col.get(b as usize))
                .copied()
                .unwrap_or(f64::NAN),
        }
    }
}

/// Value of a time series at time `t` by linear interpolation; `None` past either end or
/// when the bracketing records are more than `max_gap` apart.
pub fn interpolate_at(times: &[f64], values: &[f64], t: f64, max_gap: f64) -> Option<f64> {
    let n = times.len();
    if n == 0 || t < times[0] || t > times[n - 1] {
        return None;
    }
    let j = times.partition_point(|&x| x < t);
    if j < n && times[j] == t {
        return Some(values[j]);
    }
    let (a, b) = (j - 1, j);
    let dt = times[b] - times[a];
    if dt > max_gap {
        return None;
    }
    let w = (t - times[a]) / dt;
    Some(values[a] * (1.0 - w) + values[b] * w)
}

/// The delay shift (a derivation, not a rule). With `clean.delay.mode = "auto"` the flow and
/// moisture delays are estimated from the export's live points ([`estimate`]), pairing only
/// steady harvesting (full swath, speed in bounds and within 15 % of the pass median, more
/// than 10 s from either end of the pass); otherwise, or with too few pairs, the fixed
/// delays are used. Each live point then takes the flow and moisture logged `delay` later
/// (linear interpolation on the sensors' time line); where none is within the gap limit the
/// point keeps its own readings and `no_shift_data_at` records the time looked at (the rule
/// `flow_delay_no_data` removes such points).
pub fn shift(e: &mut Export) {
    let s = e.s;
    let header = e.header;
    let d = &mut e.details;
    // A yield-point export: its yields were computed (and delay-corrected) by the software
    // that wrote it; there is no flow to shift.
    if e.w.iter().all(|w| !w.p.flow_kg_s.is_finite()) {
        let why =
            "not applied: the export gives yields, already computed by the software that wrote it";
        (d.flow_delay_s, d.moisture_delay_s) = (0.0, 0.0);
        d.flow_delay_source = why.into();
        d.moisture_delay_source = why.into();
        return;
    }
    if s.delay.mode == DelayMode::Auto {
        let w = &e.w;
        let heading = passes::headings(w);
        let mut span: BTreeMap<u32, (f64, f64)> = BTreeMap::new();
        let mut pass_speeds: BTreeMap<u32, Vec<f64>> = BTreeMap::new();
        for wi in w.iter().filter(|w| w.alive()) {
            let e = span
                .entry(wi.pass)
                .or_insert((f64::INFINITY, f64::NEG_INFINITY));
            e.0 = e.0.min(wi.p.time_s);
            e.1 = e.1.max(wi.p.time_s);
            pass_speeds.entry(wi.pass).or_default().push(wi.p.speed_m_s);
        }
        let pass_median_speed: BTreeMap<u32, f64> =
            pass_speeds.iter().map(|(k, v)| (*k, median(v))).collect();
        let core: Vec<PairPoint> = w
            .iter()
            .zip(&heading)
            .filter(|(wi, h)| {
                let p = wi.p;
                let (t0, t1) = span.get(&wi.pass).copied().unwrap_or((0.0, 0.0));
                let med = pass_median_speed
                    .get(&wi.pass)
                    .copied()
                    .unwrap_or(p.speed_m_s);
                wi.alive()
                    && h.is_finite()
                    && p.speed_m_s >= s.speed.min_m_s.max(0.1)
                    && p.speed_m_s <= s.speed.max_m_s
                    && p.width_m >= s.swath.min_fraction * header
                    && (p.speed_m_s / med - 1.0).abs() < 0.15
                    && p.time_s - t0 > 10.0
                    && t1 - p.time_s > 10.0
            })
            .map(|(wi, h)| PairPoint {
                x: wi.p.x_m,
                y: wi.p.y_m,
                time_s: wi.p.time_s,
                heading_deg: *h,
                pass: wi.pass,
                divisor: wi.p.speed_m_s * wi.p.width_m,
            })
            .collect();
        let dist = if s.delay.pair_distance_m > 0.0 {
            s.delay.pair_distance_m
        } else {
            1.2 * header
        };
        // The pairs depend on positions only: found once for flow, moisture and widening.
        let candidate = opposite_pairs(&core, dist);
        let est = |series: &[f64], pts: &[PairPoint]| {
            let scan = |lo, hi| {
                estimate(
                    pts,
                    &e.times,
                    series,
                    s.pass.max_gap_s,
                    lo,
                    hi,
                    s.delay.step_s,
                    &candidate,
                    s.delay.min_pairs as usize,
                )
            };
            estimate_widening(
                scan,
                s.delay.min_s,
                s.delay.max_s,
                s.delay.step_s,
                s.delay.widen,
            )
        };
        let flow_est = est(&e.flows, &core);
        if let Some(x) = &flow_est {
            d.flow_delay_s = x.lag_s;
            d.flow_delay_source = "estimated".into();
        } else {
            d.flow_delay_source = "fixed (too few opposite-pass pairs to estimate)".into();
        }
        d.flow_delay_estimate = flow_est;
        if s.delay.estimate_moisture {
            let unit: Vec<PairPoint> = core
                .iter()
                .map(|p| PairPoint { divisor: 1.0, ..*p })
                .collect();
            let m_est = est(&e.moist, &unit);
            if let Some(x) = &m_est {
                d.moisture_delay_s = x.lag_s;
                d.moisture_delay_source = "estimated".into();
            } else {
                d.moisture_delay_source = "fixed (too few opposite-pass pairs to estimate)".into();
            }
            d.moisture_delay_estimate = m_est;
        }
    }
    let (fd, md) = (d.flow_delay_s, d.moisture_delay_s);
    let gap = s.pass.max_gap_s;
    for wi in e.w.iter_mut().filter(|w| w.alive()) {
        let (tf, tm) = (wi.p.time_s + fd, wi.p.time_s + md);
        match (
            interpolate_at(&e.times, &e.flows, tf, gap),
            interpolate_at(&e.times, &e.moist, tm, gap),
        ) {
            (Some(f), Some(m)) => {
                wi.flow = f;
                wi.moisture = m;
            }
            (f, _) => {
                wi.no_shift_data_at = Some(if f.is_none() { tf } else { tm });
                wi.flow = wi.p.flow_kg_s;
                wi.moisture = wi.p.moisture_pct;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Two opposite passes over a step in yield at x = 50 m, logged with a 7 s delay.
    #[test]
    fn recovers_a_known_delay_on_two_opposite_passes() {
        let delay = 7.0;
        let truth = |x: f64| if (50.0..70.0).contains(&x) { 2.0 } else { 1.0 } + 0.01 * x;
        let mut pts = Vec::new();
        let mut times = Vec::new();
        let mut series = Vec::new();
        let mut t = 0.0;
        // Pass 0 east at 2 m/s, then pass 1 west 9 m north; positions at time t, the value
        // they cause logged at t + delay.
        let mut pos = Vec::new();
        for k in 0..60 {
            pos.push((2.0 * k as f64, 0.0, 90.0, 0u32));
        }
        for k in 0..60 {
            pos.push((118.0 - 2.0 * k as f64, 9.0, 270.0, 1u32));
        }
        for &(x, y, h, pass) in &pos {
            pts.push(PairPoint {
                x,
                y,
                time_s: t,
                heading_deg: h,
                pass,
                divisor: 1.0,
            });
            times.push(t);
            t += 1.0;
        }
        // series[i] is what the sensor logs at time i: the value of the position at i - delay.
        for i in 0..times.len() {
            let src = i as f64 - delay;
            series.push(if src < 0.0 {
                1.0
            } else {
                truth(pos[src as usize].0)
            });
        }
        let pairs = opposite_pairs(&pts, 11.0);
        let e = estimate(&pts, &times, &series, 5.0, 0.0, 15.0, 1.0, &pairs, 10).unwrap();
        assert!((e.lag_s - delay).abs() < 0.5, "{e:?}");
        assert_eq!(e.curve.len(), 16);
    }

    #[test]
    fn too_few_pairs_gives_none() {
        let pts = vec![PairPoint {
            x: 0.0,
            y: 0.0,
            time_s: 0.0,
            heading_deg: 0.0,
            pass: 0,
            divisor: 1.0,
        }];
        let pairs = opposite_pairs(&pts, 10.0);
        assert!(estimate(&pts, &[0.0], &[1.0], 5.0, 0.0, 0.0, 1.0, &pairs, 1).is_none());
    }
}
