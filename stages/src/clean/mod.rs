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
//! 1. `work_state_off`: the export's work-state column (when mapped) says not harvesting.
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
pub mod passes;
pub mod rules;
pub mod settings;
pub mod spatial;
pub mod timeline;
pub mod zones;

pub use delay::interpolate_at;
pub use rules::tukey_fences;
pub use settings::CleanSettings;

use crate::crop::Crop;
use crate::table::{CleanPoint, Point, PointSet, Rejection, StageSummary};
use rayon::prelude::*;
use rules::{Export, ExportDetails, Needs, Work, RULES};
use std::collections::BTreeMap;

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
            skipped_rules: BTreeMap::new(),
        },
        derived: Needs::Records,
    };
    // What this export logged (a yield-point export may lack flow, speed, swath, moisture).
    let any = |f: fn(&Point) -> f64| pts.iter().any(|p| f(p).is_finite());
    let given = any(|p| p.yield_kg_ha);
    let moisture = any(|p| p.moisture_pct);
    let has = |q: rules::Quantity| match q {
        rules::Quantity::Flow => any(|p| p.flow_kg_s),
        rules::Quantity::Speed => any(|p| p.speed_m_s),
        rules::Quantity::Width => any(|p| p.width_m),
        rules::Quantity::Moisture => moisture,
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

/// Exports that lost every point, or more than `share` of them to one rule.
fn export_warnings(points: &PointSet, summary: &StageSummary, share: f64) -> Vec<String> {
    let mut n_per_file: BTreeMap<&str, u64> = BTreeMap::new();
    for p in &points.points {
        *n_per_file
            .entry(points.files[p.file as usize].as_str())
            .or_default() += 1;
    }
    let mut out = Vec::new();
    for (f, n) in n_per_file {
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
            if *k as f64 > share * n as f64 {
                out.push(format!(
                    "export {f}: rule {rule} removed {k} of its {n} points ({:.0} %, above clean.warn_rule_share = {share})",
                    100.0 * *k as f64 / n as f64
                ));
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::{TrialConfig, TEST_TRIAL};
    use crate::crop::crop_table;
    use settings::{DelayMode, FillMode};

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
        let sign = if heading_east { 1.0 } else { -1.0 };
        let mut pts = rules::testing::line(n, speed);
        for p in &mut pts {
            p.time_s += t0;
            p.x_m = x0 + sign * p.x_m;
        }
        pts
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
        s.delay.mode = DelayMode::Fixed;
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
        s.delay.mode = DelayMode::Fixed;
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
    fn flow_driven_fill_trims_the_ramp() {
        let crop = crop_table()["corn"].clone();
        let mut s = plain_settings();
        s.pass.fill_mode = FillMode::Flow;
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
