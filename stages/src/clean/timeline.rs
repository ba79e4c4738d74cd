//! An export's time line in the order its records were logged.
//!
//! A monitor writes its records in the order it logs them; the GPS time stamp on a record can
//! step backwards (a receiver resynchronising its clock, a glitched stamp). Sorted by time,
//! such a record lands among records logged seconds or hours away, splitting passes and
//! pairing flow with the wrong positions. So the rows keep their file order and the time
//! stamps are repaired:
//!
//! - a single stamp out of sequence (the stamps before and after it are in order) takes the
//!   midpoint of its neighbours;
//! - a lasting step back shifts that record and every later one by the same amount, so that
//!   the record follows its predecessor after the export's typical interval (the median of
//!   its positive steps) and the intervals after the step are kept.
//!
//! Repeated stamps are left alone (the delay shift already reads every record but repeated
//! stamps).

/// Repaired stamps of records in file order, and how many backward steps were found.
pub fn repair(times: &[f64]) -> (Vec<f64>, usize) {
    let n = times.len();
    let mut steps: Vec<f64> = times
        .windows(2)
        .map(|w| w[1] - w[0])
        .filter(|d| *d > 0.0 && d.is_finite())
        .collect();
    steps.sort_by(f64::total_cmp);
    let typical = if steps.is_empty() {
        1.0
    } else {
        steps[steps.len() / 2]
    };
    let mut out = times.to_vec();
    let mut back = 0;
    let mut offset = 0.0;
    let mut i = 1;
    while i < n {
        let t = times[i] + offset;
        let prev = out[i - 1];
        if t < prev {
            back += 1;
            // One stamp out of sequence: its neighbours are in order.
            if i + 1 < n && times[i + 1] + offset > prev {
                out[i] = 0.5 * (prev + times[i + 1] + offset);
                i += 1;
                continue;
            }
            offset += prev + typical - t;
        }
        out[i] = times[i] + offset;
        i += 1;
    }
    (out, back)
}

#[cfg(test)]
mod tests {
    use super::repair;

    #[test]
    fn stamps_in_order_are_untouched() {
        let t = [0.0, 1.0, 2.0, 2.0, 3.0, 5.0];
        assert_eq!(repair(&t), (t.to_vec(), 0));
    }

    #[test]
    fn a_single_glitched_stamp_takes_its_neighbours_midpoint() {
        let (t, n) = repair(&[10.0, 11.0, 12.0, 5.0, 14.0, 15.0]);
        assert_eq!(n, 1);
        assert_eq!(t, vec![10.0, 11.0, 12.0, 13.0, 14.0, 15.0]);
    }

    #[test]
    fn a_lasting_step_back_shifts_the_rest_and_keeps_their_intervals() {
        // Logged every 2 s; the clock steps back 60 s after the third record.
        let (t, n) = repair(&[100.0, 102.0, 104.0, 46.0, 48.0, 51.0]);
        assert_eq!(n, 1);
        assert_eq!(t, vec![100.0, 102.0, 104.0, 106.0, 108.0, 111.0]);
    }
}
