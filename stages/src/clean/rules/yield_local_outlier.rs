//! `yield_local_outlier`: yield at standard moisture far from the median of its neighbours
//! within `clean.outlier.local_radius_m` (|Y - local median| > `local_k` x 1.4826 x their
//! MAD, with at least `local_min_neighbours` neighbours; [`crate::clean::spatial`]).
//! Neighbours are records of the same treatment zone ([`crate::clean::zones`]): once the
//! plots are known, a record is never compared with plots of other treatments.

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
        let zone: Vec<u32> = alive.iter().map(|&i| e.w[i].zone).collect();
        let flags = spatial::local_outliers(
            &xy,
            &y,
            &zone,
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
    use super::super::testing::{line, verdicts, verdicts_in};
    use super::*;
    use crate::clean::zones::Zones;
    use crate::table::{DesignRow, PlotPolygon};

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

    /// An on-farm strip trial: five strips 7 m apart (closer than the 15 m radius), records
    /// every 2 m along each, check strips at 8 t/ha between product strips at 10 t/ha, a few
    /// kg/ha of noise. Compared with every neighbour, the middle check strip's records look
    /// like outliers (most of their neighbours are product records); within their treatment
    /// they are not, and a true spike still is.
    #[test]
    fn strips_of_other_treatments_are_not_neighbours() {
        let strips = ["prod", "check", "prod", "check", "prod"];
        let mut pts = Vec::new();
        for (k, t) in strips.iter().enumerate() {
            let mut s = line(50, 2.0);
            for (i, p) in s.iter_mut().enumerate() {
                p.y_m = 7.0 * k as f64;
                p.time_s = (100 * k + i) as f64;
                // 10 kg/s at 2 m/s over 9 m at standard moisture is 5,556 kg/ha.
                let base = if *t == "check" { 8.0 } else { 10.0 };
                p.flow_kg_s = base + 0.02 * ((i % 5) as f64 - 2.0);
            }
            pts.extend(s);
        }
        pts[3 * 50 + 25].flow_kg_s = 14.0; // a spike inside the second check strip
        let plot = |k: usize| PlotPolygon {
            plot_id: format!("s{k}"),
            exterior: vec![
                (-1.0, 7.0 * k as f64 - 3.5),
                (100.0, 7.0 * k as f64 - 3.5),
                (100.0, 7.0 * k as f64 + 3.5),
                (-1.0, 7.0 * k as f64 - 3.5 + 7.0),
                (-1.0, 7.0 * k as f64 - 3.5),
            ],
            holes: Vec::new(),
        };
        let polys: Vec<PlotPolygon> = (0..5).map(plot).collect();
        let design: Vec<DesignRow> = strips
            .iter()
            .enumerate()
            .map(|(k, t)| DesignRow {
                plot_id: format!("s{k}"),
                treatment: t.to_string(),
                block: "1".into(),
                field: "A".into(),
                row: k as u64 + 2,
            })
            .collect();
        let zones = Zones::new(&polys, &design);
        let no_delay = |s: &mut crate::clean::settings::CleanSettings| {
            s.flow_delay_s = 0.0;
            s.moisture_delay_s = 0.0;
        };
        let check_strip = |v: &[Option<&str>]| v[50..100].iter().filter(|r| r.is_some()).count();
        // Without the plots: most of the middle-ish check strip goes.
        let blind = verdicts(&YieldLocalOutlier, pts.clone(), no_delay);
        assert!(check_strip(&blind) > 25, "{}", check_strip(&blind));
        // With them: only the spike.
        let v = verdicts_in(&YieldLocalOutlier, pts, Some(&zones), no_delay);
        let gone: Vec<usize> = (0..v.len()).filter(|&i| v[i].is_some()).collect();
        assert_eq!(gone, vec![3 * 50 + 25]);
    }
}
