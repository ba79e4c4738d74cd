//! `gps_duplicate`: a record whose time stamp is not later than every earlier record's (a
//! repeated or backwards time stamp); the first record of a time stays.

use super::{Export, Needs, Rule};

pub struct GpsDuplicate;

impl Rule for GpsDuplicate {
    fn name(&self) -> &'static str {
        "gps_duplicate"
    }
    fn needs(&self) -> Needs {
        Needs::Records
    }
    fn apply(&self, e: &mut Export) {
        // Compared with every earlier record, removed or not: the time line is the logger's.
        let mut last_t = f64::NEG_INFINITY;
        for i in 0..e.w.len() {
            let t = e.w[i].p.time_s;
            if e.w[i].alive() && t <= last_t {
                e.reject(i, self.name(), "time_s", t, format!("> {last_t}"));
            }
            last_t = last_t.max(t);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::{line, verdicts};
    use super::*;

    #[test]
    fn the_later_of_two_equal_times_goes() {
        let mut pts = line(4, 2.0);
        pts[2].time_s = pts[1].time_s;
        let v = verdicts(&GpsDuplicate, pts, |_| {});
        assert_eq!(v, vec![None, None, Some("gps_duplicate"), None]);
    }
}
