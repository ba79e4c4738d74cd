//! `[plots]` settings, typed, with their checks.

use crate::clean::settings::non_negative;
use serde::{Deserialize, Serialize};

pub use crate::ingest::settings::DesignMismatch;

/// The fewest one-second records a plot yield rests on, however short the plot; common
/// practice, no source.
pub const MIN_POINTS_FLOOR: f64 = 3.0;

/// `[plots]` settings.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PlotsSettings {
    pub min_points: i64,
    /// `min_points` is at most this fraction of the one-second records a complete harvest of
    /// the net plot gives (net area / (speed x swath)), and never below [`MIN_POINTS_FLOOR`].
    pub min_points_max_fraction: f64,
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
        if !(pl.min_points_max_fraction > 0.0 && pl.min_points_max_fraction <= 1.0) {
            p.push(format!(
                "plots.min_points_max_fraction must be above 0 and at most 1 (got {})",
                pl.min_points_max_fraction
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

impl PlotsSettings {
    /// The fewest one-second records a plot needs: `min_points`, but at most
    /// `min_points_max_fraction` of `expected_s` (the records a complete harvest of its net
    /// plot gives) and never below [`MIN_POINTS_FLOOR`]; `min_points` itself where
    /// `expected_s` is unknown.
    pub fn min_points_for(&self, expected_s: f64) -> f64 {
        let full = self.min_points as f64;
        if expected_s.is_finite() && expected_s > 0.0 {
            full.min(
                (self.min_points_max_fraction * expected_s)
                    .floor()
                    .max(MIN_POINTS_FLOOR),
            )
        } else {
            full
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn min_points_scales_only_for_short_plots() {
        let s: PlotsSettings = crate::defaults::section("plots");
        assert_eq!(s.min_points, 10);
        assert_eq!(s.min_points_max_fraction, 0.4);
        // A 60 m plot two headers wide at 2.2 m/s: net 30 m x 17.3 m, 25.8 s -> 10 (unchanged).
        assert_eq!(s.min_points_for(30.0 * 17.288 / (2.2 * 9.144)), 10.0);
        // A 10 m research plot at 1.1 m/s: net 4 m x 17.3 m, 6.9 s -> 3 (one clean pass).
        assert_eq!(s.min_points_for(4.0 * 17.288 / (1.1 * 9.144)), 3.0);
        // A strip one swath wide at 2.2 m/s: net 30 m x 8.1 m, 12.1 s -> 4.
        assert_eq!(s.min_points_for(30.0 * 8.144 / (2.2 * 9.144)), 4.0);
        // 0.4 x 7.5 s is 3.0000000000000004 in floating point: still 3.
        assert_eq!(s.min_points_for(7.5), 3.0);
        // Very short: never below the floor.
        assert_eq!(s.min_points_for(1.0), 3.0);
        // Unknown speed or swath: the plain setting.
        assert_eq!(s.min_points_for(f64::NAN), 10.0);
    }
}
