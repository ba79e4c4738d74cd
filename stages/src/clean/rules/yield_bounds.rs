//! `yield_bounds`: yield at standard moisture outside the crop's biological bounds
//! (`yield_min_kg_ha`..`yield_max_kg_ha` in `config/crops.toml`), NaN included.

use super::{Export, Needs, Rule};

pub struct YieldBounds;

impl Rule for YieldBounds {
    fn name(&self) -> &'static str {
        "yield_bounds"
    }
    fn needs(&self) -> Needs {
        Needs::Yield
    }
    fn apply(&self, e: &mut Export) {
        let (lo, hi) = (e.crop.yield_min_kg_ha, e.crop.yield_max_kg_ha);
        for i in e.alive() {
            let v = e.w[i].std;
            if !(v >= lo && v <= hi) {
                e.reject(i, self.name(), "yield_std_kg_ha", v, format!("{lo}..{hi}"));
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::{line, verdicts};
    use super::*;

    #[test]
    fn yields_outside_the_crop_bounds_go() {
        // 10 kg/s at 2 m/s over 9 m = 5,555.6 kg/ha (moisture at standard); 100 kg/s is
        // 55,556 kg/ha, above corn's bound; zero flow is below it.
        let mut pts = line(4, 2.0);
        pts[1].flow_kg_s = 100.0;
        pts[2].flow_kg_s = 0.0;
        let v = verdicts(&YieldBounds, pts, |s| {
            s.flow_delay_s = 0.0;
            s.moisture_delay_s = 0.0;
        });
        assert_eq!(
            v,
            vec![None, Some("yield_bounds"), Some("yield_bounds"), None]
        );
    }
}
