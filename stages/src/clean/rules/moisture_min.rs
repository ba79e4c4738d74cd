//! `moisture_min`: delay-shifted grain moisture below `clean.moisture.min_pct` (a forage crop:
//! its own `moisture_min_pct`), or none at
//! all on a record whose yield needs it (mass flow to standardise: a sensor that read 0, its
//! "no reading", before any real reading; see `ingest::formats::ZeroMoisture`).

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
        let (min, _) = e
            .crop
            .moisture_bounds(e.s.moisture.min_pct, e.s.moisture.max_pct);
        for i in e.alive() {
            let m = e.w[i].moisture;
            if m < min {
                e.reject(i, self.name(), "moisture_pct", m, format!(">= {min}"));
            } else if m.is_nan() && e.w[i].p.yield_kg_ha.is_nan() {
                e.reject(
                    i,
                    self.name(),
                    "moisture_pct",
                    m,
                    "a moisture reading (none logged at or before this record)".into(),
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
    fn too_dry_goes() {
        let mut pts = line(3, 2.0);
        pts[1].moisture_pct = 7.9;
        let v = verdicts(&MoistureMin, pts, |s| s.moisture_delay_s = 0.0);
        assert_eq!(v, vec![None, Some("moisture_min"), None]);
    }

    #[test]
    fn no_reading_on_a_flow_record_goes_under_its_own_limit() {
        let mut pts = line(3, 2.0);
        pts[0].moisture_pct = f64::NAN;
        let v = verdicts(&MoistureMin, pts, |s| s.moisture_delay_s = 0.0);
        assert_eq!(v, vec![Some("moisture_min"), None, None]);
    }
}
