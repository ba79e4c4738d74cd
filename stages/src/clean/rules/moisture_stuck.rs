//! `moisture_stuck`: the delay-shifted moisture reading comes from a run of identical
//! readings on the sensor's time line lasting `clean.moisture.stuck_s` or more (0 = off).

use super::{Export, Needs, Rule};

pub struct MoistureStuck;

/// Runs of identical values lasting at least `min_s`, as (first time, last time).
pub fn stuck_runs(times: &[f64], values: &[f64], min_s: f64) -> Vec<(f64, f64)> {
    let mut stuck = Vec::new();
    if min_s > 0.0 {
        let mut a = 0;
        for b in 1..=values.len() {
            if b == values.len() || values[b] != values[a] {
                if times[b - 1] - times[a] >= min_s {
                    stuck.push((times[a], times[b - 1]));
                }
                a = b;
            }
        }
    }
    stuck
}

impl Rule for MoistureStuck {
    fn name(&self) -> &'static str {
        "moisture_stuck"
    }
    fn needs(&self) -> Needs {
        Needs::Shifted
    }
    fn requires(&self) -> &'static [super::Quantity] {
        &[super::Quantity::MoistureSensor, super::Quantity::Time]
    }
    fn apply(&self, e: &mut Export) {
        let min_s = e.s.moisture.stuck_s;
        let stuck = stuck_runs(&e.times, &e.moist, min_s);
        let md = e.details.moisture_delay_s;
        for i in e.alive() {
            let tm = e.w[i].p.time_s + md;
            if let Some(&(a, b)) = stuck.iter().find(|(a, b)| tm >= *a && tm <= *b) {
                let m = e.w[i].moisture;
                e.reject(
                    i,
                    self.name(),
                    "moisture_pct",
                    m,
                    format!("unchanged for < {min_s} s (was {:.0} s)", b - a),
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
    fn runs_by_hand() {
        let t = [0.0, 1.0, 2.0, 3.0, 4.0, 5.0];
        let v = [1.0, 2.0, 2.0, 2.0, 3.0, 3.0];
        assert_eq!(stuck_runs(&t, &v, 2.0), vec![(1.0, 3.0)]);
        assert_eq!(stuck_runs(&t, &v, 1.0), vec![(1.0, 3.0), (4.0, 5.0)]);
        assert!(stuck_runs(&t, &v, 0.0).is_empty(), "0 = off");
    }

    #[test]
    fn a_reading_that_does_not_move_for_30_s_goes() {
        let mut pts = line(50, 2.0);
        for (i, p) in pts.iter_mut().enumerate() {
            p.moisture_pct = if (10..=40).contains(&i) {
                16.0
            } else {
                15.0 + 0.01 * i as f64
            };
        }
        let v = verdicts(&MoistureStuck, pts, |s| s.moisture_delay_s = 0.0);
        for (i, r) in v.iter().enumerate() {
            assert_eq!(
                *r,
                (10..=40).contains(&i).then_some("moisture_stuck"),
                "{i}"
            );
        }
    }
}
