//! `gps_quality`: HDOP above `clean.gps.max_hdop` or fix quality below
//! `clean.gps.min_fix_quality` (each only when the column is mapped and the limit is not 0).

use super::{Export, Needs, Rule};

pub struct GpsQuality;

impl Rule for GpsQuality {
    fn name(&self) -> &'static str {
        "gps_quality"
    }
    fn needs(&self) -> Needs {
        Needs::Records
    }
    fn apply(&self, e: &mut Export) {
        let g = &e.s.gps;
        let (max_hdop, min_fix) = (g.max_hdop, g.min_fix_quality);
        for i in e.alive() {
            let p = e.w[i].p;
            if max_hdop > 0.0 && p.hdop > max_hdop {
                e.reject(i, self.name(), "hdop", p.hdop, format!("<= {max_hdop}"));
            } else if min_fix > 0 && p.fix_quality < min_fix as f64 {
                e.reject(
                    i,
                    self.name(),
                    "fix_quality",
                    p.fix_quality,
                    format!(">= {min_fix}"),
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
    fn hdop_and_fix_quality_limits() {
        let mut pts = line(4, 2.0);
        pts[1].hdop = 4.5; // above the default 4
        pts[2].hdop = 4.0; // at the limit: kept
        pts[3].fix_quality = 0.0;
        let v = verdicts(&GpsQuality, pts.clone(), |_| {});
        assert_eq!(v, vec![None, Some("gps_quality"), None, None]);
        let v = verdicts(&GpsQuality, pts, |s| s.gps.min_fix_quality = 1);
        assert_eq!(
            v,
            vec![None, Some("gps_quality"), None, Some("gps_quality")]
        );
    }
}
