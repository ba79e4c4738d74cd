//! `speed_drop`: logged speed below `clean.speed.min_fraction_of_pass_median` of its pass's
//! median speed (a slow-down too gradual for `speed_change`).

use super::{Export, Needs, Rule};

pub struct SpeedDrop;

impl Rule for SpeedDrop {
    fn name(&self) -> &'static str {
        "speed_drop"
    }
    fn needs(&self) -> Needs {
        Needs::PassStats
    }
    fn requires(&self) -> &'static [super::Quantity] {
        &[super::Quantity::Speed]
    }
    fn apply(&self, e: &mut Export) {
        let fraction = e.s.speed.min_fraction_of_pass_median;
        for i in e.alive() {
            let Some(ps) = e.pass_stats.get(&e.w[i].pass).copied() else {
                continue;
            };
            let limit = fraction * ps.median_speed;
            let v = e.w[i].p.speed_m_s;
            if v < limit {
                e.reject(
                    i,
                    self.name(),
                    "speed_m_s",
                    v,
                    format!(">= {limit:.3} ({fraction} x pass median)"),
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
    fn below_seventy_percent_of_the_pass_median_goes() {
        // Pass median 2.0 m/s: the limit is 1.4.
        let mut pts = line(9, 2.0);
        pts[3].speed_m_s = 1.39;
        pts[4].speed_m_s = 1.41;
        let v = verdicts(&SpeedDrop, pts, |_| {});
        assert_eq!(v[3], Some("speed_drop"));
        assert!(
            v.iter().enumerate().all(|(i, r)| i == 3 || r.is_none()),
            "{v:?}"
        );
    }
}
