//! `work_state_off`: the export's work-state column (when mapped) says not harvesting
//! (0 = header up / not harvesting; anything else, or no column, = harvesting).
//!
//! A header-height switch may flick off for a second or two while the header keeps cutting
//! (a bump, a chattering sensor): a run of "off" records between two "on" records at most
//! `clean.work_state_bridge_s` apart is bridged (kept, and counted in the export's
//! `work_state_bridged`). A real lift at a turn lasts longer, and a short real lift
//! mid-pass shows in the delay-shifted flow, which the yield rules test.

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
        let alive = e.alive();
        let bridge = e.s.work_state_bridge_s;
        let off = |i: usize| e.w[i].p.work_state == 0.0;
        let on = |i: usize| {
            let v = e.w[i].p.work_state;
            v.is_finite() && v != 0.0
        };
        let mut rejected = Vec::new();
        let mut bridged = 0;
        let mut k = 0;
        while k < alive.len() {
            if !off(alive[k]) {
                k += 1;
                continue;
            }
            // A run of "off" records alive[k..j].
            let mut j = k;
            while j < alive.len() && off(alive[j]) {
                j += 1;
            }
            // The spell lasts from the last working record before it to the first after it
            // (so a monitor that stops logging while the header is up cannot hide a turn).
            let between_on = k > 0 && j < alive.len() && on(alive[k - 1]) && on(alive[j]);
            let lasts = if between_on {
                e.w[alive[j]].p.time_s - e.w[alive[k - 1]].p.time_s
            } else {
                f64::INFINITY
            };
            if lasts.is_finite() && lasts <= bridge {
                bridged += j - k;
            } else {
                rejected.extend_from_slice(&alive[k..j]);
            }
            k = j;
        }
        for i in rejected {
            e.reject(i, self.name(), "work_state", 0.0, "!= 0".into());
        }
        e.details.work_state_bridged = bridged;
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

    #[test]
    fn a_short_flicker_between_working_records_is_bridged_and_a_lift_is_not() {
        // One record a second, all "on" but for: records 5-7 off (on at 4 and 8: 4 s apart,
        // bridged with the default 4 s), records 20-26 off (8 s apart), and an "off" run at
        // the very end (no "on" after it).
        let mut pts = line(40, 2.0);
        for p in pts.iter_mut() {
            p.work_state = 1.0;
        }
        for i in (5..=7).chain(20..=26).chain(37..40) {
            pts[i].work_state = 0.0;
        }
        let v = verdicts(&WorkStateOff, pts.clone(), |_| {});
        let gone: Vec<usize> = (0..40).filter(|&i| v[i].is_some()).collect();
        let want: Vec<usize> = (20..=26).chain(37..40).collect();
        assert_eq!(gone, want);
        // With the bridge at 0 s, every "off" record goes.
        let v = verdicts(&WorkStateOff, pts.clone(), |s| s.work_state_bridge_s = 0.0);
        assert_eq!(v.iter().filter(|x| x.is_some()).count(), 3 + 7 + 3);
        // A monitor that logs one "off" record during a 20 s turn: not bridged.
        let mut turn = pts[..12].to_vec();
        for p in turn.iter_mut() {
            p.work_state = 1.0;
        }
        turn[6].work_state = 0.0;
        for p in turn.iter_mut().skip(6) {
            p.time_s += 9.0;
        }
        for p in turn.iter_mut().skip(7) {
            p.time_s += 10.0;
        }
        let v = verdicts(&WorkStateOff, turn, |_| {});
        assert_eq!(v[6], Some("work_state_off"));
        assert_eq!(v.iter().filter(|x| x.is_some()).count(), 1);
    }
}
