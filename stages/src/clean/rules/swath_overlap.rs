//! `swath_overlap`: a point whose swath footprint (width x distance travelled since the last
//! live record, oriented by heading) lies more than `clean.swath.max_overlap_fraction` over
//! ground harvested earlier ([`crate::clean::spatial::overlap_fractions`]).

use super::{Export, Needs, Rule};
use crate::clean::{passes, spatial};

pub struct SwathOverlap;

impl Rule for SwathOverlap {
    fn name(&self) -> &'static str {
        "swath_overlap"
    }
    fn needs(&self) -> Needs {
        Needs::Passes
    }
    fn requires(&self) -> &'static [super::Quantity] {
        &[super::Quantity::Width, super::Quantity::Speed]
    }
    fn apply(&self, e: &mut Export) {
        let heading = passes::headings(&e.w);
        let alive: Vec<usize> = e
            .alive()
            .into_iter()
            .filter(|&i| heading[i].is_finite())
            .collect();
        let max_gap = e.s.pass.max_gap_s;
        let fps: Vec<spatial::Footprint> = alive
            .iter()
            .enumerate()
            .map(|(k, &i)| {
                let p = e.w[i].p;
                let h = heading[i].to_radians();
                let dt = if k > 0 {
                    (p.time_s - e.w[alive[k - 1]].p.time_s).min(max_gap)
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
                    pass: e.w[i].pass,
                }
            })
            .collect();
        let frac = spatial::overlap_fractions(&fps, 3.0);
        let max = e.s.swath.max_overlap_fraction;
        for (k, &i) in alive.iter().enumerate() {
            if frac[k] > max {
                e.reject(
                    i,
                    self.name(),
                    "overlap_fraction",
                    frac[k],
                    format!("<= {max}"),
                );
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::{line, verdicts};
    use super::*;

    #[test]
    fn a_second_pass_over_the_same_ground_goes() {
        // East along y = 0, then after a 10 s gap west along y = 1 m: a 9 m swath 1 m over
        // is nearly all harvested already; the first pass is kept.
        let mut pts = line(30, 2.0);
        let mut back = line(30, 2.0);
        for (k, p) in back.iter_mut().enumerate() {
            p.time_s += 40.0;
            p.x_m = 58.0 - 2.0 * k as f64;
            p.y_m = 1.0;
        }
        pts.extend(back);
        let v = verdicts(&SwathOverlap, pts, |_| {});
        assert!(v[..30].iter().all(|r| r.is_none()), "{v:?}");
        let gone = v[30..]
            .iter()
            .filter(|r| **r == Some("swath_overlap"))
            .count();
        assert!(gone >= 25, "{gone} of 30 on the second pass: {v:?}");
    }
}
