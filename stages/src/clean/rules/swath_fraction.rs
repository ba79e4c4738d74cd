//! `swath_fraction`: logged swath width below `clean.swath.min_fraction` of the full header
//! width (partial swath).

use super::{Export, Needs, Rule};

pub struct SwathFraction;

impl Rule for SwathFraction {
    fn name(&self) -> &'static str {
        "swath_fraction"
    }
    fn needs(&self) -> Needs {
        Needs::Records
    }
    fn requires(&self) -> &'static [super::Quantity] {
        &[super::Quantity::Width]
    }
    fn apply(&self, e: &mut Export) {
        let (fraction, header) = (e.s.swath.min_fraction, e.header);
        for i in e.alive() {
            let v = e.w[i].p.width_m;
            if v < fraction * header {
                e.reject(
                    i,
                    self.name(),
                    "width_m",
                    v,
                    format!(">= {:.3} ({fraction} x {header:.3})", fraction * header),
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
    fn a_partial_swath_goes() {
        // Header 9 m (the most common width): 0.9 x 9 = 8.1 m.
        let mut pts = line(5, 2.0);
        pts[1].width_m = 8.0;
        pts[2].width_m = 8.1;
        let v = verdicts(&SwathFraction, pts, |_| {});
        assert_eq!(v, vec![None, Some("swath_fraction"), None, None, None]);
    }
}
