//! `short_pass`: every point of a pass shorter than `clean.pass.min_pass_s` (turn
//! fragments).

use super::{Export, Needs, Rule};

pub struct ShortPass;

impl Rule for ShortPass {
    fn name(&self) -> &'static str {
        "short_pass"
    }
    fn needs(&self) -> Needs {
        Needs::PassStats
    }
    fn requires(&self) -> &'static [super::Quantity] {
        &[super::Quantity::Time]
    }
    fn apply(&self, e: &mut Export) {
        let min = e.s.pass.min_pass_s;
        for i in e.alive() {
            let Some(ps) = e.pass_stats.get(&e.w[i].pass).copied() else {
                continue;
            };
            if ps.t1 - ps.t0 < min {
                e.reject(
                    i,
                    self.name(),
                    "pass_s",
                    ps.t1 - ps.t0,
                    format!(">= {min} s"),
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
    fn a_pass_of_19_s_goes_and_one_of_20_s_stays() {
        // Two passes split by a 10 s gap: 20 records (19 s long) and 21 records (20 s).
        let mut pts = line(41, 2.0);
        for p in &mut pts[20..] {
            p.time_s += 10.0;
        }
        let v = verdicts(&ShortPass, pts, |_| {});
        assert!(v[..20].iter().all(|r| *r == Some("short_pass")), "{v:?}");
        assert!(v[20..].iter().all(|r| r.is_none()), "{v:?}");
    }
}
