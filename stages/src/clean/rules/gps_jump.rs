//! `gps_jump`: a point farther from both its live neighbours than `clean.gps.jump_factor` x
//! the distance the logged speed allows in the time between them, plus
//! `clean.gps.jump_tolerance_m`.
//!
//! Where a pair of neighbours has no speed or no times (a yield-point export without them,
//! whose records were averaged by other software), the distance allowed is
//! `jump_factor` x the export's median step between consecutive live records, plus the
//! tolerance: the records' own spacing stands for the distance a speed would allow. It is
//! never a stand-in speed of zero, which would leave every point too far from its
//! neighbours.

use super::{Export, Needs, Rule};
use crate::table::Point;

pub struct GpsJump;

impl Rule for GpsJump {
    fn name(&self) -> &'static str {
        "gps_jump"
    }
    fn needs(&self) -> Needs {
        Needs::Records
    }
    fn apply(&self, e: &mut Export) {
        let g = &e.s.gps;
        let (factor, tolerance) = (g.jump_factor, g.jump_tolerance_m);
        let alive = e.alive();
        let dist =
            |a: &Point, b: &Point| ((a.x_m - b.x_m).powi(2) + (a.y_m - b.y_m).powi(2)).sqrt();
        // The export's typical step between consecutive live records, for pairs without a
        // speed or times.
        let mut steps: Vec<f64> = alive
            .windows(2)
            .map(|w| dist(e.w[w[0]].p, e.w[w[1]].p))
            .filter(|d| d.is_finite())
            .collect();
        let typical = if steps.is_empty() {
            0.0
        } else {
            steps.sort_by(f64::total_cmp);
            steps[steps.len() / 2]
        };
        let mut flags = Vec::new();
        for (k, &i) in alive.iter().enumerate() {
            let p = e.w[i].p;
            let mut nearest_excess = f64::INFINITY;
            let mut limit = 0.0;
            let mut any = false;
            for kk in [k.wrapping_sub(1), k + 1] {
                let Some(&j) = alive.get(kk) else { continue };
                any = true;
                let q = e.w[j].p;
                let dt = (p.time_s - q.time_s).abs().max(1e-9);
                let v = 0.5 * (p.speed_m_s + q.speed_m_s);
                let allowed = if v.is_finite() && dt.is_finite() {
                    factor * v.max(0.1) * dt + tolerance
                } else {
                    factor * typical + tolerance
                };
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
            e.reject(
                i,
                self.name(),
                "x_m,y_m",
                d,
                format!("<= {limit:.1} m from a neighbour"),
            );
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::{line, verdicts};
    use super::*;

    #[test]
    fn a_point_far_from_both_neighbours_goes() {
        // 2 m/s, 1 s apart: allowed 3 x 2 x 1 + 3 = 9 m. A point moved 8 m sideways is
        // sqrt(2^2 + 8^2) = 8.2 m from each neighbour (kept); moved 20 m it goes.
        let mut pts = line(6, 2.0);
        pts[1].y_m += 8.0;
        pts[3].y_m += 20.0;
        let v = verdicts(&GpsJump, pts, |_| {});
        assert_eq!(v, vec![None, None, None, Some("gps_jump"), None, None]);
    }

    #[test]
    fn without_speed_or_times_the_records_own_spacing_sets_the_limit() {
        // Averaged yield points 6.7 m apart with neither speed nor times: allowed
        // 3 x 6.7 + 3 = 23.1 m. Before, the missing speed counted as 0.1 m/s and every
        // point went. A point moved 20 m sideways is 20.1 m from each neighbour (kept);
        // moved 30 m it goes.
        let mut pts = line(20, 6.7);
        for p in &mut pts {
            p.speed_m_s = f64::NAN;
            p.time_s = f64::NAN;
            // A yield-point export (only those may come without times).
            p.flow_kg_s = f64::NAN;
            p.yield_kg_ha = 8000.0;
        }
        pts[5].y_m += 20.0;
        pts[12].y_m += 30.0;
        let v = verdicts(&GpsJump, pts, |_| {});
        let gone: Vec<usize> = (0..20).filter(|&i| v[i].is_some()).collect();
        assert_eq!(gone, vec![12]);
    }
}
