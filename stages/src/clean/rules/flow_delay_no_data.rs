//! `flow_delay_no_data`: the delay-shifted time of the flow (or moisture) reading falls
//! after the export ends or inside a logging gap longer than `clean.pass.max_gap_s`, so the
//! point has no reading of its own. Switched off, such a point keeps its own logged flow and
//! moisture ([`crate::clean::delay::shift`]).

use super::{Export, Needs, Rule};

pub struct FlowDelayNoData;

impl Rule for FlowDelayNoData {
    fn name(&self) -> &'static str {
        "flow_delay_no_data"
    }
    fn needs(&self) -> Needs {
        Needs::Shifted
    }
    fn requires(&self) -> &'static [super::Quantity] {
        &[super::Quantity::Flow]
    }
    fn apply(&self, e: &mut Export) {
        let gap = e.s.pass.max_gap_s;
        for i in e.alive() {
            if let Some(t) = e.w[i].no_shift_data_at {
                e.reject(
                    i,
                    self.name(),
                    "time_s",
                    t,
                    format!("a record within {gap} s"),
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
    fn the_last_seconds_have_no_flow_record_after_the_delay() {
        // 1 s records, fixed 2 s delays: the last two points look past the end.
        let v = verdicts(&FlowDelayNoData, line(6, 2.0), |s| {
            s.flow_delay_s = 2.0;
            s.moisture_delay_s = 2.0;
        });
        assert_eq!(
            v,
            vec![
                None,
                None,
                None,
                None,
                Some("flow_delay_no_data"),
                Some("flow_delay_no_data")
            ]
        );
    }
}
