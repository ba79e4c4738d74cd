//! `[plots]` settings, typed, with their checks.

use crate::clean::settings::non_negative;
use serde::{Deserialize, Serialize};

crate::choice! {
    /// `plots.design_mismatch`: what to do when design and geometry disagree.
    pub enum DesignMismatch {
        /// Stop, listing every id.
        Error = "error",
        /// Drop the unmatched plots with a warning.
        Warn = "warn",
    }
}

/// `[plots]` settings.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PlotsSettings {
    pub min_points: i64,
    pub min_coverage: f64,
    pub end_trim_m: f64,
    /// Each end trim is at most this fraction of the plot's length.
    pub end_trim_max_fraction: f64,
    pub side_trim_m: f64,
    pub min_swath_inside: f64,
    pub trim_fraction: f64,
    pub far_m: f64,
    pub coverage_cell_m: f64,
    pub design_mismatch: DesignMismatch,
}

impl PlotsSettings {
    /// Range problems, each naming its key.
    pub fn problems(&self, p: &mut Vec<String>) {
        let pl = self;
        non_negative(
            p,
            &[
                ("plots.min_coverage", pl.min_coverage),
                ("plots.end_trim_m", pl.end_trim_m),
                ("plots.side_trim_m", pl.side_trim_m),
                ("plots.min_swath_inside", pl.min_swath_inside),
                ("plots.trim_fraction", pl.trim_fraction),
                ("plots.far_m", pl.far_m),
            ],
        );
        if pl.min_coverage > 1.0 || pl.min_swath_inside > 1.0 {
            p.push(format!(
                "plots.min_coverage and plots.min_swath_inside must be at most 1 (got {} and {})",
                pl.min_coverage, pl.min_swath_inside
            ));
        }
        if !(pl.end_trim_max_fraction > 0.0 && pl.end_trim_max_fraction < 0.5) {
            p.push(format!(
                "plots.end_trim_max_fraction must be above 0 and below 0.5, so that a plot keeps part of its length (got {})",
                pl.end_trim_max_fraction
            ));
        }
        if pl.trim_fraction >= 0.5 {
            p.push(format!(
                "plots.trim_fraction must be below 0.5 (got {})",
                pl.trim_fraction
            ));
        }
        if !(pl.coverage_cell_m > 0.0) {
            p.push(format!(
                "plots.coverage_cell_m must be above 0 (got {})",
                pl.coverage_cell_m
            ));
        }
        if pl.min_points < 1 {
            p.push(format!(
                "plots.min_points must be at least 1 (got {})",
                pl.min_points
            ));
        }
    }
}
