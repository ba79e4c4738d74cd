//! Passes: segmentation of an export into passes, headings, and per-pass statistics.
//! Derived quantities, not rules: nothing is removed here.
//!
//! A new pass starts after a time gap over `clean.pass.max_gap_s` or when the heading turns
//! more than `clean.pass.max_heading_change_deg` from the pass heading (which follows gentle
//! curves, moving a tenth of the way towards each new heading; own choice, no source).

use super::settings::{CleanSettings, FillMode};
use super::work::{Export, PassStats, Work};
use crate::util::median;
use std::collections::BTreeMap;

/// Heading in degrees (0 = north, clockwise) of a displacement.
pub fn heading_deg(dx: f64, dy: f64) -> f64 {
    dx.atan2(dy).to_degrees()
}

/// The smaller angle between two headings, degrees.
pub fn angle_diff(a: f64, b: f64) -> f64 {
    let d = (a - b).rem_euclid(360.0);
    if d > 180.0 {
        360.0 - d
    } else {
        d
    }
}

/// Assign pass numbers to the points still alive (time-ordered).
pub fn segment(w: &mut [Work], s: &CleanSettings) {
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

/// Heading of each alive point from its alive neighbours in the same pass (degrees; NaN for
/// removed points and one-point passes).
pub fn headings(w: &[Work]) -> Vec<f64> {
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

/// Per-pass start, end, median shifted flow and speed and, with `fill_mode = "flow"`, the
/// fill and empty limits (from each end until the shifted flow first reaches
/// `fill_fraction` of the pass median), from the points alive now.
pub fn stats(e: &mut Export) {
    let w = &e.w;
    let s = e.s;
    let mut by_pass: BTreeMap<u32, Vec<usize>> = BTreeMap::new();
    for (i, wi) in w.iter().enumerate().filter(|(_, w)| w.alive()) {
        by_pass.entry(wi.pass).or_default().push(i);
    }
    let mut out = BTreeMap::new();
    for (pass, idx) in by_pass {
        let (t0, t1) = (
            w[idx[0]].p.time_s,
            w[*idx.last().expect("non-empty")].p.time_s,
        );
        let median_flow = median(&idx.iter().map(|&i| w[i].flow).collect::<Vec<_>>());
        let median_speed = median(&idx.iter().map(|&i| w[i].p.speed_m_s).collect::<Vec<_>>());
        let (mut fill_until, mut empty_from) = (t0, t1);
        if s.pass.fill_mode == FillMode::Flow {
            let target = s.pass.fill_fraction * median_flow;
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
        out.insert(
            pass,
            PassStats {
                t0,
                t1,
                median_flow,
                median_speed,
                fill_until,
                empty_from,
            },
        );
    }
    e.pass_stats = out;
}
