//! `moisture_min`: delay-shifted grain moisture below `clean.moisture.min_pct`.

use super::{Export, Needs, Rule};

pub struct MoistureMin;

impl Rule for MoistureMin {
    fn name(&self) -> &'static str {
        "moisture_min"
    }
    fn needs(&self) -> Needs {
        Needs::Shifted
    }
    fn requires(&self) -> &'static [super::Quantity] {
        &[super::Quantity::Moisture]
    }
    fn apply(&self, e: &mut Export) {
        let min = e.s.moisture.min_pct;
        for i in e.alive() {
            let m = e.w[i].moisture;
            if m < min {
                e.reject(i, self.name(), "moisture_pct", m, format!(">= {min}"));
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::{line, verdicts};
    use super::*;

    #[test]
    fn too_dry_goes() {
        let mut pts = line(3, 2.0);
        pts[1].moisture_pct = 7.9;
        let v = verdicts(&MoistureMin, pts, |s| s.moisture_delay_s = 0.0);
        assert_eq!(v, vec![None, Some("moisture_min"), None]);
    }
}
