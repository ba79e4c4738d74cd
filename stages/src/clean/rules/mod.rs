//! The cleaning rules: one file per rule, one list ([`RULES`]) that fixes their order.
//!
//! A rule looks at the points of one export that no earlier rule removed and rejects some of
//! them through [`Export::reject`], naming the quantity it tested, the value found and the
//! limit. A point's verdict is the first enabled rule that rejects it; a rule switched off
//! (`clean.disabled_rules`) is simply absent from the run, so the later rules see its points.
//!
//! Rules need derived quantities (passes, the delay-shifted flow and moisture, per-pass
//! statistics, yields). Each rule names the last one it needs ([`Needs`]); the engine
//! ([`super::clean_export`]) derives each quantity once, from the points alive just before
//! the first rule of the list that needs it, whether that rule is switched on or not, so
//! switching a rule off never moves a derivation.
//!
//! To add a rule: write `rules/<name>.rs` with a unit struct implementing [`Rule`] and its
//! hand-computed unit tests, then add one line to [`RULES`] at its place in the order.

mod flow_delay_no_data;
mod gps_duplicate;
mod gps_jump;
mod gps_quality;
mod moisture_max;
mod moisture_min;
mod moisture_stuck;
mod pass_end;
mod pass_start;
mod short_pass;
mod speed_change;
mod speed_drop;
mod speed_max;
mod speed_min;
mod swath_fraction;
mod swath_overlap;
mod work_state_off;
mod yield_bounds;
mod yield_local_outlier;
mod yield_outlier;

pub use yield_outlier::tukey_fences;

pub use super::work::{Export, ExportDetails, Needs, PassStats, Quantity, Verdict, Work};

/// Every rule, in the order the rules run. Register a new rule here (one line).
pub static RULES: &[&dyn Rule] = &[
    &work_state_off::WorkStateOff,
    &gps_duplicate::GpsDuplicate,
    &gps_quality::GpsQuality,
    &gps_jump::GpsJump,
    &flow_delay_no_data::FlowDelayNoData,
    &short_pass::ShortPass,
    &pass_start::PassStart,
    &pass_end::PassEnd,
    &speed_min::SpeedMin,
    &speed_max::SpeedMax,
    &speed_change::SpeedChange,
    &speed_drop::SpeedDrop,
    &swath_fraction::SwathFraction,
    &swath_overlap::SwathOverlap,
    &moisture_min::MoistureMin,
    &moisture_max::MoistureMax,
    &moisture_stuck::MoistureStuck,
    &yield_bounds::YieldBounds,
    &yield_outlier::YieldOutlier,
    &yield_local_outlier::YieldLocalOutlier,
];

/// The names of [`RULES`], in order.
pub fn names() -> Vec<&'static str> {
    RULES.iter().map(|r| r.name()).collect()
}

/// `clean.disabled_rules` entries that name no rule, each a problem listing the rules (checked
/// here, not with the other settings, which know no rule).
pub fn unknown_disabled(disabled: &[String], p: &mut Vec<String>) {
    let names = names();
    for r in disabled {
        if !names.contains(&r.as_str()) {
            p.push(format!(
                "clean.disabled_rules: unknown rule {r:?} (rules: {})",
                names.join(", ")
            ));
        }
    }
}

/// A cleaning rule.
pub trait Rule: Sync {
    /// The name used in `rejected.csv`, the summaries and `clean.disabled_rules`.
    fn name(&self) -> &'static str;
    /// The last derived quantity the rule reads.
    fn needs(&self) -> Needs;
    /// The logged quantities the rule tests (an export without one skips it).
    fn requires(&self) -> &'static [Quantity] {
        &[]
    }
    /// Judge the export's live points, rejecting with [`Export::reject`].
    fn apply(&self, e: &mut Export);
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_reference_lists_every_rule_in_its_order() {
        // docs/reference.md's clean stage names the rules; they must be RULES, in order.
        let doc = include_str!("../../../../docs/reference.md");
        let start = doc
            .find("- **clean**:")
            .expect("docs/reference.md has the clean stage");
        let rest = &doc[start + 2..];
        let para = &rest[..rest.find("\n- **").unwrap_or(rest.len())];
        let mut at = 0;
        for name in names() {
            let quoted = format!("`{name}`");
            let found = para[at..].find(&quoted).unwrap_or_else(|| {
                panic!(
                    "{quoted} missing from the clean stage in docs/reference.md, or out of order"
                )
            });
            at += found + quoted.len();
        }
    }

    #[test]
    fn rule_names_are_unique() {
        let mut n = names();
        let len = n.len();
        n.sort();
        n.dedup();
        assert_eq!(n.len(), len, "a rule name appears twice");
    }
}

/// Helpers for the rules' unit tests.
#[cfg(test)]
pub(crate) mod testing {
    use super::Rule;
    use crate::clean::settings::{CleanSettings, DelayMode};
    use crate::config::{TrialConfig, TEST_TRIAL};
    use crate::crop::crop_table;
    use crate::table::{Point, PointSet};

    /// `n` records one second apart driving east at `speed` m/s along y = 0: 10 kg/s of
    /// flow, a 9 m swath, 15.5 % moisture (corn's standard), no work-state or GPS columns.
    pub fn line(n: usize, speed: f64) -> Vec<Point> {
        (0..n)
            .map(|i| Point {
                id: i as u64,
                file: 0,
                row: i as u64 + 2,
                time_s: i as f64,
                lon: 0.0,
                lat: 0.0,
                x_m: speed * i as f64,
                y_m: 0.0,
                flow_kg_s: 10.0,
                speed_m_s: speed,
                width_m: 9.0,
                moisture_pct: 15.5,
                work_state: f64::NAN,
                hdop: f64::NAN,
                fix_quality: f64::NAN,
                applied_rate: f64::NAN,
                yield_kg_ha: f64::NAN,
            })
            .collect()
    }

    /// Clean `pts` (corn; ids and rows renumbered in the order given) with only `rule`
    /// switched on and fixed delays (the defaults, then `tweak`); the rule that removed each
    /// point, in the order given.
    pub fn verdicts(
        rule: &dyn Rule,
        pts: Vec<Point>,
        tweak: impl Fn(&mut CleanSettings),
    ) -> Vec<Option<&'static str>> {
        verdicts_in(rule, pts, None, tweak)
    }

    /// [`verdicts`] with the trial's plots by treatment known.
    pub fn verdicts_in(
        rule: &dyn Rule,
        pts: Vec<Point>,
        zones: Option<&crate::clean::zones::Zones>,
        tweak: impl Fn(&mut CleanSettings),
    ) -> Vec<Option<&'static str>> {
        let mut pts = pts;
        for (i, p) in pts.iter_mut().enumerate() {
            p.id = i as u64;
            p.row = i as u64 + 2;
        }
        let cfg = TrialConfig::from_toml(TEST_TRIAL, "t.toml", &[]).unwrap();
        let mut s = cfg.clean.clone();
        s.delay.mode = DelayMode::Fixed;
        tweak(&mut s);
        s.disabled_rules = super::names()
            .into_iter()
            .filter(|n| *n != rule.name())
            .map(String::from)
            .collect();
        let n = pts.len();
        let set = PointSet {
            files: vec!["a.csv".into()],
            points: pts,
            epsg: 32614,
        };
        let out = crate::clean::run_with(
            &set,
            &s,
            &crop_table()["corn"],
            zones,
            &crate::progress::Progress::none(),
        );
        assert_eq!(out.points.len() + out.rejections.len(), n);
        (0..n)
            .map(|i| {
                let id = set.points[i].id.to_string();
                out.rejections.iter().find(|r| r.id == id).map(|r| {
                    super::RULES
                        .iter()
                        .map(|x| x.name())
                        .find(|x| **x == *r.rule)
                        .expect("a known rule")
                })
            })
            .collect()
    }
}
