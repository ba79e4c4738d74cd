//! The types the cleaning engine and its rules share: one export under cleaning ([`Export`],
//! its records as [`Work`]), what has been derived ([`Needs`]), the quantities a rule may lack
//! ([`Quantity`]), per-pass statistics and the export's details for the summary. They sit
//! apart from the rules and the derivations so that each of those imports them without
//! importing the other.

use super::settings::CleanSettings;
use crate::crop::Crop;
use crate::table::Point;
use std::collections::BTreeMap;

/// A rule's verdict on one point: rule, column, value found, limit.
pub type Verdict = (&'static str, &'static str, f64, String);

/// A delay estimate.
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct DelayEstimate {
    pub lag_s: f64,
    pub pairs: usize,
    /// (lag, objective) for each candidate lag.
    pub curve: Vec<(f64, f64)>,
}

/// The derived quantities, in the order they are derived. A rule that needs one gets every
/// earlier one too.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord)]
pub enum Needs {
    /// The logged records only.
    Records,
    /// Pass numbers ([`super::passes::segment`]).
    Passes,
    /// Flow and moisture moved back by their delays ([`super::delay::shift`]).
    Shifted,
    /// Per pass: start, end, median shifted flow and speed, fill and empty limits.
    PassStats,
    /// Wet yield and yield at standard moisture.
    Yield,
}

/// Logged quantities a rule may test; an export that lacks one (a yield-point export without
/// speed, say) skips the rule, and its summary says which and why.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Quantity {
    Flow,
    Speed,
    Width,
    Moisture,
    /// Each record's time (a yield-point export may have none): rules timed in seconds.
    Time,
    /// Moisture as the sensor logged it: not the column of an export whose yields were
    /// computed by other software (often the standard moisture filled in).
    MoistureSensor,
}

impl Quantity {
    /// Why an export lacking it skips a rule.
    pub fn lacking(self) -> &'static str {
        match self {
            Quantity::Flow => "the export has no mass flow (its yields are given)",
            Quantity::Speed => "the export has no speed or distance",
            Quantity::Width => "the export has no swath width",
            Quantity::Moisture => "the export has no moisture",
            Quantity::Time => "the export has no times (columns.time.format = \"none\")",
            Quantity::MoistureSensor => {
                "the export's yields are given by other software, so its moisture column is not a sensor reading"
            }
        }
    }
}

/// Per-point working state.
pub struct Work<'a> {
    pub p: &'a Point,
    pub pass: u32,
    /// Shifted flow and moisture (own readings until the shift, and where the shift found no
    /// data and `flow_delay_no_data` is off).
    pub flow: f64,
    pub moisture: f64,
    /// The shifted time that found no sensor record within the gap limit, if any.
    pub no_shift_data_at: Option<f64>,
    pub wet: f64,
    pub std: f64,
    /// Boxed: most points are kept, and the work table holds every record of an export.
    pub rejected: Option<Box<Verdict>>,
    /// The treatment zone the record lies in ([`crate::clean::zones`]; all
    /// [`crate::clean::zones::OUTSIDE`] while the plots are not known).
    pub zone: u32,
}

impl Work<'_> {
    pub fn alive(&self) -> bool {
        self.rejected.is_none()
    }
}

/// Statistics of one pass, from its points alive after the delay shift.
#[derive(Clone, Copy, Debug)]
pub struct PassStats {
    pub t0: f64,
    pub t1: f64,
    pub median_flow: f64,
    pub median_speed: f64,
    /// With `fill_mode = "flow"`: the first and last time the shifted flow reaches
    /// `fill_fraction` of the pass median (the pass's own ends otherwise).
    pub fill_until: f64,
    pub empty_from: f64,
}

/// What clean found out about one export, for the summary.
#[derive(Clone, Debug, serde::Serialize)]
pub struct ExportDetails {
    pub header_width_m: f64,
    pub flow_delay_s: f64,
    pub flow_delay_source: String,
    pub moisture_delay_s: f64,
    pub moisture_delay_source: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub flow_delay_estimate: Option<DelayEstimate>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub moisture_delay_estimate: Option<DelayEstimate>,
    /// Rules this export skipped, each with why (a quantity it lacks).
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub skipped_rules: BTreeMap<String, String>,
    /// Backward steps of the GPS time repaired ([`crate::clean::timeline`]).
    #[serde(default, skip_serializing_if = "is_zero")]
    pub time_steps_back: usize,
    /// "Off" work-state records kept as a flicker between working records
    /// (`clean.work_state_bridge_s`).
    #[serde(default, skip_serializing_if = "is_zero")]
    pub work_state_bridged: usize,
}

fn is_zero(n: &usize) -> bool {
    *n == 0
}

/// One export under cleaning: its points (in file order, times repaired), the settings and what has been
/// derived so far.
pub struct Export<'a> {
    pub w: Vec<Work<'a>>,
    pub s: &'a CleanSettings,
    pub crop: &'a Crop,
    /// Full header width (setting, or the most common logged width).
    pub header: f64,
    /// The sensors' time line: every record but repeated time stamps.
    pub times: Vec<f64>,
    pub flows: Vec<f64>,
    pub moist: Vec<f64>,
    /// Per-pass statistics, once derived.
    pub pass_stats: BTreeMap<u32, PassStats>,
    pub details: ExportDetails,
    /// How far the derivations have gone.
    pub derived: Needs,
}

impl Export<'_> {
    /// Reject point `i` by `rule` unless an earlier rule already did.
    pub fn reject(
        &mut self,
        i: usize,
        rule: &'static str,
        column: &'static str,
        value: f64,
        limit: String,
    ) {
        let w = &mut self.w[i];
        if w.rejected.is_none() {
            w.rejected = Some(Box::new((rule, column, value, limit)));
        }
    }

    /// Indices of the points no rule has removed yet.
    pub fn alive(&self) -> Vec<usize> {
        (0..self.w.len()).filter(|&i| self.w[i].alive()).collect()
    }
}
