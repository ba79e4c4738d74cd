//! `[clean]` settings: the typed form of the `clean` section of `config/defaults.toml` (where
//! every default names its source) and its validation. Every problem names its key.

use serde::{Deserialize, Serialize};

crate::choice! {
    /// `clean.delay.mode`.
    pub enum DelayMode {
        /// Estimate the flow and moisture delays per export.
        Auto = "auto",
        /// Use `clean.flow_delay_s` and `clean.moisture_delay_s`.
        Fixed = "fixed",
    }
}

crate::choice! {
    /// `clean.pass.fill_mode`.
    pub enum FillMode {
        /// Trim fixed seconds at each end of a pass.
        Fixed = "fixed",
        /// Also trim until the shifted flow reaches a fraction of the pass median.
        Flow = "flow",
    }
}

crate::choice! {
    /// `clean.outlier.method`.
    pub enum OutlierMethod {
        /// Median +- k x 1.4826 x MAD.
        Mad = "mad",
        /// Tukey's fences.
        Tukey = "tukey",
    }
}

/// The widest scan, seconds: settings stay within it and widening stops at it (wider than
/// any delay reported by Beal & Tian 2001 on the positive side; negative lags for exports
/// already corrected). Common practice, no source.
pub const WIDEST: (f64, f64) = (-20.0, 40.0);

/// `[clean.delay]`.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DelaySettings {
    pub mode: DelayMode,
    pub min_s: f64,
    pub max_s: f64,
    pub step_s: f64,
    pub pair_distance_m: f64,
    pub min_pairs: i64,
    pub estimate_moisture: bool,
    pub widen: bool,
}
/// `[clean.pass]`.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PassSettings {
    pub max_gap_s: f64,
    pub max_heading_change_deg: f64,
    pub min_pass_s: f64,
    pub fill_mode: FillMode,
    pub start_trim_s: f64,
    pub end_trim_s: f64,
    pub fill_fraction: f64,
}
/// `[clean.speed]`.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SpeedSettings {
    pub min_m_s: f64,
    pub max_m_s: f64,
    pub max_change_fraction: f64,
    pub settle_s: f64,
    pub min_fraction_of_pass_median: f64,
}
/// `[clean.swath]`.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SwathSettings {
    pub min_fraction: f64,
    pub max_overlap_fraction: f64,
}
/// `[clean.moisture]`.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct MoistureSettings {
    pub min_pct: f64,
    pub max_pct: f64,
    pub stuck_s: f64,
}
/// `[clean.gps]`.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GpsSettings {
    pub jump_factor: f64,
    pub jump_tolerance_m: f64,
    pub max_hdop: f64,
    pub min_fix_quality: i64,
}
/// `[clean.outlier]`.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OutlierSettings {
    pub method: OutlierMethod,
    pub k_mad: f64,
    pub tukey_k: f64,
    pub local_radius_m: f64,
    pub local_k: f64,
    pub local_min_neighbours: i64,
}

/// `[clean]` settings.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CleanSettings {
    pub header_width_m: f64,
    pub flow_delay_s: f64,
    pub moisture_delay_s: f64,
    pub disabled_rules: Vec<String>,
    /// A run of "off" work-state records between working records at most this far apart (s)
    /// is a flicker and kept.
    pub work_state_bridge_s: f64,
    /// Warn when one rule removes more than this share of an export's points.
    pub warn_rule_share: f64,
    pub delay: DelaySettings,
    pub pass: PassSettings,
    pub speed: SpeedSettings,
    pub swath: SwathSettings,
    pub moisture: MoistureSettings,
    pub gps: GpsSettings,
    pub outlier: OutlierSettings,
}

/// Push `key must be a finite number >= 0` for each value that is not.
pub fn non_negative(p: &mut Vec<String>, values: &[(&str, f64)]) {
    for (key, v) in values {
        if !(*v >= 0.0) || !v.is_finite() {
            p.push(format!("{key} must be a finite number >= 0 (got {v})"));
        }
    }
}

impl CleanSettings {
    /// Whether `rule` runs (is not in `disabled_rules`).
    pub fn enabled(&self, rule: &str) -> bool {
        !self.disabled_rules.iter().any(|d| d == rule)
    }

    /// Range and ordering problems, each naming its key.
    pub fn problems(&self, p: &mut Vec<String>) {
        let c = self;
        non_negative(
            p,
            &[
                ("clean.header_width_m", c.header_width_m),
                ("clean.flow_delay_s", c.flow_delay_s),
                ("clean.moisture_delay_s", c.moisture_delay_s),
                ("clean.work_state_bridge_s", c.work_state_bridge_s),
                ("clean.pass.max_gap_s", c.pass.max_gap_s),
                (
                    "clean.pass.max_heading_change_deg",
                    c.pass.max_heading_change_deg,
                ),
                ("clean.pass.min_pass_s", c.pass.min_pass_s),
                ("clean.pass.start_trim_s", c.pass.start_trim_s),
                ("clean.pass.end_trim_s", c.pass.end_trim_s),
                ("clean.speed.min_m_s", c.speed.min_m_s),
                ("clean.speed.max_m_s", c.speed.max_m_s),
                ("clean.swath.min_fraction", c.swath.min_fraction),
                ("clean.moisture.min_pct", c.moisture.min_pct),
                ("clean.moisture.max_pct", c.moisture.max_pct),
                ("clean.gps.jump_factor", c.gps.jump_factor),
                ("clean.gps.jump_tolerance_m", c.gps.jump_tolerance_m),
                ("clean.outlier.k_mad", c.outlier.k_mad),
                ("clean.outlier.tukey_k", c.outlier.tukey_k),
                ("clean.outlier.local_radius_m", c.outlier.local_radius_m),
                ("clean.outlier.local_k", c.outlier.local_k),
                ("clean.delay.pair_distance_m", c.delay.pair_distance_m),
                (
                    "clean.speed.max_change_fraction",
                    c.speed.max_change_fraction,
                ),
                ("clean.speed.settle_s", c.speed.settle_s),
                (
                    "clean.speed.min_fraction_of_pass_median",
                    c.speed.min_fraction_of_pass_median,
                ),
                (
                    "clean.swath.max_overlap_fraction",
                    c.swath.max_overlap_fraction,
                ),
                ("clean.moisture.stuck_s", c.moisture.stuck_s),
                ("clean.gps.max_hdop", c.gps.max_hdop),
                ("clean.pass.fill_fraction", c.pass.fill_fraction),
            ],
        );
        if c.speed.min_m_s >= c.speed.max_m_s {
            p.push(format!(
                "clean.speed.min_m_s must be below clean.speed.max_m_s (got {} and {})",
                c.speed.min_m_s, c.speed.max_m_s
            ));
        }
        if c.moisture.min_pct >= c.moisture.max_pct {
            p.push(format!(
                "clean.moisture.min_pct must be below clean.moisture.max_pct (got {} and {})",
                c.moisture.min_pct, c.moisture.max_pct
            ));
        }
        if c.moisture.max_pct >= 100.0 {
            p.push(format!(
                "clean.moisture.max_pct must be below 100 (got {})",
                c.moisture.max_pct
            ));
        }
        let (wlo, whi) = WIDEST;
        for (key, v) in [
            ("clean.delay.min_s", c.delay.min_s),
            ("clean.delay.max_s", c.delay.max_s),
        ] {
            if !(v >= wlo && v <= whi) {
                p.push(format!("{key} must be between {wlo} and {whi} s (got {v})"));
            }
        }
        if c.delay.min_s > c.delay.max_s {
            p.push(format!(
                "clean.delay.min_s must not be above clean.delay.max_s (got {} and {})",
                c.delay.min_s, c.delay.max_s
            ));
        }
        if !(c.delay.step_s > 0.0) {
            p.push(format!(
                "clean.delay.step_s must be above 0 (got {})",
                c.delay.step_s
            ));
        }
        if c.delay.min_pairs < 1 {
            p.push(format!(
                "clean.delay.min_pairs must be at least 1 (got {})",
                c.delay.min_pairs
            ));
        }
        if c.outlier.local_min_neighbours < 1 {
            p.push(format!(
                "clean.outlier.local_min_neighbours must be at least 1 (got {})",
                c.outlier.local_min_neighbours
            ));
        }
        for (k, v) in [
            ("clean.pass.fill_fraction", c.pass.fill_fraction),
            (
                "clean.swath.max_overlap_fraction",
                c.swath.max_overlap_fraction,
            ),
            (
                "clean.speed.min_fraction_of_pass_median",
                c.speed.min_fraction_of_pass_median,
            ),
        ] {
            if v > 1.0 {
                p.push(format!("{k} must be at most 1 (got {v})"));
            }
        }
        if !(0.0..=1.0).contains(&c.warn_rule_share) {
            p.push(format!(
                "clean.warn_rule_share must be between 0 and 1 (got {})",
                c.warn_rule_share
            ));
        }
        if c.swath.min_fraction > 1.0 {
            p.push(format!(
                "clean.swath.min_fraction must be at most 1 (got {})",
                c.swath.min_fraction
            ));
        }
        if c.gps.jump_factor < 1.0 {
            p.push(format!(
                "clean.gps.jump_factor must be at least 1 (got {})",
                c.gps.jump_factor
            ));
        }
    }
}
