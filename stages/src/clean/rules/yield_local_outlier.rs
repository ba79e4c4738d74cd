//! `yield_local_outlier`: yield at standard moisture far from the median of its neighbours
//! within `clean.outlier.local_radius_m` (|Y - local median| > `local_k` x 1.4826 x their
//! MAD, with at least `local_min_neighbours` neighbours; [`crate::clean::spatial`]).

use super::{Export, Needs, Rule};
use crate::clean::spatial;

pub struct YieldLocalOutlier;

impl Rule for YieldLocalOutlier {
    fn name(&self) -> &'static str {
        "yield_local_outlier"
    }
    fn needs(&self) -> Needs {
        Needs::Yield
    }
    fn apply(&self, e: &mut Export) {
        let o = &e.s.outlier;
        let alive = e.alive();
        let xy: Vec<(f64, f64)> = alive
            .iter()
            .map(|&i| (e.w[i].p.x_m, e.w[i].p.y_m))
            .collect();
        let y: Vec<f64> = alive.iter().map(|&i| e.w[i].std).collect();
        let flags = spatial::local_outliers(
            &xy,
            &y,
            o.local_radius_m,
            o.local_k,
            o.local_min_neighbours as usize,
        );
        for (k, f) in flags.into_iter().enumerate() {
            if let Some((dev, limit)) = f {
                e.reject(
                    alive[k],
                    self.name(),
                    "yield_std_kg_ha_minus_local_median",
                    dev,
                    format!("|x| <= {limit:.1}"),
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
    fn a_point_unlike_its_neighbours_goes() {
        let mut pts = line(30, 2.0);
        for (i, p) in pts.iter_mut().enumerate() {
            p.flow_kg_s = 10.0 + 0.1 * ((i % 3) as f64 - 1.0);
        }
        pts[15].flow_kg_s = 12.0;
        let v = verdicts(&YieldLocalOutlier, pts, |s| {
            s.flow_delay_s = 0.0;
            s.moisture_delay_s = 0.0;
        });
        assert_eq!(v[15], Some("yield_local_outlier"));
        assert_eq!(v.iter().filter(|r| r.is_some()).count(), 1, "{v:?}");
    }
}
