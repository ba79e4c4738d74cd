//! Clean: from raw monitor records to point yields at standard moisture, removing the known
//! artifacts of yield monitors.
//!
//! Rules, applied in this order within each export (time-ordered); a point is removed by the
//! first rule it breaks, and that rule, the value found and the limit go to the rejection
//! table:
//!
//! 1. `gps_jump`: the point lies farther from both neighbours than `jump_factor` times the
//!    distance the logged speed allows in the time between them, plus `jump_tolerance_m`.
//! 2. Pass segmentation (no removal): a new pass after a time gap over `pass.max_gap_s` or
//!    when the heading turns more than `pass.max_heading_change_deg` from the pass heading.
//! 3. `flow_delay_no_data`: the shifted flow or moisture time falls after the export ends or
//!    inside a logging gap. Mass flow logged at time t belongs to the position at
//!    t - `flow_delay_s`, so each position takes the flow logged `flow_delay_s` later
//!    (linear interpolation in time); moisture likewise with `moisture_delay_s`.
//! 4. `short_pass`: passes shorter than `pass.min_pass_s` (turn fragments).
//! 5. `pass_start` / `pass_end`: the first `start_trim_s` and last `end_trim_s` of a pass
//!    (combine filling and emptying).
//! 6. `speed_min` / `speed_max`.
//! 7. `swath_fraction`: logged width below `swath.min_fraction` of the header width.
//! 8. `moisture_min` / `moisture_max` (on the shifted moisture).
//! 9. `yield_bounds`: yield at standard moisture outside the crop's biological bounds.
//! 10. `yield_outlier`: |Y - median| > `k_mad` x 1.4826 x MAD within the export.
//!
//! Yield: Y_wet (kg/ha) = flow (kg/s) x 10 000 / (speed (m/s) x swath (m)) (definition);
//! standard moisture: Y_std = Y_wet x (100 - M) / (100 - M_std) (UF/IFAS EDIS AG442).
//!
//! Complexity: O(n log n) for the per-export sort; the rest is linear.

use crate::config::{CleanSettings, Crop};
use crate::table::{CleanPoint, Point, PointSet, Rejection, StageSummary};
use crate::util::{mad, median};
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

/// Per-point working state.
struct Work<'a> {
    p: &'a Point,
    pass: u32,
    flow: f64,
    moisture: f64,
    wet: f64,
    std: f64,
    rejected: Option<(&'static str, &'static str, f64, String)>,
}

impl Work<'_> {
    fn reject(&mut self, rule: &'static str, column: &'static str, value: f64, limit: String) {
        if self.rejected.is_none() {
            self.rejected = Some((rule, column, value, limit));
        }
    }
    fn alive(&self) -> bool {
        self.rejected.is_none()
    }
}

/// Mark GPS jumps: points far from both neighbours compared with the logged speed.
fn gps_jumps(w: &mut [Work], s: &CleanSettings) {
    let n = w.len();
    let dist = |a: &Point, b: &Point| ((a.x_m - b.x_m).powi(2) + (a.y_m - b.y_m).powi(2)).sqrt();
    let mut flags = vec![None; n];
    for i in 0..n {
        let p = w[i].p;
        let mut excess = f64::INFINITY;
        let mut allowed_min = f64::INFINITY;
        let mut any = false;
        for j in [i.wrapping_sub(1), i + 1] {
            if j >= n {
                continue;
            }
            any = true;
            let q = w[j].p;
            let dt = (p.time_s - q.time_s).abs().max(1e-9);
            let allowed = s.gps.jump_factor * 0.5 * (p.speed_m_s + q.speed_m_s).max(0.1) * dt
                + s.gps.jump_tolerance_m;
            let d = dist(p, q);
            // The point is a jump only if it is too far from every neighbour it has.
            excess = excess.min(d - allowed);
            allowed_min = allowed_min.min(allowed);
            if d <= allowed {
                excess = f64::NEG_INFINITY;
            }
        }
        if any && excess > 0.0 {
            flags[i] = Some((excess + allowed_min, allowed_min));
        }
    }
    for (wi, f) in w.iter_mut().zip(flags) {
        if let Some((d, allowed)) = f {
            wi.reject(
                "gps_jump",
                "x_m,y_m",
                d,
                format!("<= {allowed:.1} m from a neighbour"),
            );
        }
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

/// Run clean on all exports.
pub fn run(points: &PointSet, s: &CleanSettings, crop: &Crop) -> CleanOutput {
    let mut by_file: BTreeMap<u32, Vec<&Point>> = BTreeMap::new();
    for p in &points.points {
        by_file.entry(p.file).or_default().push(p);
    }
    let mut kept: Vec<CleanPoint> = Vec::new();
    let mut rejections: Vec<Rejection> = Vec::new();
    let mut headers = BTreeMap::new();
    for (file, mut pts) in by_file {
        pts.sort_by(|a, b| a.time_s.total_cmp(&b.time_s).then(a.row.cmp(&b.row)));
        let fname = &points.files[file as usize];
        let header = if s.header_width_m > 0.0 {
            s.header_width_m
        } else {
            modal_width(&pts.iter().map(|p| p.width_m).collect::<Vec<_>>())
        };
        headers.insert(fname.clone(), header);
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
        // 1. GPS jumps.
        gps_jumps(&mut w, s);
        // 2. Passes.
        segment_passes(&mut w, s);
        // 3. Delay shift over the whole export's time line.
        let times: Vec<f64> = pts.iter().map(|p| p.time_s).collect();
        let flows: Vec<f64> = pts.iter().map(|p| p.flow_kg_s).collect();
        let moist: Vec<f64> = pts.iter().map(|p| p.moisture_pct).collect();
        for wi in w.iter_mut().filter(|w| w.alive()) {
            let tf = wi.p.time_s + s.flow_delay_s;
            let tm = wi.p.time_s + s.moisture_delay_s;
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
                    wi.reject(
                        "flow_delay_no_data",
                        "time_s",
                        t,
                        format!("a record within {} s", s.pass.max_gap_s),
                    )
                }
            }
        }
        // 4-5. Pass length and pass-end trimming.
        let mut span: BTreeMap<u32, (f64, f64)> = BTreeMap::new();
        for wi in w.iter().filter(|w| w.alive()) {
            let e = span
                .entry(wi.pass)
                .or_insert((f64::INFINITY, f64::NEG_INFINITY));
            e.0 = e.0.min(wi.p.time_s);
            e.1 = e.1.max(wi.p.time_s);
        }
        for wi in w.iter_mut().filter(|w| w.alive()) {
            let (t0, t1) = span[&wi.pass];
            let t = wi.p.time_s;
            if t1 - t0 < s.pass.min_pass_s {
                wi.reject(
                    "short_pass",
                    "pass_s",
                    t1 - t0,
                    format!(">= {} s", s.pass.min_pass_s),
                );
            } else if t - t0 < s.pass.start_trim_s {
                wi.reject(
                    "pass_start",
                    "pass_time_s",
                    t - t0,
                    format!(">= {} s", s.pass.start_trim_s),
                );
            } else if t1 - t < s.pass.end_trim_s {
                wi.reject(
                    "pass_end",
                    "pass_time_left_s",
                    t1 - t,
                    format!(">= {} s", s.pass.end_trim_s),
                );
            }
        }
        // 6-9. Point rules.
        for wi in w.iter_mut().filter(|w| w.alive()) {
            let p = wi.p;
            if p.speed_m_s < s.speed.min_m_s {
                wi.reject(
                    "speed_min",
                    "speed_m_s",
                    p.speed_m_s,
                    format!(">= {}", s.speed.min_m_s),
                );
            } else if p.speed_m_s > s.speed.max_m_s {
                wi.reject(
                    "speed_max",
                    "speed_m_s",
                    p.speed_m_s,
                    format!("<= {}", s.speed.max_m_s),
                );
            } else if p.width_m < s.swath.min_fraction * header {
                wi.reject(
                    "swath_fraction",
                    "width_m",
                    p.width_m,
                    format!(
                        ">= {:.3} ({} x {header:.3})",
                        s.swath.min_fraction * header,
                        s.swath.min_fraction
                    ),
                );
            } else if wi.moisture < s.moisture.min_pct {
                wi.reject(
                    "moisture_min",
                    "moisture_pct",
                    wi.moisture,
                    format!(">= {}", s.moisture.min_pct),
                );
            } else if wi.moisture > s.moisture.max_pct {
                wi.reject(
                    "moisture_max",
                    "moisture_pct",
                    wi.moisture,
                    format!("<= {}", s.moisture.max_pct),
                );
            } else {
                wi.wet = wet_yield_kg_ha(wi.flow, p.speed_m_s, p.width_m);
                wi.std = to_standard_moisture(wi.wet, wi.moisture, crop.standard_moisture_pct);
                if wi.std < crop.yield_min_kg_ha || wi.std > crop.yield_max_kg_ha {
                    let limit = format!("{}..{}", crop.yield_min_kg_ha, crop.yield_max_kg_ha);
                    wi.reject("yield_bounds", "yield_std_kg_ha", wi.std, limit);
                }
            }
        }
        // 10. Robust global outlier rule within the export.
        let ys: Vec<f64> = w.iter().filter(|w| w.alive()).map(|w| w.std).collect();
        if ys.len() >= 3 {
            let med = median(&ys);
            let scaled = 1.4826 * mad(&ys, med);
            let (lo, hi) = (
                med - s.outlier.k_mad * scaled,
                med + s.outlier.k_mad * scaled,
            );
            for wi in w.iter_mut().filter(|w| w.alive()) {
                if wi.std < lo || wi.std > hi {
                    let v = wi.std;
                    wi.reject(
                        "yield_outlier",
                        "yield_std_kg_ha",
                        v,
                        format!("{lo:.1}..{hi:.1}"),
                    );
                }
            }
        }
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
    summary
        .details
        .insert("header_width_m".into(), serde_json::json!(headers));
    summary
        .details
        .insert("flow_delay_s".into(), serde_json::json!(s.flow_delay_s));
    summary.details.insert(
        "moisture_delay_s".into(),
        serde_json::json!(s.moisture_delay_s),
    );
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
        let rule = |id: u64| {
            out.rejections
                .iter()
                .find(|r| r.id == id.to_string())
                .map(|r| r.rule.clone())
        };
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
}
