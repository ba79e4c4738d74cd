//! `speed_min`: logged speed below `clean.speed.min_m_s`.

use super::{Export, Needs, Rule};

pub struct SpeedMin;

impl Rule for SpeedMin {
    fn name(&self) -> &'static str {
        "speed_min"
    }
    fn needs(&self) -> Needs {
        Needs::Records
    }
    fn requires(&self) -> &'static [super::Quantity] {
        &[super::Quantity::Speed]
    }
    fn apply(&self, e: &mut Export) {
        let min = e.s.speed.min_m_s;
        for i in e.alive() {
            let v = e.w[i].p.speed_m_s;
            if v < min {
                e.reject(i, self.name(), "speed_m_s", v, format!(">= {min}"));
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::{line, verdicts};
    use super::*;

    #[test]
    fn below_the_minimum_goes() {
        let mut pts = line(3, 2.0);
        pts[0].speed_m_s = 0.49;
        pts[1].speed_m_s = 0.5; // the default minimum itself is kept
        let v = verdicts(&SpeedMin, pts, |_| {});
        assert_eq!(v, vec![Some("speed_min"), None, None]);
    }
}
