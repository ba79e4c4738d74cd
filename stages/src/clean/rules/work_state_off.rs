//! `work_state_off`: the export's work-state column (when mapped) says not harvesting
//! (0 = header up / not harvesting; anything else, or no column, = harvesting).

use super::{Export, Needs, Rule};

pub struct WorkStateOff;

impl Rule for WorkStateOff {
    fn name(&self) -> &'static str {
        "work_state_off"
    }
    fn needs(&self) -> Needs {
        Needs::Records
    }
    fn apply(&self, e: &mut Export) {
        for i in e.alive() {
            if e.w[i].p.work_state == 0.0 {
                e.reject(i, self.name(), "work_state", 0.0, "!= 0".into());
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::{line, verdicts};
    use super::*;

    #[test]
    fn zero_work_state_goes_and_a_missing_column_does_not() {
        let mut pts = line(5, 2.0);
        pts[1].work_state = 0.0;
        pts[2].work_state = 1.0; // harvesting; the rest have no column (NaN)
        let v = verdicts(&WorkStateOff, pts, |_| {});
        assert_eq!(v, vec![None, Some("work_state_off"), None, None, None]);
    }
}
