//! `moisture_max`: delay-shifted grain moisture above `clean.moisture.max_pct` (a forage
//! crop: its own `moisture_max_pct` from the crop table).

use super::{Export, Needs, Rule};

pub struct MoistureMax;

impl Rule for MoistureMax {
    fn name(&self) -> &'static str {
        "moisture_max"
    }
    fn needs(&self) -> Needs {
        Needs::Shifted
    }
    fn requires(&self) -> &'static [super::Quantity] {
        &[super::Quantity::Moisture]
    }
    fn apply(&self, e: &mut Export) {
        let (_, max) = e
            .crop
            .moisture_bounds(e.s.moisture.min_pct, e.s.moisture.max_pct);
        for i in e.alive() {
            let m = e.w[i].moisture;
            if m > max {
                e.reject(i, self.name(), "moisture_pct", m, format!("<= {max}"));
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::{line, verdicts};
    use super::*;

    #[test]
    fn too_wet_goes() {
        let mut pts = line(3, 2.0);
        pts[2].moisture_pct = 40.5;
        let v = verdicts(&MoistureMax, pts, |s| s.moisture_delay_s = 0.0);
        assert_eq!(v, vec![None, None, Some("moisture_max")]);
    }
}
