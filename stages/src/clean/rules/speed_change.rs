//! `speed_change`: an abrupt change of speed, |v - v_prev| / v_prev above
//! `clean.speed.max_change_fraction` (against the previous record, removed or not), and the
//! records within `clean.speed.settle_s` seconds of such a change on either side (the
//! delay-shifted flow mixes grain from both sides of the change).

use super::{Export, Needs, Rule};

pub struct SpeedChange;

impl Rule for SpeedChange {
    fn name(&self) -> &'static str {
        "speed_change"
    }
    fn needs(&self) -> Needs {
        Needs::Records
    }
    fn requires(&self) -> &'static [super::Quantity] {
        &[super::Quantity::Speed, super::Quantity::Time]
    }
    fn apply(&self, e: &mut Export) {
        let (max, settle) = (e.s.speed.max_change_fraction, e.s.speed.settle_s);
        let n = e.w.len();
        let change: Vec<f64> = (0..n)
            .map(|k| {
                if k == 0 {
                    return 0.0;
                }
                let v0 = e.w[k - 1].p.speed_m_s;
                (e.w[k].p.speed_m_s - v0).abs() / v0.max(0.1)
            })
            .collect();
        let change_times: Vec<f64> = (0..n)
            .filter(|&k| change[k] > max)
            .map(|k| e.w[k].p.time_s)
            .collect();
        for k in e.alive() {
            let t = e.w[k].p.time_s;
            let nearest_change = {
                let j = change_times.partition_point(|&c| c < t);
                [j.checked_sub(1), Some(j)]
                    .into_iter()
                    .flatten()
                    .filter_map(|j| change_times.get(j))
                    .map(|c| (c - t).abs())
                    .fold(f64::INFINITY, f64::min)
            };
            if change[k] > max {
                e.reject(
                    k,
                    self.name(),
                    "speed_change_fraction",
                    change[k],
                    format!("<= {max}"),
                );
            } else if nearest_change <= settle {
                e.reject(
                    k,
                    self.name(),
                    "seconds_from_change",
                    nearest_change,
                    format!("> {settle} s from a change"),
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
    fn a_step_and_its_settling_window_go() {
        // 2.0 -> 1.0 m/s at record 10 (a 50 % change): 10 and the records within 1 s of it.
        let mut pts = line(20, 2.0);
        for p in &mut pts[10..] {
            p.speed_m_s = 1.0;
        }
        let v = verdicts(&SpeedChange, pts, |s| s.speed.settle_s = 1.0);
        for (i, r) in v.iter().enumerate() {
            let expect = (9..=11).contains(&i).then_some("speed_change");
            assert_eq!(*r, expect, "record {i}");
        }
    }
}
