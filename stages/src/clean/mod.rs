//! Clean: from raw monitor records to point yields at standard moisture, removing the known
//! artifacts of yield monitors.
//!
//! Rules, applied in this order within each export (time-ordered); a point is removed by the
//! first rule it breaks, and that rule, the column, the value found and the limit go to the
//! rejection table. Any rule can be switched off with `clean.disabled_rules`; the later rules
//! still test the points it would have removed.
//!
//! 1. `work_state_off`: the export's work-state column (when mapped) says not harvesting.
//! 2. `gps_duplicate`: a second record with the same time stamp (the first is kept).
//! 3. `gps_quality`: HDOP above `gps.max_hdop` or fix quality below `gps.min_fix_quality`
//!    (when those columns are mapped).
//! 4. `gps_jump`: farther from both neighbours than `jump_factor` x the distance the logged
//!    speed allows in the time between them, plus `jump_tolerance_m`.
//! 5. Pass segmentation (no removal): a new pass after a time gap over `pass.max_gap_s` or a
//!    heading more than `pass.max_heading_change_deg` from the pass heading.
//! 6. Delay shift. Mass flow logged at time t belongs to the position at t - delay, so each
//!    position takes the flow logged `delay` later (linear interpolation in time); moisture
//!    likewise with its own delay. With `delay.mode = "auto"` both delays are estimated per
//!    export ([`delay`]); the objective curves go to the summary. `flow_delay_no_data`: the
//!    shifted time falls after the export ends or inside a logging gap.
//! 7. `short_pass`: passes shorter than `pass.min_pass_s` (turn fragments).
//! 8. `pass_start` / `pass_end`: the first `start_trim_s` and last `end_trim_s` of a pass;
//!    with `fill_mode = "flow"` also until the shifted flow first reaches `fill_fraction` of
//!    the pass median (combine filling and emptying).
//! 9. `speed_min`, `speed_max`; `speed_change`: |v - v_prev| / v_prev above
//!    `max_change_fraction`, and the records within `settle_s` seconds of it; `speed_drop`:
//!    below `min_fraction_of_pass_median` of the pass's median speed.
//! 10. `swath_fraction`: logged width below `swath.min_fraction` of the header width.
//! 11. `swath_overlap`: footprint more than `max_overlap_fraction` over ground harvested
//!     earlier ([`spatial`]).
//! 12. `moisture_min`, `moisture_max` (shifted moisture); `moisture_stuck`: the shifted
//!     reading comes from a run of identical readings lasting `stuck_s` or more.
//! 13. `yield_bounds`: yield at standard moisture outside the crop's biological bounds.
//! 14. `yield_outlier`: per export, |Y - median| > `k_mad` x 1.4826 x MAD, or outside Tukey's
//!     fences Q1 - k IQR .. Q3 + k IQR (Tukey 1977, "Exploratory Data Analysis").
//! 15. `yield_local_outlier`: deviation from the median of the neighbours within
//!     `local_radius_m` ([`spatial`]).
//!
//! Yield: Y_wet (kg/ha) = flow (kg/s) x 10 000 / (speed (m/s) x swath (m)) (definition);
//! standard moisture: Y_std = Y_wet x (100 - M) / (100 - M_std) (UF/IFAS EDIS AG442).
//!
//! Complexity: O(n log n) per export (sort, R-trees); the delay scan is O(n x lags).

pub mod delay;
pub mod spatial;

use crate::config::{CleanSettings, Crop};
use crate::table::{CleanPoint, Point, PointSet, Rejection, StageSummary};
use crate::util::{mad, median};
use rayon::prelude::*;
use std::collections::BTreeMap;

/// Every rule name, in the order the rules run.
pub const RULES: &[&str] = &[
    "work_state_off",
    "gps_duplicate",
    "gps_quality",
    "gps_jump",
    "flow_delay_no_data",
    "short_pass",
    "pass_start",
    "pass_end",
    "speed_min",
    "speed_max",
    "speed_change",
    "speed_drop",
    "swath_fraction",
    "swath_overlap",
    "moisture_min",
    "moisture_max",
    "moisture_stuck",
    "yield_bounds",
    "yield_outlier",
    "yield_local_outlier",
];

/// What clean hands on.
#[derive(Clone, Debug)]
pub struct CleanOutput {
    pub points: Vec<CleanPoint>,
    pub rejections: Vec<Rejection>,
    pub summary: StageSummary,
}

/// Wet yield in kg/ha from mass flow (kg/s), speed (m/s) and swath width (m).
pub fn wet_yield_kg_ha(flow_kg_s: f64, speed_m_s: f64, width_m: f64) -> f64 {
    flow_kg_s * 10_000.0 / (speed_m_s * width_m)
}

/// Yield at standard moisture from wet yield and moisture (%), dry-matter basis
/// (UF/IFAS EDIS AG442, Mulvaney & Devkota).
pub fn to_standard_moisture(wet: f64, moisture_pct: f64, standard_pct: f64) -> f64 {
    wet * (100.0 - moisture_pct) / (100.0 - standard_pct)
}

/// The most common logged width (rounded to the millimetre); ties go to the wider.
pub fn modal_width(widths: &[f64]) -> f64 {
    let mut counts: BTreeMap<i64, usize> = BTreeMap::new();
    for w in widths {
        *counts.entry((w * 1000.0).round() as i64).or_default() += 1;
    }
    counts
        .iter()
        .max_by(|a, b| a.1.cmp(b.1).then(a.0.cmp(b.0)))
        .map(|(k, _)| *k as f64 / 1000.0)
        .unwrap_or(0.0)
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

/// Tukey's fences Q1 - k IQR .. Q3 + k IQR (quartiles by linear interpolation).
pub fn tukey_fences(values: &[f64], k: f64) -> (f64, f64) {
    let mut v = values.to_vec();
    v.sort_by(|a, b| a.total_cmp(b));
    let q = |p: f64| {
        let h = p * (v.len() - 1) as f64;
        let (lo, hi) = (h.floor() as usize, h.ceil() as usize);
        v[lo] + (h - lo as f64) * (v[hi] - v[lo])
    };
    let (q1, q3) = (q(0.25), q(0.75));
    (q1 - k * (q3 - q1), q3 + k * (q3 - q1))
}

fn heading_deg(dx: f64, dy: f64) -> f64 {
    dx.atan2(dy).to_degrees()
}

fn angle_diff(a: f64, b: f64) -> f64 {
    let d = (a - b).rem_euclid(360.0);
    if d > 180.0 {
        360.0 - d
    } else {
        d
    }
}

/// A rule's verdict on one point.
type Verdict = (&'static str, &'static str, f64, String);

/// Per-point working state.
struct Work<'a> {
    p: &'a Point,
    pass: u32,
    flow: f64,
    moisture: f64,
    wet: f64,
    std: f64,
    rejected: Option<Verdict>,
}

impl Work<'_> {
    fn alive(&self) -> bool {
        self.rejected.is_none()
    }
}

/// Applies verdicts unless the rule is switched off; the first verdict on a point stands.
struct Rules<'s> {
    disabled: &'s [String],
}

impl Rules<'_> {
    fn on(&self, rule: &str) -> bool {
        !self.disabled.iter().any(|d| d == rule)
    }
    fn reject(
        &self,
        w: &mut Work,
        rule: &'static str,
        column: &'static str,
        value: f64,
        limit: String,
    ) {
        if w.rejected.is_none() && self.on(rule) {
            w.rejected = Some((rule, column, value, limit));
        }
    }
}

/// Mark GPS jumps: points far from both alive neighbours compared with the logged speed.
fn gps_jumps(w: &mut [Work], s: &CleanSettings, rules: &Rules) {
    let alive: Vec<usize> = (0..w.len()).filter(|&i| w[i].alive()).collect();
    let dist = |a: &Point, b: &Point| ((a.x_m - b.x_m).powi(2) + (a.y_m - b.y_m).powi(2)).sqrt();
    let mut flags = Vec::new();
    for (k, &i) in alive.iter().enumerate() {
        let p = w[i].p;
        let mut nearest_excess = f64::INFINITY;
        let mut limit = 0.0;
        let mut any = false;
        for kk in [k.wrapping_sub(1), k + 1] {
            let Some(&j) = alive.get(kk) else { continue };
            any = true;
            let q = w[j].p;
            let dt = (p.time_s - q.time_s).abs().max(1e-9);
            let allowed = s.gps.jump_factor * 0.5 * (p.speed_m_s + q.speed_m_s).max(0.1) * dt
                + s.gps.jump_tolerance_m;
            let d = dist(p, q);
            if d - allowed < nearest_excess {
                nearest_excess = d - allowed;
                limit = allowed;
            }
        }
        if any && nearest_excess > 0.0 {
            flags.push((i, nearest_excess + limit, limit));
        }
    }
    for (i, d, limit) in flags {
        rules.reject(
            &mut w[i],
            "gps_jump",
            "x_m,y_m",
            d,
            format!("<= {limit:.1} m from a neighbour"),
        );
    }
}

/// Assign pass numbers to the points still alive (time-ordered).
fn segment_passes(w: &mut [Work], s: &CleanSettings) {
    let mut pass = 0u32;
    let mut prev: Option<usize> = None;
    let mut reference: Option<f64> = None;
    for i in 0..w.len() {
        if !w[i].alive() {
            continue;
        }
        if let Some(j) = prev {
            let (p, q) = (w[i].p, w[j].p);
            let dt = p.time_s - q.time_s;
            let (dx, dy) = (p.x_m - q.x_m, p.y_m - q.y_m);
            let moved = (dx * dx + dy * dy).sqrt();
            if dt > s.pass.max_gap_s {
                pass += 1;
                reference = None;
            } else if moved > 0.2 {
                let h = heading_deg(dx, dy);
                match reference {
                    None => reference = Some(h),
                    Some(r) if angle_diff(h, r) > s.pass.max_heading_change_deg => {
                        pass += 1;
                        reference = Some(h);
                    }
                    Some(r) => {
                        // Follow gentle curves: move the reference a tenth of the way.
                        let d = (h - r + 540.0).rem_euclid(360.0) - 180.0;
                        reference = Some(r + 0.1 * d);
                    }
                }
            }
        }
        w[i].pass = pass;
        prev = Some(i);
    }
}

/// Heading of each alive point from its alive neighbours in the same pass (degrees).
fn headings(w: &[Work]) -> Vec<f64> {
    let alive: Vec<usize> = (0..w.len()).filter(|&i| w[i].alive()).collect();
    let mut h = vec![f64::NAN; w.len()];
    for (k, &i) in alive.iter().enumerate() {
        let a = if k > 0 && w[alive[k - 1]].pass == w[i].pass {
            alive[k - 1]
        } else {
            i
        };
        let b = if k + 1 < alive.len() && w[alive[k + 1]].pass == w[i].pass {
            alive[k + 1]
        } else {
            i
        };
        if a != b {
            let (p, q) = (w[a].p, w[b].p);
            h[i] = heading_deg(q.x_m - p.x_m, q.y_m - p.y_m).rem_euclid(360.0);
        }
    }
    h
}

/// What clean found out about one export, for the summary.
#[derive(Clone, Debug, serde::Serialize)]
struct ExportDetails {
    header_width_m: f64,
    flow_delay_s: f64,
    flow_delay_source: String,
    moisture_delay_s: f64,
    moisture_delay_source: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    flow_delay_estimate: Option<delay::DelayEstimate>,
    #[serde(skip_serializing_if = "Option::is_none")]
    moisture_delay_estimate: Option<delay::DelayEstimate>,
}

/// Clean one export (its points in time order).
fn clean_export<'a>(
    pts: &[&'a Point],
    s: &CleanSettings,
    crop: &Crop,
) -> (Vec<Work<'a>>, ExportDetails) {
    let rules = Rules {
        disabled: &s.disabled_rules,
    };
    let header = if s.header_width_m > 0.0 {
        s.header_width_m
    } else {
        modal_width(&pts.iter().map(|p| p.width_m).collect::<Vec<_>>())
    };
    let mut w: Vec<Work> = pts
        .iter()
        .map(|p| Work {
            p,
            pass: 0,
            flow: f64::NAN,
            moisture: f64::NAN,
            wet: f64::NAN,
            std: f64::NAN,
            rejected: None,
        })
        .collect();
    // 1-3. Work state, duplicate time stamps, GPS quality.
    let mut last_t = f64::NEG_INFINITY;
    for wi in w.iter_mut() {
        let p = wi.p;
        if p.work_state == 0.0 {
            rules.reject(wi, "work_state_off", "work_state", 0.0, "!= 0".into());
        }
        if p.time_s <= last_t {
            rules.reject(
                wi,
                "gps_duplicate",
                "time_s",
                p.time_s,
                format!("> {last_t}"),
            );
        }
        if s.gps.max_hdop > 0.0 && p.hdop > s.gps.max_hdop {
            rules.reject(
                wi,
                "gps_quality",
                "hdop",
                p.hdop,
                format!("<= {}", s.gps.max_hdop),
            );
        } else if s.gps.min_fix_quality > 0 && p.fix_quality < s.gps.min_fix_quality as f64 {
            rules.reject(
                wi,
                "gps_quality",
                "fix_quality",
                p.fix_quality,
                format!(">= {}", s.gps.min_fix_quality),
            );
        }
        last_t = last_t.max(p.time_s);
    }
    // The sensors' time line: every record but repeated time stamps.
    let mut times = Vec::with_capacity(pts.len());
    let mut flows = Vec::with_capacity(pts.len());
    let mut moist = Vec::with_capacity(pts.len());
    for p in pts {
        if times.last().is_none_or(|&t| p.time_s > t) {
            times.push(p.time_s);
            flows.push(p.flow_kg_s);
            moist.push(p.moisture_pct);
        }
    }
    // 4-5. GPS jumps, passes.
    gps_jumps(&mut w, s, &rules);
    segment_passes(&mut w, s);
    // 6. Delays: estimated from opposite-pass neighbours, or fixed.
    let mut details = ExportDetails {
        header_width_m: header,
        flow_delay_s: s.flow_delay_s,
        flow_delay_source: "fixed (clean.flow_delay_s)".into(),
        moisture_delay_s: s.moisture_delay_s,
        moisture_delay_source: "fixed (clean.moisture_delay_s)".into(),
        flow_delay_estimate: None,
        moisture_delay_estimate: None,
    };
    if s.delay.mode == "auto" {
        let heading = headings(&w);
        let mut span: BTreeMap<u32, (f64, f64)> = BTreeMap::new();
        for wi in w.iter().filter(|w| w.alive()) {
            let e = span
                .entry(wi.pass)
                .or_insert((f64::INFINITY, f64::NEG_INFINITY));
            e.0 = e.0.min(wi.p.time_s);
            e.1 = e.1.max(wi.p.time_s);
        }
        let mut pass_speeds: BTreeMap<u32, Vec<f64>> = BTreeMap::new();
        for wi in w.iter().filter(|w| w.alive()) {
            pass_speeds.entry(wi.pass).or_default().push(wi.p.speed_m_s);
        }
        let pass_median_speed: BTreeMap<u32, f64> =
            pass_speeds.iter().map(|(k, v)| (*k, median(v))).collect();
        // Pair only steady harvesting: full swath, speed in bounds and within 15 % of the
        // pass median, away from pass ends.
        let core: Vec<delay::PairPoint> = w
            .iter()
            .zip(&heading)
            .filter(|(wi, h)| {
                let p = wi.p;
                let (t0, t1) = span.get(&wi.pass).copied().unwrap_or((0.0, 0.0));
                wi.alive()
                    && h.is_finite()
                    && p.speed_m_s >= s.speed.min_m_s.max(0.1)
                    && p.speed_m_s <= s.speed.max_m_s
                    && p.width_m >= s.swath.min_fraction * header
                    && (p.speed_m_s
                        / pass_median_speed
                            .get(&wi.pass)
                            .copied()
                            .unwrap_or(p.speed_m_s)
                        - 1.0)
                        .abs()
                        < 0.15
                    && p.time_s - t0 > 10.0
                    && t1 - p.time_s > 10.0
            })
            .map(|(wi, h)| delay::PairPoint {
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
        let est = |series: &[f64], pts: &[delay::PairPoint]| {
            delay::estimate(
                pts,
                &times,
                series,
                s.pass.max_gap_s,
                s.delay.min_s,
                s.delay.max_s,
                s.delay.step_s,
                dist,
                s.delay.min_pairs as usize,
            )
        };
        let flow_est = est(&flows, &core);
        if let Some(e) = &flow_est {
            details.flow_delay_s = e.lag_s;
            details.flow_delay_source = "estimated".into();
        } else {
            details.flow_delay_source = "fixed (too few opposite-pass pairs to estimate)".into();
        }
        details.flow_delay_estimate = flow_est;
        if s.delay.estimate_moisture {
            let unit: Vec<delay::PairPoint> = core
                .iter()
                .map(|p| delay::PairPoint { divisor: 1.0, ..*p })
                .collect();
            let m_est = est(&moist, &unit);
            if let Some(e) = &m_est {
                details.moisture_delay_s = e.lag_s;
                details.moisture_delay_source = "estimated".into();
            } else {
                details.moisture_delay_source =
                    "fixed (too few opposite-pass pairs to estimate)".into();
            }
            details.moisture_delay_estimate = m_est;
        }
    }
    let (fd, md) = (details.flow_delay_s, details.moisture_delay_s);
    for wi in w.iter_mut().filter(|w| w.alive()) {
        let (tf, tm) = (wi.p.time_s + fd, wi.p.time_s + md);
        match (
            interpolate_at(&times, &flows, tf, s.pass.max_gap_s),
            interpolate_at(&times, &moist, tm, s.pass.max_gap_s),
        ) {
            (Some(f), Some(m)) => {
                wi.flow = f;
                wi.moisture = m;
            }
            (f, _) => {
                let t = if f.is_none() { tf } else { tm };
                rules.reject(
                    wi,
                    "flow_delay_no_data",
                    "time_s",
                    t,
                    format!("a record within {} s", s.pass.max_gap_s),
                );
            }
        }
        if !rules.on("flow_delay_no_data") && wi.flow.is_nan() {
            // Switched off: a point without shifted data keeps its own readings.
            wi.flow = wi.p.flow_kg_s;
            wi.moisture = wi.p.moisture_pct;
        }
    }
    // 7-8. Pass length and pass ends.
    let mut by_pass: BTreeMap<u32, Vec<usize>> = BTreeMap::new();
    let mut pass_speed: BTreeMap<u32, f64> = BTreeMap::new();
    for (i, wi) in w.iter().enumerate().filter(|(_, w)| w.alive()) {
        by_pass.entry(wi.pass).or_default().push(i);
    }
    for idx in by_pass.values() {
        let (t0, t1) = (
            w[idx[0]].p.time_s,
            w[*idx.last().expect("non-empty")].p.time_s,
        );
        let med_flow = median(&idx.iter().map(|&i| w[i].flow).collect::<Vec<_>>());
        let med_speed = median(&idx.iter().map(|&i| w[i].p.speed_m_s).collect::<Vec<_>>());
        pass_speed.insert(w[idx[0]].pass, med_speed);
        // Flow-driven fill and empty: from each end until the flow first reaches the fraction.
        let (mut fill_until, mut empty_from) = (t0, t1);
        if s.pass.fill_mode == "flow" {
            let target = s.pass.fill_fraction * med_flow;
            fill_until = idx
                .iter()
                .map(|&i| &w[i])
                .find(|x| x.flow >= target)
                .map(|x| x.p.time_s)
                .unwrap_or(t1);
            empty_from = idx
                .iter()
                .rev()
                .map(|&i| &w[i])
                .find(|x| x.flow >= target)
                .map(|x| x.p.time_s)
                .unwrap_or(t0);
        }
        for &i in idx {
            let t = w[i].p.time_s;
            if t1 - t0 < s.pass.min_pass_s {
                rules.reject(
                    &mut w[i],
                    "short_pass",
                    "pass_s",
                    t1 - t0,
                    format!(">= {} s", s.pass.min_pass_s),
                );
            }
            if t - t0 < s.pass.start_trim_s {
                rules.reject(
                    &mut w[i],
                    "pass_start",
                    "pass_time_s",
                    t - t0,
                    format!(">= {} s", s.pass.start_trim_s),
                );
            } else if t < fill_until {
                let v = w[i].flow;
                rules.reject(
                    &mut w[i],
                    "pass_start",
                    "flow_shifted_kg_s",
                    v,
                    format!(
                        "first reach {:.3} ({} x pass median)",
                        s.pass.fill_fraction * med_flow,
                        s.pass.fill_fraction
                    ),
                );
            }
            if t1 - t < s.pass.end_trim_s {
                rules.reject(
                    &mut w[i],
                    "pass_end",
                    "pass_time_left_s",
                    t1 - t,
                    format!(">= {} s", s.pass.end_trim_s),
                );
            } else if t > empty_from {
                let v = w[i].flow;
                rules.reject(
                    &mut w[i],
                    "pass_end",
                    "flow_shifted_kg_s",
                    v,
                    format!(
                        "last reach {:.3} ({} x pass median)",
                        s.pass.fill_fraction * med_flow,
                        s.pass.fill_fraction
                    ),
                );
            }
        }
    }
    // 9. Speed: bounds, abrupt change against the previous record (and the records within a
    // settling time on either side: the delay-shifted flow mixes grain from both sides).
    let change: Vec<f64> = (0..w.len())
        .map(|k| {
            if k == 0 {
                return 0.0;
            }
            let v0 = w[k - 1].p.speed_m_s;
            (w[k].p.speed_m_s - v0).abs() / v0.max(0.1)
        })
        .collect();
    let change_times: Vec<f64> = (0..w.len())
        .filter(|&k| change[k] > s.speed.max_change_fraction)
        .map(|k| w[k].p.time_s)
        .collect();
    for k in 0..w.len() {
        if !w[k].alive() {
            continue;
        }
        let p = w[k].p;
        let nearest_change = {
            let j = change_times.partition_point(|&t| t < p.time_s);
            [j.checked_sub(1), Some(j)]
                .into_iter()
                .flatten()
                .filter_map(|j| change_times.get(j))
                .map(|t| (t - p.time_s).abs())
                .fold(f64::INFINITY, f64::min)
        };
        if p.speed_m_s < s.speed.min_m_s {
            rules.reject(
                &mut w[k],
                "speed_min",
                "speed_m_s",
                p.speed_m_s,
                format!(">= {}", s.speed.min_m_s),
            );
        }
        if p.speed_m_s > s.speed.max_m_s {
            rules.reject(
                &mut w[k],
                "speed_max",
                "speed_m_s",
                p.speed_m_s,
                format!("<= {}", s.speed.max_m_s),
            );
        }
        if change[k] > s.speed.max_change_fraction {
            let v = change[k];
            rules.reject(
                &mut w[k],
                "speed_change",
                "speed_change_fraction",
                v,
                format!("<= {}", s.speed.max_change_fraction),
            );
        } else if nearest_change <= s.speed.settle_s {
            rules.reject(
                &mut w[k],
                "speed_change",
                "seconds_from_change",
                nearest_change,
                format!("> {} s from a change", s.speed.settle_s),
            );
        }
        if let Some(&med) = pass_speed.get(&w[k].pass) {
            let limit = s.speed.min_fraction_of_pass_median * med;
            if p.speed_m_s < limit {
                rules.reject(
                    &mut w[k],
                    "speed_drop",
                    "speed_m_s",
                    p.speed_m_s,
                    format!(
                        ">= {limit:.3} ({} x pass median)",
                        s.speed.min_fraction_of_pass_median
                    ),
                );
            }
        }
    }
    // 10. Partial swath.
    for wi in w.iter_mut().filter(|w| w.alive()) {
        if wi.p.width_m < s.swath.min_fraction * header {
            let v = wi.p.width_m;
            rules.reject(
                wi,
                "swath_fraction",
                "width_m",
                v,
                format!(
                    ">= {:.3} ({} x {header:.3})",
                    s.swath.min_fraction * header,
                    s.swath.min_fraction
                ),
            );
        }
    }
    // 11. Swath overlap with ground harvested earlier.
    if rules.on("swath_overlap") {
        let heading = headings(&w);
        let alive: Vec<usize> = (0..w.len())
            .filter(|&i| w[i].alive() && heading[i].is_finite())
            .collect();
        let fps: Vec<spatial::Footprint> = alive
            .iter()
            .enumerate()
            .map(|(k, &i)| {
                let p = w[i].p;
                let h = heading[i].to_radians();
                let dt = if k > 0 {
                    (p.time_s - w[alive[k - 1]].p.time_s).min(s.pass.max_gap_s)
                } else {
                    1.0
                };
                spatial::Footprint {
                    x: p.x_m,
                    y: p.y_m,
                    ux: h.sin(),
                    uy: h.cos(),
                    width: p.width_m,
                    length: p.speed_m_s * dt,
                    time_s: p.time_s,
                    pass: w[i].pass,
                }
            })
            .collect();
        let frac = spatial::overlap_fractions(&fps, 3.0);
        for (k, &i) in alive.iter().enumerate() {
            if frac[k] > s.swath.max_overlap_fraction {
                rules.reject(
                    &mut w[i],
                    "swath_overlap",
                    "overlap_fraction",
                    frac[k],
                    format!("<= {}", s.swath.max_overlap_fraction),
                );
            }
        }
    }
    // 12. Moisture: bounds and a stuck sensor.
    let mut stuck: Vec<(f64, f64)> = Vec::new();
    if s.moisture.stuck_s > 0.0 {
        let mut a = 0;
        for b in 1..=moist.len() {
            if b == moist.len() || moist[b] != moist[a] {
                if times[b - 1] - times[a] >= s.moisture.stuck_s {
                    stuck.push((times[a], times[b - 1]));
                }
                a = b;
            }
        }
    }
    for wi in w.iter_mut().filter(|w| w.alive()) {
        let m = wi.moisture;
        let tm = wi.p.time_s + md;
        if m < s.moisture.min_pct {
            rules.reject(
                wi,
                "moisture_min",
                "moisture_pct",
                m,
                format!(">= {}", s.moisture.min_pct),
            );
        }
        if m > s.moisture.max_pct {
            rules.reject(
                wi,
                "moisture_max",
                "moisture_pct",
                m,
                format!("<= {}", s.moisture.max_pct),
            );
        }
        if let Some(&(a, b)) = stuck.iter().find(|(a, b)| tm >= *a && tm <= *b) {
            rules.reject(
                wi,
                "moisture_stuck",
                "moisture_pct",
                m,
                format!(
                    "unchanged for < {} s (was {:.0} s)",
                    s.moisture.stuck_s,
                    b - a
                ),
            );
        }
    }
    // 13. Yield and its biological bounds.
    for wi in w.iter_mut().filter(|w| w.alive()) {
        wi.wet = wet_yield_kg_ha(wi.flow, wi.p.speed_m_s, wi.p.width_m);
        wi.std = to_standard_moisture(wi.wet, wi.moisture, crop.standard_moisture_pct);
        if !(wi.std >= crop.yield_min_kg_ha && wi.std <= crop.yield_max_kg_ha) {
            let v = wi.std;
            rules.reject(
                wi,
                "yield_bounds",
                "yield_std_kg_ha",
                v,
                format!("{}..{}", crop.yield_min_kg_ha, crop.yield_max_kg_ha),
            );
        }
    }
    // 14. Robust global rule within the export.
    let ys: Vec<f64> = w.iter().filter(|w| w.alive()).map(|w| w.std).collect();
    if ys.len() >= 3 {
        let (lo, hi) = if s.outlier.method == "tukey" {
            tukey_fences(&ys, s.outlier.tukey_k)
        } else {
            let med = median(&ys);
            // Floor of 1 % of the median so identical yields (MAD 0) are not all flagged.
            let scaled = (1.4826 * mad(&ys, med)).max(0.01 * med.abs() / s.outlier.k_mad.max(1e-9));
            (
                med - s.outlier.k_mad * scaled,
                med + s.outlier.k_mad * scaled,
            )
        };
        for wi in w.iter_mut().filter(|w| w.alive()) {
            if wi.std < lo || wi.std > hi {
                let v = wi.std;
                rules.reject(
                    wi,
                    "yield_outlier",
                    "yield_std_kg_ha",
                    v,
                    format!("{lo:.1}..{hi:.1}"),
                );
            }
        }
    }
    // 15. Local rule.
    if rules.on("yield_local_outlier") {
        let alive: Vec<usize> = (0..w.len()).filter(|&i| w[i].alive()).collect();
        let xy: Vec<(f64, f64)> = alive.iter().map(|&i| (w[i].p.x_m, w[i].p.y_m)).collect();
        let y: Vec<f64> = alive.iter().map(|&i| w[i].std).collect();
        let flags = spatial::local_outliers(
            &xy,
            &y,
            s.outlier.local_radius_m,
            s.outlier.local_k,
            s.outlier.local_min_neighbours as usize,
        );
        for (k, f) in flags.into_iter().enumerate() {
            if let Some((dev, limit)) = f {
                rules.reject(
                    &mut w[alive[k]],
                    "yield_local_outlier",
                    "yield_std_kg_ha_minus_local_median",
                    dev,
                    format!("|x| <= {limit:.1}"),
                );
            }
        }
    }
    (w, details)
}

/// Run clean on all exports (in parallel, one export per task).
pub fn run(points: &PointSet, s: &CleanSettings, crop: &Crop) -> CleanOutput {
    run_with(points, s, crop, &crate::progress::Progress::none())
}

/// [`run`], reporting each export cleaned to `progress`.
pub fn run_with(
    points: &PointSet,
    s: &CleanSettings,
    crop: &Crop,
    progress: &crate::progress::Progress,
) -> CleanOutput {
    let mut by_file: BTreeMap<u32, Vec<&Point>> = BTreeMap::new();
    for p in &points.points {
        by_file.entry(p.file).or_default().push(p);
    }
    for pts in by_file.values_mut() {
        pts.sort_by(|a, b| a.time_s.total_cmp(&b.time_s).then(a.row.cmp(&b.row)));
    }
    let groups: Vec<(u32, Vec<&Point>)> = by_file.into_iter().collect();
    progress.start(groups.len() as u64, "exports cleaned");
    let results: Vec<(u32, Vec<Work>, ExportDetails)> = groups
        .par_iter()
        .map(|(f, pts)| {
            let (w, d) = clean_export(pts, s, crop);
            progress.step();
            (*f, w, d)
        })
        .collect();
    let mut kept: Vec<CleanPoint> = Vec::new();
    let mut rejections: Vec<Rejection> = Vec::new();
    let mut details = BTreeMap::new();
    for (file, w, d) in results {
        let fname = &points.files[file as usize];
        details.insert(fname.clone(), d);
        for wi in w {
            match wi.rejected {
                Some((rule, column, value, limit)) => rejections.push(Rejection {
                    source_file: fname.clone(),
                    source_row: wi.p.row,
                    id: wi.p.id.to_string(),
                    rule: rule.to_string(),
                    column: column.to_string(),
                    value: format!("{value:.3}"),
                    limit,
                }),
                None => kept.push(CleanPoint {
                    base: wi.p.clone(),
                    pass: wi.pass,
                    flow_shifted_kg_s: wi.flow,
                    moisture_shifted_pct: wi.moisture,
                    yield_wet_kg_ha: wi.wet,
                    yield_std_kg_ha: wi.std,
                }),
            }
        }
    }
    kept.sort_by_key(|p| p.base.id);
    rejections.sort_by(|a, b| {
        (a.source_file.as_str(), a.source_row).cmp(&(b.source_file.as_str(), b.source_row))
    });
    let mut summary =
        StageSummary::from_rejections("clean", "points", points.points.len() as u64, &rejections);
    summary.details.insert(
        "exports".into(),
        serde_json::to_value(&details).unwrap_or_default(),
    );
    summary
        .details
        .insert("rule_order".into(), serde_json::json!(RULES));
    summary
        .details
        .insert("disabled_rules".into(), serde_json::json!(s.disabled_rules));
    CleanOutput {
        points: kept,
        rejections,
        summary,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::{crop_table, TrialConfig, TEST_TRIAL};

    #[test]
    fn worked_yield_example() {
        // ../shared/CHECKS.md (arithmetic): 20 kg/s at 1.8 m/s with a 9.144 m header is
        // 12,151.26 kg/ha wet.
        let y = wet_yield_kg_ha(20.0, 1.8, 9.144);
        assert!((y - 12_151.26).abs() < 0.005, "{y}");
    }

    #[test]
    fn worked_moisture_example() {
        // UF/IFAS EDIS AG442: 10,000 lb/ac at 20 % adjusted to 15.5 % = 9,467.46 lb/ac.
        // The common mistake (subtracting the water) would give 9,240.
        let y = to_standard_moisture(10_000.0, 20.0, 15.5);
        assert!((y - 9_467.46).abs() < 0.005, "{y}");
        // SDSU Extension: shrink per point above 15.5 % is 100 / 84.5 = 1.1834 %.
        let per_point = 100.0 * (1.0 - to_standard_moisture(1.0, 16.5, 15.5));
        assert!((per_point - 1.1834).abs() < 1e-4, "{per_point}");
    }

    #[test]
    fn interpolation_and_gaps() {
        let t = [0.0, 1.0, 2.0, 10.0];
        let v = [0.0, 10.0, 20.0, 100.0];
        assert_eq!(interpolate_at(&t, &v, 1.5, 5.0), Some(15.0));
        assert_eq!(interpolate_at(&t, &v, 2.0, 5.0), Some(20.0));
        assert_eq!(interpolate_at(&t, &v, 5.0, 5.0), None, "inside an 8 s gap");
        assert_eq!(interpolate_at(&t, &v, 11.0, 5.0), None, "after the end");
    }

    #[test]
    fn modal_width_prefers_most_common() {
        assert_eq!(modal_width(&[9.144, 9.144, 6.0, 9.144, 4.5]), 9.144);
    }

    /// The rule that removed point `id`, if any.
    fn rule_of(out: &CleanOutput, id: u64) -> Option<String> {
        out.rejections
            .iter()
            .find(|r| r.id == id.to_string())
            .map(|r| r.rule.clone())
    }

    fn line(n: usize, speed: f64, heading_east: bool, t0: f64, x0: f64) -> Vec<Point> {
        (0..n)
            .map(|i| Point {
                id: 0,
                file: 0,
                row: 0,
                time_s: t0 + i as f64,
                lon: 0.0,
                lat: 0.0,
                x_m: if heading_east {
                    x0 + speed * i as f64
                } else {
                    x0 - speed * i as f64
                },
                y_m: 0.0,
                flow_kg_s: 10.0,
                speed_m_s: speed,
                width_m: 9.0,
                moisture_pct: 15.5,
                work_state: f64::NAN,
                hdop: f64::NAN,
                fix_quality: f64::NAN,
            })
            .collect()
    }

    fn set(mut pts: Vec<Point>) -> PointSet {
        for (i, p) in pts.iter_mut().enumerate() {
            p.id = i as u64;
            p.row = i as u64 + 2;
        }
        PointSet {
            files: vec!["a.csv".into()],
            points: pts,
            epsg: 32614,
        }
    }

    #[test]
    fn rules_by_hand() {
        let cfg = TrialConfig::from_toml(TEST_TRIAL, "t.toml", &[]).unwrap();
        let crop = crop_table()["corn"].clone();
        let mut s = cfg.clean.clone();
        s.delay.mode = "fixed".into();
        s.moisture.stuck_s = 0.0; // constant moisture by construction
        s.flow_delay_s = 2.0;
        s.moisture_delay_s = 2.0;
        s.pass.start_trim_s = 3.0;
        s.pass.end_trim_s = 1.0;
        // 60 s east, a 10 s gap, 60 s west.
        let mut pts = line(60, 2.0, true, 0.0, 0.0);
        pts.extend(line(60, 2.0, false, 70.0, 118.0));
        pts[30].speed_m_s = 0.3; // speed_min
        pts[40].x_m += 60.0; // gps_jump
        pts[80].width_m = 4.0; // swath_fraction (4 < 0.9 x 9)
        pts[90].flow_kg_s = 30.0; // lands on point 88 after the 2 s shift: outlier
        let out = run(&set(pts), &s, &crop);
        let rule = |id: u64| rule_of(&out, id);
        assert_eq!(rule(30).as_deref(), Some("speed_min"));
        assert_eq!(rule(40).as_deref(), Some("gps_jump"));
        assert_eq!(rule(80).as_deref(), Some("swath_fraction"));
        assert_eq!(rule(88).as_deref(), Some("yield_outlier"));
        // Pass one: t = 0..59; start trim drops t < 3, end trim t > 58; the last 2 s of the
        // pass have no flow record 2 s later within the 5 s gap limit.
        for id in 0..3 {
            assert_eq!(rule(id).as_deref(), Some("pass_start"), "{id}");
        }
        assert_eq!(rule(58).as_deref(), Some("flow_delay_no_data"));
        assert_eq!(rule(59).as_deref(), Some("flow_delay_no_data"));
        assert_eq!(rule(57).as_deref(), Some("pass_end"));
        assert_eq!(rule(3), None);
        // Kept points carry pass 0 or 1 and the hand-computed yield:
        // 10 kg/s x 10 000 / (2 m/s x 9 m) = 5 555.56 kg/ha at standard moisture.
        let p = out.points.iter().find(|p| p.base.id == 10).unwrap();
        assert!((p.yield_std_kg_ha - 5555.555).abs() < 0.01);
        assert!(out.points.iter().any(|p| p.pass == 1));
        assert_eq!(out.points.len() + out.rejections.len(), 120);
    }

    fn plain_settings() -> CleanSettings {
        let cfg = TrialConfig::from_toml(TEST_TRIAL, "t.toml", &[]).unwrap();
        let mut s = cfg.clean.clone();
        s.delay.mode = "fixed".into();
        s.flow_delay_s = 0.0;
        s.moisture_delay_s = 0.0;
        s.pass.start_trim_s = 0.0;
        s.pass.end_trim_s = 0.0;
        s
    }

    #[test]
    fn more_rules_by_hand() {
        let crop = crop_table()["corn"].clone();
        let s = plain_settings();
        let mut pts = line(90, 2.0, true, 0.0, 0.0);
        for (i, p) in pts.iter_mut().enumerate() {
            p.work_state = 1.0;
            p.hdop = 1.0;
            p.moisture_pct = 15.0 + 0.01 * i as f64;
        }
        pts[5].work_state = 0.0; // work_state_off
        pts[10].time_s = pts[9].time_s; // gps_duplicate (the later row goes)
        pts[15].hdop = 6.0; // gps_quality (> 4)
        for p in &mut pts[18..=50] {
            p.moisture_pct = 16.0; // 32 s unchanged: moisture_stuck (>= 30 s)
        }
        // Abrupt change: 2.0 -> 1.0 m/s at 60 (50 %), back to 2.0 at 63: speed_change at
        // 60 and 63 and within 3 s of either (57..=66).
        for p in &mut pts[60..63] {
            p.speed_m_s = 1.0;
        }
        // Gradual slow-down (each step 10 %, under the 25 % limit) to 1.2 m/s: the records
        // under 0.7 x the pass median 2.0 = 1.4 m/s (73..=77) go as speed_drop.
        for (k, v) in [1.8, 1.62, 1.46, 1.31, 1.2, 1.2, 1.2, 1.31, 1.46, 1.62, 1.8]
            .iter()
            .enumerate()
        {
            pts[70 + k].speed_m_s = *v;
        }
        // Keep positions consistent with the speeds (no GPS jumps) and the flow proportional
        // to speed (constant yield).
        for p in pts.iter_mut() {
            p.flow_kg_s = 5.0 * p.speed_m_s;
        }
        for i in 1..pts.len() {
            pts[i].x_m = pts[i - 1].x_m + pts[i].speed_m_s * (pts[i].time_s - pts[i - 1].time_s);
        }
        let out = run(&set(pts), &s, &crop);
        let rule = |id: u64| rule_of(&out, id);
        assert_eq!(rule(5).as_deref(), Some("work_state_off"));
        assert_eq!(rule(10).as_deref(), Some("gps_duplicate"));
        assert_eq!(rule(9), None);
        assert_eq!(rule(15).as_deref(), Some("gps_quality"));
        for id in 18..=50 {
            assert_eq!(rule(id).as_deref(), Some("moisture_stuck"), "{id}");
        }
        assert_eq!(rule(17), None);
        assert_eq!(rule(51), None);
        for id in 57..=66 {
            assert_eq!(rule(id).as_deref(), Some("speed_change"), "{id}");
        }
        assert_eq!(rule(56), None);
        for id in 73..=77 {
            assert_eq!(
                rule(id).as_deref(),
                Some("speed_drop"),
                "{id}: 1.31 and 1.2 m/s < 1.4"
            );
        }
        assert_eq!(rule(72), None, "1.46 m/s is above 1.4");
        // Switching a rule off keeps its points.
        let mut off = plain_settings();
        off.disabled_rules = vec!["moisture_stuck".into()];
        let mut pts2 = line(90, 2.0, true, 0.0, 0.0);
        for p in &mut pts2[18..=50] {
            p.moisture_pct = 16.0;
        }
        let out = run(&set(pts2), &off, &crop);
        assert!(out.rejections.iter().all(|r| r.rule != "moisture_stuck"));
    }

    #[test]
    fn a_rule_switched_off_lets_the_later_rules_see_its_points() {
        let crop = crop_table()["corn"].clone();
        let mut s = plain_settings();
        s.moisture.stuck_s = 0.0; // constant moisture by construction
        let mut pts = line(60, 2.0, true, 0.0, 0.0);
        // A 0.3 m/s record in a 2 m/s pass: below speed_min and an 85 % change.
        pts[30].speed_m_s = 0.3;
        // A header-up record logged with a repeated time stamp.
        pts[20].work_state = 0.0;
        pts[20].time_s = pts[19].time_s;
        let on = run(&set(pts.clone()), &s, &crop);
        assert_eq!(rule_of(&on, 30).as_deref(), Some("speed_min"));
        assert_eq!(rule_of(&on, 20).as_deref(), Some("work_state_off"));
        // Switched off, those rules are absent: the next rules in the order take the points
        // (before the fix the slow record escaped every speed rule and the header-up record
        // escaped gps_duplicate).
        s.disabled_rules = vec!["speed_min".into(), "work_state_off".into()];
        let off = run(&set(pts), &s, &crop);
        assert_eq!(rule_of(&off, 30).as_deref(), Some("speed_change"));
        assert_eq!(rule_of(&off, 20).as_deref(), Some("gps_duplicate"));
        assert_eq!(off.points.len() + off.rejections.len(), 60);
    }

    #[test]
    fn tukey_fences_by_hand() {
        // Sorted 1..9, 100: Q1 = 3.25, Q3 = 7.75 (linear interpolation), IQR 4.5;
        // k = 1.5 gives -3.5 .. 14.5.
        let mut v: Vec<f64> = (1..=9).map(f64::from).collect();
        v.push(100.0);
        let (lo, hi) = tukey_fences(&v, 1.5);
        assert!(
            (lo + 3.5).abs() < 1e-12 && (hi - 14.5).abs() < 1e-12,
            "{lo} {hi}"
        );
    }

    #[test]
    fn flow_driven_fill_trims_the_ramp() {
        let crop = crop_table()["corn"].clone();
        let mut s = plain_settings();
        s.pass.fill_mode = "flow".into();
        s.pass.fill_fraction = 0.9;
        s.moisture.stuck_s = 0.0;
        // The 95 % record would be a 5 % yield outlier on otherwise identical records.
        s.disabled_rules = vec!["yield_outlier".into(), "yield_local_outlier".into()];
        let mut pts = line(60, 2.0, true, 0.0, 0.0);
        // Fill: 20 %, 40 %, 60 %, 80 %, 95 % of the level; empty: 85 %, 50 % at the end.
        for (i, f) in [0.2, 0.4, 0.6, 0.8, 0.95].iter().enumerate() {
            pts[i].flow_kg_s = 10.0 * f;
        }
        pts[58].flow_kg_s = 8.5;
        pts[59].flow_kg_s = 5.0;
        let out = run(&set(pts), &s, &crop);
        let rule = |id: u64| rule_of(&out, id);
        for id in 0..4 {
            assert_eq!(rule(id).as_deref(), Some("pass_start"), "{id}");
        }
        assert_eq!(rule(4), None, "95 % reaches the 90 % target");
        assert_eq!(rule(58).as_deref(), Some("pass_end"));
        assert_eq!(rule(59).as_deref(), Some("pass_end"));
        assert_eq!(rule(57), None);
    }
}
