//! Clean: from raw monitor records to point yields at standard moisture, removing the known
//! artifacts of yield monitors.
//!
//! Rules, applied in this order within each export (time-ordered); a point is removed by the
//! first enabled rule it breaks, and that rule, the column, the value found and the limit go
//! to the rejection table. Any rule can be switched off with `clean.disabled_rules`; a rule
//! switched off is absent, so the later rules still test its points. Each rule is one file
//! under [`rules`], registered in [`rules::RULES`] (the single source of this order); the
//! derived quantities (passes: [`passes`], the delay shift: [`delay`], yields: below) are
//! computed where the first rule that needs them stands in the list.
//!
//! 1. `work_state_off`: the export's work-state column (when mapped) says not harvesting
//!    (a flicker between working records at most `work_state_bridge_s` apart is kept).
//! 2. `gps_duplicate`: a second record with the same time stamp (the first is kept).
//! 3. `gps_quality`: HDOP above `gps.max_hdop` or fix quality below `gps.min_fix_quality`
//!    (when those columns are mapped).
//! 4. `gps_jump`: farther from both neighbours than `jump_factor` x the distance the logged
//!    speed allows in the time between them, plus `jump_tolerance_m`.
//! 5. Pass segmentation (no removal, [`passes`]): a new pass after a time gap over `pass.max_gap_s` or a
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
pub mod grid;
pub mod passes;
pub mod rules;
pub mod settings;
pub mod spatial;
pub mod timeline;
pub mod work;
pub mod zones;

pub use delay::interpolate_at;
pub use rules::tukey_fences;
pub use settings::CleanSettings;

use crate::crop::Crop;
use crate::table::{CleanPoint, Point, PointSet, Rejection, StageSummary};
use rayon::prelude::*;
use rules::RULES;
use std::collections::BTreeMap;
use work::{Export, ExportDetails, Needs, Work};

/// What clean hands on.
#[derive(Clone, Debug)]
pub struct CleanOutput {
    pub points: Vec<CleanPoint>,
    pub rejections: Vec<Rejection>,
    pub summary: StageSummary,
}

pub use crate::crop::{to_standard_moisture, wet_yield_kg_ha};

/// A record's yield at standard moisture as logged, before any cleaning (no delay shift;
/// moisture capped at 99 % so that a broken sensor gives a number): what the report's map of
/// every record shows.
pub fn record_yield_kg_ha(p: &crate::table::Point, crop: &crate::crop::Crop) -> f64 {
    if p.yield_kg_ha.is_finite() {
        return p.yield_kg_ha;
    }
    let wet = wet_yield_kg_ha(p.flow_kg_s, p.speed_m_s, p.width_m);
    to_standard_moisture(wet, p.moisture_pct.min(99.0), crop.standard_moisture_pct)
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

/// Derivation: wet yield and yield at standard moisture of every live point.
fn yields(e: &mut Export) {
    let standard = e.crop.standard_moisture_pct;
    for wi in e.w.iter_mut().filter(|w| w.alive()) {
        if wi.p.yield_kg_ha.is_finite() {
            // A yield-point export: the yield at standard moisture is given.
            wi.std = wi.p.yield_kg_ha;
            continue;
        }
        wi.wet = wet_yield_kg_ha(wi.flow, wi.p.speed_m_s, wi.p.width_m);
        wi.std = to_standard_moisture(wi.wet, wi.moisture, standard);
    }
}

/// Derive everything up to `need` that is not derived yet, in order.
fn derive_up_to(e: &mut Export, need: Needs) {
    while e.derived < need {
        e.derived = match e.derived {
            Needs::Records => {
                passes::segment(&mut e.w, e.s);
                Needs::Passes
            }
            Needs::Passes => {
                delay::shift(e);
                Needs::Shifted
            }
            Needs::Shifted => {
                passes::stats(e);
                Needs::PassStats
            }
            Needs::PassStats | Needs::Yield => {
                yields(e);
                Needs::Yield
            }
        };
    }
}

/// Clean one export (its points in time order): every rule of [`RULES`] that is switched
/// on, in order, each quantity derived where the first rule needing it stands.
fn clean_export<'a>(
    pts: &[&'a Point],
    s: &'a CleanSettings,
    crop: &'a Crop,
    zones: Option<&zones::Zones>,
) -> (Vec<Work<'a>>, ExportDetails) {
    let header = if s.header_width_m > 0.0 {
        s.header_width_m
    } else {
        modal_width(&pts.iter().map(|p| p.width_m).collect::<Vec<_>>())
    };
    let w: Vec<Work> = pts
        .iter()
        .map(|p| Work {
            p,
            pass: 0,
            flow: p.flow_kg_s,
            moisture: p.moisture_pct,
            no_shift_data_at: None,
            wet: f64::NAN,
            std: f64::NAN,
            rejected: None,
            zone: zones.map_or(zones::OUTSIDE, |z| z.label(p.x_m, p.y_m)),
        })
        .collect();
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
    let mut e = Export {
        w,
        s,
        crop,
        header,
        times,
        flows,
        moist,
        pass_stats: BTreeMap::new(),
        details: ExportDetails {
            header_width_m: header,
            flow_delay_s: s.flow_delay_s,
            flow_delay_source: "fixed (clean.flow_delay_s)".into(),
            moisture_delay_s: s.moisture_delay_s,
            moisture_delay_source: "fixed (clean.moisture_delay_s)".into(),
            flow_delay_estimate: None,
            moisture_delay_estimate: None,
            time_steps_back: 0,
            work_state_bridged: 0,
            skipped_rules: BTreeMap::new(),
        },
        derived: Needs::Records,
    };
    // What this export logged (a yield-point export may lack flow, speed, swath, moisture),
    // found once.
    let any = |f: fn(&Point) -> f64| pts.iter().any(|p| f(p).is_finite());
    let (flow, speed, width) = (
        any(|p| p.flow_kg_s),
        any(|p| p.speed_m_s),
        any(|p| p.width_m),
    );
    let moisture = any(|p| p.moisture_pct);
    let given = any(|p| p.yield_kg_ha);
    let timed = any(|p| p.time_s);
    let has = |q: rules::Quantity| match q {
        rules::Quantity::Flow => flow,
        rules::Quantity::Speed => speed,
        rules::Quantity::Width => width,
        rules::Quantity::Moisture => moisture,
        rules::Quantity::Time => timed,
        rules::Quantity::MoistureSensor => moisture && !given,
    };
    for rule in RULES {
        derive_up_to(&mut e, rule.needs());
        if !s.enabled(rule.name()) {
            continue;
        }
        if let Some(q) = rule.requires().iter().find(|q| !has(**q)) {
            e.details
                .skipped_rules
                .insert(rule.name().to_string(), q.lacking().to_string());
            continue;
        }
        rule.apply(&mut e);
    }
    derive_up_to(&mut e, Needs::Yield);
    (e.w, e.details)
}

/// Run clean on all exports (in parallel, one export per task).
pub fn run(points: &PointSet, s: &CleanSettings, crop: &Crop) -> CleanOutput {
    run_with(points, s, crop, None, &crate::progress::Progress::none())
}

/// [`run`] with the trial's plots by treatment when they are known (rules that compare a
/// record with its neighbours then stay within one treatment's plots), reporting each
/// export cleaned to `progress`.
pub fn run_with(
    points: &PointSet,
    s: &CleanSettings,
    crop: &Crop,
    zones: Option<&zones::Zones>,
    progress: &crate::progress::Progress,
) -> CleanOutput {
    let mut by_file: BTreeMap<u32, Vec<&Point>> = BTreeMap::new();
    for p in &points.points {
        by_file.entry(p.file).or_default().push(p);
    }
    // Records in the order they were logged, time stamps that step back repaired
    // ([`timeline`]); the repaired copies live here while the exports are cleaned.
    for pts in by_file.values_mut() {
        pts.sort_by_key(|p| p.row);
    }
    let mut repaired: BTreeMap<u32, (Vec<Point>, usize)> = BTreeMap::new();
    for (f, pts) in &by_file {
        let (t, back) = timeline::repair(&pts.iter().map(|p| p.time_s).collect::<Vec<_>>());
        if back > 0 {
            let fixed = pts
                .iter()
                .zip(t)
                .map(|(p, t)| Point {
                    time_s: t,
                    ..(*p).clone()
                })
                .collect();
            repaired.insert(*f, (fixed, back));
        }
    }
    let groups: Vec<(u32, Vec<&Point>)> = by_file
        .into_iter()
        .map(|(f, pts)| match repaired.get(&f) {
            Some((fixed, _)) => (f, fixed.iter().collect()),
            None => (f, pts),
        })
        .collect();
    progress.start(groups.len() as u64, "exports cleaned");
    let results: Vec<(u32, Vec<Work>, ExportDetails)> = groups
        .par_iter()
        .map(|(f, pts)| {
            let (w, mut d) = clean_export(pts, s, crop, zones);
            d.time_steps_back = repaired.get(f).map_or(0, |r| r.1);
            progress.step();
            (*f, w, d)
        })
        .collect();
    // Sized once: the kept points are the largest table of the stage.
    let n_kept: usize = results
        .iter()
        .map(|r| r.1.iter().filter(|w| w.alive()).count())
        .sum();
    let mut kept: Vec<CleanPoint> = Vec::with_capacity(n_kept);
    let mut rejections: Vec<Rejection> = Vec::with_capacity(points.points.len() - n_kept);
    let mut texts = crate::table::Texts::default();
    let mut details = BTreeMap::new();
    for (file, w, d) in results {
        let fname = &points.files[file as usize];
        let source_file = texts.get(fname);
        details.insert(fname.clone(), d);
        for wi in w {
            match wi.rejected.map(|v| *v) {
                Some((rule, column, value, limit)) => rejections.push(Rejection {
                    source_file: source_file.clone(),
                    source_row: wi.p.row,
                    id: wi.p.id.to_string(),
                    rule: texts.get(rule),
                    column: texts.get(column),
                    value: format!("{value:.3}"),
                    limit: texts.get(&limit),
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
    // Point ids are unique: an in-place sort gives the same order as a stable one.
    kept.sort_unstable_by_key(|p| p.base.id);
    rejections
        .sort_by(|a, b| (&*a.source_file, a.source_row).cmp(&(&*b.source_file, b.source_row)));
    let mut summary =
        StageSummary::from_rejections("clean", "points", points.points.len() as u64, &rejections);
    summary.details.insert(
        "exports".into(),
        serde_json::to_value(&details).unwrap_or_default(),
    );
    summary
        .details
        .insert("rule_order".into(), serde_json::json!(rules::names()));
    summary
        .details
        .insert("disabled_rules".into(), serde_json::json!(s.disabled_rules));
    // Rules that compare a record with its neighbours: with the plots known, only with
    // records in plots of the same treatment.
    summary.details.insert(
        "neighbours_within_treatment".into(),
        serde_json::json!(zones.is_some()),
    );
    let mut warnings = export_warnings(points, &summary, s.warn_rule_share);
    for (f, d) in &details {
        warnings.extend(delay_warnings(f, d, s));
        if d.time_steps_back > 0 {
            warnings.push(format!(
                "export {f}: its GPS time stepped back {} time(s); records were kept in file order and the time stamps after each step repaired",
                d.time_steps_back
            ));
        }
    }
    summary.set_warnings(&warnings);
    CleanOutput {
        points: kept,
        rejections,
        summary,
    }
}

/// An export's share of points removed by one rule is unusual, and a warning, when the trial
/// has at least this many exports, the share exceeds [`UNUSUAL_MIN_SHARE`] and it is more
/// than [`UNUSUAL_FACTOR`] times the median share of that rule over the exports. Common
/// practice, no source: a rule that takes a fifth of one export's records and a twentieth
/// of the others' points at that export's sensors or mapping.
const UNUSUAL_MIN_EXPORTS: usize = 3;
const UNUSUAL_MIN_SHARE: f64 = 0.2;
const UNUSUAL_FACTOR: f64 = 4.0;

/// An estimated delay at the edge of its (possibly widened) scan (the true delay may lie
/// beyond it, or the export was already delay-corrected), a flat objective (the lag barely
/// matters to the pairs' agreement: a weak estimate), or a fixed fallback where an estimate
/// was asked for.
fn delay_warnings(export: &str, d: &ExportDetails, s: &CleanSettings) -> Vec<String> {
    let mut out = Vec::new();
    if s.delay.mode != settings::DelayMode::Auto {
        return out;
    }
    let mut check = |what: &str,
                     lag: f64,
                     source: &str,
                     est: &Option<delay::DelayEstimate>,
                     fixed_key: &str,
                     asked: bool| {
        if !asked {
            return;
        }
        if source.starts_with("not applied") {
            return;
        }
        if source != "estimated" {
            out.push(format!(
                "export {export}: the {what} delay could not be estimated ({}); the fixed {fixed_key} = {lag} s was applied",
                source.trim_start_matches("fixed (").trim_end_matches(')')
            ));
            return;
        }
        let Some(e) = est.as_ref().filter(|e| !e.curve.is_empty()) else {
            return;
        };
        let (lo, hi) = (e.curve[0].0, e.curve[e.curve.len() - 1].0);
        // The coarse objective's minimum at the first or last candidate lag: the refinement
        // may move the estimate a little inside, but the scan did not bracket a minimum.
        let k = delay::coarse_best(&e.curve);
        if k == 0 || k + 1 == e.curve.len() {
            out.push(format!(
                "export {export}: the {what} delay estimate {lag:.2} s sits at the edge of the scan ({lo}-{hi} s): the true delay may lie outside it, or the export is already delay-corrected; check it, or set clean.delay.mode = \"fixed\""
            ));
            return;
        }
        let (min, max) = e
            .curve
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |a, c| {
                (a.0.min(c.1), a.1.max(c.1))
            });
        if max - min < FLAT_OBJECTIVE * min {
            out.push(format!(
                "export {export}: the {what} delay objective is flat over the scan ({lo}-{hi} s; it varies by {:.1} % of its minimum): the estimate {lag:.2} s is weak; check it, or set clean.delay.mode = \"fixed\"",
                100.0 * (max - min) / min
            ));
        }
    };
    check(
        "flow",
        d.flow_delay_s,
        &d.flow_delay_source,
        &d.flow_delay_estimate,
        "clean.flow_delay_s",
        true,
    );
    check(
        "moisture",
        d.moisture_delay_s,
        &d.moisture_delay_source,
        &d.moisture_delay_estimate,
        "clean.moisture_delay_s",
        s.delay.estimate_moisture,
    );
    out
}

/// A delay objective whose range over the scan is under this fraction of its minimum is flat
/// (common practice, no source: on simulated and sample exports the range is 2.7 to 36 times
/// the minimum).
const FLAT_OBJECTIVE: f64 = 0.1;

/// Exports that lost every point, more than `share` of them to one rule, or an unusual share
/// to one rule compared with the other exports (see [`UNUSUAL_FACTOR`]).
fn export_warnings(points: &PointSet, summary: &StageSummary, share: f64) -> Vec<String> {
    let mut n_per_file: BTreeMap<&str, u64> = BTreeMap::new();
    for p in &points.points {
        *n_per_file
            .entry(points.files[p.file as usize].as_str())
            .or_default() += 1;
    }
    // Each rule's share of each export's points, for comparing an export with the others.
    let share_of = |f: &str, rule: &str, n: u64| {
        summary
            .by_file
            .get(f)
            .and_then(|b| b.get(rule))
            .map_or(0.0, |k| *k as f64 / n.max(1) as f64)
    };
    let rules: std::collections::BTreeSet<&String> =
        summary.by_file.values().flat_map(|b| b.keys()).collect();
    let median_share: BTreeMap<&str, f64> = rules
        .iter()
        .map(|r| {
            let v: Vec<f64> = n_per_file.iter().map(|(f, n)| share_of(f, r, *n)).collect();
            (r.as_str(), crate::util::median(&v))
        })
        .collect();
    let mut out = Vec::new();
    for (&f, &n) in &n_per_file {
        let Some(by) = summary.by_file.get(f) else {
            continue;
        };
        let removed: u64 = by.values().sum();
        let listed = || {
            by.iter()
                .map(|(r, k)| format!("{r}: {k}"))
                .collect::<Vec<_>>()
                .join(", ")
        };
        if removed == n {
            out.push(format!(
                "export {f}: all {n} points removed ({}); it contributes nothing",
                listed()
            ));
            continue;
        }
        for (rule, k) in by {
            let own = *k as f64 / n as f64;
            let typical = median_share.get(rule.as_str()).copied().unwrap_or(0.0);
            if *k as f64 > share * n as f64 {
                out.push(format!(
                    "export {f}: rule {rule} removed {k} of its {n} points ({:.0} %, above clean.warn_rule_share = {share})",
                    100.0 * own
                ));
            } else if n_per_file.len() >= UNUSUAL_MIN_EXPORTS
                && own > UNUSUAL_MIN_SHARE
                && own > UNUSUAL_FACTOR * typical
            {
                out.push(format!(
                    "export {f}: rule {rule} removed {k} of its {n} points ({:.0} %), against a median of {:.0} % over the trial's {} exports: check this export's sensors or mapping",
                    100.0 * own,
                    100.0 * typical,
                    n_per_file.len()
                ));
            }
        }
    }
    out
}

#[cfg(test)]
mod tests;
