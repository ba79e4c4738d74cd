//! `pass_end`: the last `clean.pass.end_trim_s` seconds of a pass and, with
//! `clean.pass.fill_mode = "flow"`, every point after the shifted flow last reaches
//! `fill_fraction` of the pass median (the combine emptying).

use super::{Export, Needs, Rule};

pub struct PassEnd;

impl Rule for PassEnd {
    fn name(&self) -> &'static str {
        "pass_end"
    }
    fn needs(&self) -> Needs {
        Needs::PassStats
    }
    fn requires(&self) -> &'static [super::Quantity] {
        &[super::Quantity::Time]
    }
    fn apply(&self, e: &mut Export) {
        let (trim, fraction) = (e.s.pass.end_trim_s, e.s.pass.fill_fraction);
        for i in e.alive() {
            let Some(ps) = e.pass_stats.get(&e.w[i].pass).copied() else {
                continue;
            };
            let t = e.w[i].p.time_s;
            if ps.t1 - t < trim {
                e.reject(
                    i,
                    self.name(),
                    "pass_time_left_s",
                    ps.t1 - t,
                    format!(">= {trim} s"),
                );
            } else if t > ps.empty_from {
                let v = e.w[i].flow;
                e.reject(
                    i,
                    self.name(),
                    "flow_shifted_kg_s",
                    v,
                    format!(
                        "last reach {:.3} ({fraction} x pass median)",
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
    fn the_last_seconds_of_a_pass_go() {
        let v = verdicts(&PassEnd, line(30, 2.0), |s| s.pass.end_trim_s = 2.0);
        assert_eq!(&v[27..], &[None, Some("pass_end"), Some("pass_end")]);
        assert!(v[..27].iter().all(|r| r.is_none()));
    }
}
