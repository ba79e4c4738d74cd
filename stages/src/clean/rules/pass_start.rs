//! `pass_start`: the first `clean.pass.start_trim_s` seconds of a pass and, with
//! `clean.pass.fill_mode = "flow"`, every point before the shifted flow first reaches
//! `fill_fraction` of the pass median (the combine filling).

use super::{Export, Needs, Rule};

pub struct PassStart;

impl Rule for PassStart {
    fn name(&self) -> &'static str {
        "pass_start"
    }
    fn needs(&self) -> Needs {
        Needs::PassStats
    }
    fn requires(&self) -> &'static [super::Quantity] {
        &[super::Quantity::Time]
    }
    fn apply(&self, e: &mut Export) {
        let (trim, fraction) = (e.s.pass.start_trim_s, e.s.pass.fill_fraction);
        for i in e.alive() {
            let Some(ps) = e.pass_stats.get(&e.w[i].pass).copied() else {
                continue;
            };
            let t = e.w[i].p.time_s;
            if t - ps.t0 < trim {
                e.reject(
                    i,
                    self.name(),
                    "pass_time_s",
                    t - ps.t0,
                    format!(">= {trim} s"),
                );
            } else if t < ps.fill_until {
                let v = e.w[i].flow;
                e.reject(
                    i,
                    self.name(),
                    "flow_shifted_kg_s",
                    v,
                    format!(
                        "first reach {:.3} ({fraction} x pass median)",
                        fraction * ps.median_flow
                    ),
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
    fn the_first_seconds_of_a_pass_go() {
        let v = verdicts(&PassStart, line(30, 2.0), |s| s.pass.start_trim_s = 3.0);
        assert_eq!(
            &v[..4],
            &[
                Some("pass_start"),
                Some("pass_start"),
                Some("pass_start"),
                None
            ]
        );
        assert!(v[4..].iter().all(|r| r.is_none()));
    }
}
