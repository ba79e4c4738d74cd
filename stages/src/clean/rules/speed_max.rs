//! `speed_max`: logged speed above `clean.speed.max_m_s`.

use super::{Export, Needs, Rule};

pub struct SpeedMax;

impl Rule for SpeedMax {
    fn name(&self) -> &'static str {
        "speed_max"
    }
    fn needs(&self) -> Needs {
        Needs::Records
    }
    fn requires(&self) -> &'static [super::Quantity] {
        &[super::Quantity::Speed]
    }
    fn apply(&self, e: &mut Export) {
        let max = e.s.speed.max_m_s;
        for i in e.alive() {
            let v = e.w[i].p.speed_m_s;
            if v > max {
                e.reject(i, self.name(), "speed_m_s", v, format!("<= {max}"));
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::{line, verdicts};
    use super::*;

    #[test]
    fn above_the_maximum_goes() {
        let mut pts = line(3, 2.0);
        pts[2].speed_m_s = 4.01;
        pts[1].speed_m_s = 4.0;
        let v = verdicts(&SpeedMax, pts, |_| {});
        assert_eq!(v, vec![None, None, Some("speed_max")]);
    }
}
