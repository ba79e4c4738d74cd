//! Unit tests of the clean engine: worked yield and moisture examples, the delay shift,
//! rule chains and summaries.

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
        .map(|r| r.rule.to_string())
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
    // One "off" record between working ones goes (the flicker bridge is tested with its rule).
    s.work_state_bridge_s = 0.0;
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
    assert!(out.rejections.iter().all(|r| &*r.rule != "moisture_stuck"));
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
