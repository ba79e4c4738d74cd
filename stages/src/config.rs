//! Trial configuration: two-phase loading and validation.
//!
//! Phase one merges three layers into one TOML tree: the embedded defaults
//! (`config/defaults.toml`), the trial file, and `--set key=value` overrides. A key of a
//! settings section (`inputs`, `ingest`, `clean`, `plots`, `adjust`, `report`) that is not in
//! the defaults is an error naming it, and so is a value whose type differs from the
//! default's. Phase two deserialises the tree into typed structs (unknown keys in any section
//! are errors, with the key path) and [`TrialConfig::validate`] checks every range and
//! ordering, naming each offending key.
//!
//! Errors: [`ConfigError`], each naming the key or file to fix.

pub use crate::clean::settings::CleanSettings;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use toml::Value;

/// The defaults of every stage setting, as shipped in `config/defaults.toml`.
pub const DEFAULTS_TOML: &str = include_str!("../../config/defaults.toml");
/// The crop table, as shipped in `config/crops.toml`.
pub const CROPS_TOML: &str = include_str!("../../config/crops.toml");

/// Sections whose every key must appear in the defaults.
const SETTINGS_SECTIONS: &[&str] = &["inputs", "ingest", "clean", "plots", "adjust", "report"];
/// Settings tables whose keys are names chosen by the user.
const FREE_TABLES: &[&str] = &[
    "adjust.product_cost_per_ha",
    "adjust.product_prior_mean",
    "adjust.product_prior_sd",
];
/// Keys of `inputs` that the trial file must give (they have no default).
const TRIAL_INPUT_KEYS: &[&str] = &["monitor", "design"];

/// A configuration problem, naming the key or file.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    /// The TOML text does not parse.
    #[error("{file}: not valid TOML: {message}")]
    Syntax { file: String, message: String },
    /// A key that no section knows.
    #[error("unknown key {key}: {hint}")]
    UnknownKey { key: String, hint: String },
    /// A value of the wrong type.
    #[error("{key} expects {expected}, got {found}")]
    WrongType {
        key: String,
        expected: String,
        found: String,
    },
    /// `--set` without `=`.
    #[error("--set {0}: expected KEY=VALUE, e.g. clean.speed.min_m_s=0.8")]
    BadOverride(String),
    /// Structural problem found while reading the merged tree.
    #[error("trial configuration: {path}: {message}")]
    Shape { path: String, message: String },
    /// Values that are individually fine but not together, or out of range.
    #[error("invalid settings:\n  {}", .0.join("\n  "))]
    Invalid(Vec<String>),
    /// Crop not in the crop table.
    #[error("trial.crop = {crop:?} is not in config/crops.toml (known: {known})")]
    UnknownCrop { crop: String, known: String },
}

/// Unit of the output yields.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum OutputUnit {
    /// Tonnes per hectare.
    THa,
    /// Bushels per acre (bushel weight from the crop table).
    BuAc,
}

impl OutputUnit {
    /// Suffix used in column names, e.g. `yield_mean_t_ha`.
    pub fn suffix(self) -> &'static str {
        match self {
            OutputUnit::THa => "t_ha",
            OutputUnit::BuAc => "bu_ac",
        }
    }
    /// Human label, e.g. `t/ha`.
    pub fn label(self) -> &'static str {
        match self {
            OutputUnit::THa => "t/ha",
            OutputUnit::BuAc => "bu/ac",
        }
    }
    /// Convert kg/ha at standard moisture to this unit.
    pub fn from_kg_ha(self, kg_ha: f64, crop: &Crop) -> f64 {
        match self {
            OutputUnit::THa => kg_ha / 1000.0,
            // 1 lb/ac = 1.120851 kg/ha (definitions of the pound and the acre).
            OutputUnit::BuAc => kg_ha / LB_AC_IN_KG_HA / crop.bushel_lb,
        }
    }
}

/// 1 lb/ac in kg/ha: 0.45359237 kg / 0.40468564224 ha (definitions of pound and acre).
pub const LB_AC_IN_KG_HA: f64 = 0.45359237 / 0.40468564224;

/// `[trial]`: what the trial is.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TrialSection {
    pub name: String,
    /// A crop of `config/crops.toml`.
    pub crop: String,
    pub output_unit: OutputUnit,
    /// The check (control) treatment name, as in the design table.
    pub check: String,
}

/// `[inputs]`: files, relative to the trial file.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct InputsSection {
    /// Monitor export CSVs, or folders whose `*.csv` files are all taken (sorted by name).
    pub monitor: Vec<String>,
    /// Plot boundaries, GeoJSON (RFC 7946, WGS84 lon/lat); empty when `[[layout]]` gives
    /// the plots as grids.
    pub plots: String,
    /// Feature property holding the plot id.
    pub plot_id_property: String,
    /// Design table CSV with columns plot_id, treatment, block, field.
    pub design: String,
}

/// Mass-flow units a monitor may log.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum FlowUnit {
    KgS,
    LbS,
}
/// Speed units a monitor may log.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SpeedUnit {
    MS,
    KmH,
    Mph,
}
/// Width units a monitor may log.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum WidthUnit {
    M,
    Ft,
    In,
}
/// Timestamp formats a monitor may log.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum TimeFormat {
    /// `2026-09-14T10:22:05Z`, `2026-09-14 10:22:05.5`, optional offset `+02:00`.
    Iso8601,
    /// Seconds since 1970-01-01 UTC.
    UnixS,
}

/// A mapped column with its unit.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Mapped<U> {
    pub name: String,
    pub unit: U,
}

/// `[columns]`: how the monitor export names and scales its columns.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ColumnsSection {
    /// Field delimiter, one character.
    pub delimiter: String,
    pub time: TimeColumn,
    pub longitude: String,
    pub latitude: String,
    pub flow: Mapped<FlowUnit>,
    pub speed: Mapped<SpeedUnit>,
    pub width: Mapped<WidthUnit>,
    /// Grain moisture column, in percent (wet basis).
    pub moisture: String,
    /// Optional: work-state / header column (0 = not harvesting, anything else = harvesting).
    #[serde(default)]
    pub work_state: String,
    /// Optional: GPS horizontal dilution of precision.
    #[serde(default)]
    pub hdop: String,
    /// Optional: GPS fix quality (NMEA GGA: 0 invalid, 1 GPS, 2 DGPS, 4 RTK fixed, 5 RTK float).
    #[serde(default)]
    pub fix_quality: String,
}

/// Time column and its format.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TimeColumn {
    pub name: String,
    pub format: TimeFormat,
}

/// `[ingest]` settings.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct IngestSettings {
    pub utm_zone: i64,
    pub hemisphere: String,
}

/// `[plots]` settings.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PlotsSettings {
    pub min_points: i64,
    pub min_coverage: f64,
    pub end_trim_m: f64,
    pub side_trim_m: f64,
    pub min_swath_inside: f64,
    pub trim_fraction: f64,
    pub far_m: f64,
    pub coverage_cell_m: f64,
    pub design_mismatch: String,
}

/// `[adjust]` settings.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AdjustSettings {
    pub kernel: String,
    pub blocks: bool,
    pub min_range_m: f64,
    pub max_range_m: f64,
    pub range_grid_points: i64,
    pub anisotropic: bool,
    pub pooling: String,
    pub shared_range: bool,
    pub interaction: bool,
    pub interaction_sd_u: f64,
    pub weak_prior_sd: f64,
    pub product_prior_mean: BTreeMap<String, f64>,
    pub product_prior_sd: BTreeMap<String, f64>,
    pub exact_max_plots: i64,
    pub hsgp_max_basis: i64,
    pub hsgp_boundary_factor: f64,
    pub joint_draws: i64,
    pub seed: i64,
    pub grain_price_per_t: f64,
    pub product_cost_per_ha: BTreeMap<String, f64>,
    pub plot_table: String,
    pub row_spacing_m: f64,
    pub range_spacing_m: f64,
}

/// `[report]` settings.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ReportSettings {
    pub decimals: i64,
}

/// The whole trial configuration after defaults and overrides.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TrialConfig {
    pub trial: TrialSection,
    pub inputs: InputsSection,
    pub columns: ColumnsSection,
    pub ingest: IngestSettings,
    pub clean: CleanSettings,
    pub plots: PlotsSettings,
    pub adjust: AdjustSettings,
    pub report: ReportSettings,
    /// Plot grids, one per field, for trials without a boundary file.
    #[serde(default)]
    pub layout: Vec<crate::plots::layout::GridLayout>,
}

/// One crop of the crop table.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Crop {
    pub standard_moisture_pct: f64,
    pub bushel_lb: f64,
    pub yield_min_kg_ha: f64,
    pub yield_max_kg_ha: f64,
}

/// The crop table of `config/crops.toml`.
pub fn crop_table() -> BTreeMap<String, Crop> {
    toml::from_str(CROPS_TOML).expect("config/crops.toml is valid (checked by a unit test)")
}

fn type_name(v: &Value) -> &'static str {
    match v {
        Value::String(_) => "a string",
        Value::Integer(_) => "an integer",
        Value::Float(_) => "a number",
        Value::Boolean(_) => "true or false",
        Value::Datetime(_) => "a date-time",
        Value::Array(_) => "a list",
        Value::Table(_) => "a table",
    }
}

/// Merge `over` into `base`, checking settings keys against the defaults.
fn merge(base: &mut Value, over: Value, path: &str, strict: bool) -> Result<(), ConfigError> {
    match (base, over) {
        (Value::Table(bt), Value::Table(ot)) => {
            for (k, ov) in ot {
                let key = if path.is_empty() {
                    k.clone()
                } else {
                    format!("{path}.{k}")
                };
                // Tables whose keys are the user's own names (products) are free.
                let free = FREE_TABLES.contains(&key.as_str()) || FREE_TABLES.contains(&path);
                let child_strict = !free
                    && (strict
                        || (path.is_empty()
                            && SETTINGS_SECTIONS.contains(&k.as_str())
                            && k != "inputs")
                        || (path == "inputs" && !TRIAL_INPUT_KEYS.contains(&k.as_str())));
                match bt.get_mut(&k) {
                    Some(bv) => merge(bv, ov, &key, child_strict)?,
                    None => {
                        if child_strict {
                            return Err(ConfigError::UnknownKey {
                                key,
                                hint: "not a setting (see config/defaults.toml for every key)"
                                    .into(),
                            });
                        }
                        bt.insert(k, ov);
                    }
                }
            }
            Ok(())
        }
        (b, o) => {
            if !strict {
                *b = o;
                return Ok(());
            }
            let ok = std::mem::discriminant(b) == std::mem::discriminant(&o)
                || matches!((&*b, &o), (Value::Float(_), Value::Integer(_)));
            if !ok {
                return Err(ConfigError::WrongType {
                    key: path.to_string(),
                    expected: type_name(b).to_string(),
                    found: format!("{} ({})", type_name(&o), o),
                });
            }
            *b = match (&*b, o) {
                (Value::Float(_), Value::Integer(i)) => Value::Float(i as f64),
                (_, o) => o,
            };
            Ok(())
        }
    }
}

/// Parse a `--set` value: TOML syntax (numbers, booleans, quoted strings, lists), or a bare
/// word taken as a string.
fn parse_override_value(text: &str) -> Value {
    match toml::from_str::<toml::Table>(&format!("v = {text}")) {
        Ok(mut t) => t.remove("v").unwrap_or(Value::String(text.to_string())),
        Err(_) => Value::String(text.to_string()),
    }
}

/// Apply one `KEY=VALUE` override to a merged tree; the key must exist.
fn apply_override(tree: &mut Value, spec: &str) -> Result<(), ConfigError> {
    let (key, text) = spec
        .split_once('=')
        .ok_or_else(|| ConfigError::BadOverride(spec.to_string()))?;
    let key = key.trim();
    let parts: Vec<&str> = key.split('.').collect();
    let mut node = &mut *tree;
    for (i, part) in parts.iter().enumerate() {
        // A new name in a table of the user's own names (e.g. a product's cost) is added.
        let parent = parts[..i].join(".");
        if i + 1 == parts.len() && FREE_TABLES.contains(&parent.as_str()) {
            if let Value::Table(t) = node {
                if !t.contains_key(*part) {
                    t.insert(part.to_string(), parse_override_value(text.trim()));
                    return Ok(());
                }
            }
        }
        node = match node {
            Value::Table(t) => t.get_mut(*part).ok_or_else(|| ConfigError::UnknownKey {
                key: key.to_string(),
                hint: "no such key in the configuration (see config/defaults.toml)".into(),
            })?,
            _ => {
                return Err(ConfigError::UnknownKey {
                    key: key.to_string(),
                    hint: "a part of it is a value, not a section".into(),
                })
            }
        };
    }
    if let Value::Table(_) = node {
        return Err(ConfigError::UnknownKey {
            key: key.to_string(),
            hint: "this is a section; set one of its keys".into(),
        });
    }
    let new = parse_override_value(text.trim());
    let mut tmp = node.clone();
    merge(&mut tmp, new, key, true)?;
    *node = tmp;
    Ok(())
}

impl TrialConfig {
    /// Load from the trial file's text with overrides; `file` names it in errors.
    pub fn from_toml(text: &str, file: &str, overrides: &[String]) -> Result<Self, ConfigError> {
        let mut tree: Value =
            Value::Table(
                toml::from_str(DEFAULTS_TOML).map_err(|e| ConfigError::Syntax {
                    file: "config/defaults.toml".into(),
                    message: e.to_string(),
                })?,
            );
        let trial: Value = Value::Table(toml::from_str(text).map_err(|e| ConfigError::Syntax {
            file: file.to_string(),
            message: e.to_string(),
        })?);
        merge(&mut tree, trial, "", false)?;
        for o in overrides {
            apply_override(&mut tree, o)?;
        }
        let cfg: TrialConfig = serde_path_to_error::deserialize(tree).map_err(|e| {
            let (path, message) = (e.path().to_string(), e.inner().to_string());
            let message = message.trim_end().to_string();
            if message.starts_with("must be ") {
                // A choice outside its options (see `crate::choice`).
                ConfigError::Invalid(vec![format!("{path} {message}")])
            } else {
                ConfigError::Shape { path, message }
            }
        })?;
        cfg.validate()?;
        Ok(cfg)
    }

    /// The crop of this trial from the crop table.
    pub fn crop(&self) -> Result<Crop, ConfigError> {
        let table = crop_table();
        table
            .get(&self.trial.crop)
            .cloned()
            .ok_or_else(|| ConfigError::UnknownCrop {
                crop: self.trial.crop.clone(),
                known: table.keys().cloned().collect::<Vec<_>>().join(", "),
            })
    }

    /// Check ranges and orderings; every problem names its key.
    pub fn validate(&self) -> Result<(), ConfigError> {
        let mut p = Vec::new();
        self.clean.problems(&mut p);
        let mut nonneg = |key: &str, v: f64| {
            if !(v >= 0.0) || !v.is_finite() {
                p.push(format!("{key} must be a finite number >= 0 (got {v})"));
            }
        };
        nonneg("adjust.min_range_m", self.adjust.min_range_m);
        nonneg("adjust.max_range_m", self.adjust.max_range_m);
        nonneg("adjust.grain_price_per_t", self.adjust.grain_price_per_t);
        for (k, v) in &self.adjust.product_cost_per_ha {
            nonneg(&format!("adjust.product_cost_per_ha.{k}"), *v);
        }
        if self.adjust.max_range_m > 0.0 && self.adjust.min_range_m >= self.adjust.max_range_m {
            p.push(format!(
                "adjust.min_range_m must be below adjust.max_range_m (got {} and {})",
                self.adjust.min_range_m, self.adjust.max_range_m
            ));
        }
        if crate::adjust::Kernel::from_name(&self.adjust.kernel).is_none() {
            p.push(format!(
                "adjust.kernel: unknown kernel {:?} (known: matern12, matern32, matern52, squared_exponential)",
                self.adjust.kernel
            ));
        }
        let a = &self.adjust;
        for (k, v, lo, hi) in [
            ("adjust.range_grid_points", a.range_grid_points, 3, 40),
            ("adjust.exact_max_plots", a.exact_max_plots, 10, 5000),
            ("adjust.hsgp_max_basis", a.hsgp_max_basis, 16, 2500),
            ("adjust.joint_draws", a.joint_draws, 100, 1_000_000),
        ] {
            if !(lo..=hi).contains(&v) {
                p.push(format!("{k} must be between {lo} and {hi} (got {v})"));
            }
        }
        if !["joint", "separate"].contains(&a.pooling.as_str()) {
            p.push(format!(
                "adjust.pooling must be \"joint\" or \"separate\" (got {:?})",
                a.pooling
            ));
        }
        if !(a.hsgp_boundary_factor >= 1.0) {
            p.push(format!(
                "adjust.hsgp_boundary_factor must be at least 1 (got {})",
                a.hsgp_boundary_factor
            ));
        }
        for (k, v) in [
            ("adjust.interaction_sd_u", a.interaction_sd_u),
            ("adjust.weak_prior_sd", a.weak_prior_sd),
        ] {
            if !(v >= 0.0) || !v.is_finite() {
                p.push(format!("{k} must be a finite number >= 0 (got {v})"));
            }
        }
        for (k, v) in &a.product_prior_sd {
            if !(*v > 0.0) || !v.is_finite() {
                p.push(format!(
                    "adjust.product_prior_sd.{k} must be above 0 (got {v})"
                ));
            }
            if !a.product_prior_mean.contains_key(k) {
                p.push(format!(
                    "adjust.product_prior_sd.{k} has no adjust.product_prior_mean.{k}"
                ));
            }
        }
        for (k, v) in &a.product_prior_mean {
            if !v.is_finite() {
                p.push(format!(
                    "adjust.product_prior_mean.{k} must be a finite number"
                ));
            }
            if !a.product_prior_sd.contains_key(k) {
                p.push(format!(
                    "adjust.product_prior_mean.{k} has no adjust.product_prior_sd.{k}"
                ));
            }
        }
        let pl = &self.plots;
        for (k, v) in [
            ("plots.min_coverage", pl.min_coverage),
            ("plots.end_trim_m", pl.end_trim_m),
            ("plots.side_trim_m", pl.side_trim_m),
            ("plots.min_swath_inside", pl.min_swath_inside),
            ("plots.trim_fraction", pl.trim_fraction),
            ("plots.far_m", pl.far_m),
        ] {
            if !(v >= 0.0) || !v.is_finite() {
                p.push(format!("{k} must be a finite number >= 0 (got {v})"));
            }
        }
        if pl.min_coverage > 1.0 || pl.min_swath_inside > 1.0 {
            p.push(format!(
                "plots.min_coverage and plots.min_swath_inside must be at most 1 (got {} and {})",
                pl.min_coverage, pl.min_swath_inside
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
        if !["error", "warn"].contains(&pl.design_mismatch.as_str()) {
            p.push(format!(
                "plots.design_mismatch must be \"error\" or \"warn\" (got {:?})",
                pl.design_mismatch
            ));
        }
        match (self.inputs.plots.is_empty(), self.layout.is_empty()) {
            (true, true) => {
                p.push("inputs.plots is empty and there is no [[layout]]: give one of them".into())
            }
            (false, false) => p.push("give inputs.plots or [[layout]], not both".into()),
            _ => {}
        }
        for (i, l) in self.layout.iter().enumerate() {
            p.extend(l.problems(i));
        }
        if self.plots.min_points < 1 {
            p.push(format!(
                "plots.min_points must be at least 1 (got {})",
                self.plots.min_points
            ));
        }
        if !(0..=6).contains(&self.report.decimals) {
            p.push(format!(
                "report.decimals must be between 0 and 6 (got {})",
                self.report.decimals
            ));
        }
        if !(0..=60).contains(&self.ingest.utm_zone) {
            p.push(format!(
                "ingest.utm_zone must be 0 (automatic) or a zone 1-60 (got {})",
                self.ingest.utm_zone
            ));
        }
        if !["auto", "north", "south"].contains(&self.ingest.hemisphere.as_str()) {
            p.push(format!(
                "ingest.hemisphere must be \"auto\", \"north\" or \"south\" (got {:?})",
                self.ingest.hemisphere
            ));
        }
        if self.columns.delimiter.chars().count() != 1 {
            p.push(format!(
                "columns.delimiter must be one character (got {:?})",
                self.columns.delimiter
            ));
        }
        if self.inputs.monitor.is_empty() {
            p.push("inputs.monitor must list at least one export file or folder".into());
        }
        if p.is_empty() {
            Ok(())
        } else {
            Err(ConfigError::Invalid(p))
        }
    }
}

#[cfg(test)]
pub(crate) const TEST_TRIAL: &str = r#"
[trial]
name = "unit"
crop = "corn"
output_unit = "t_ha"
check = "CHK"
[inputs]
monitor = ["m.csv"]
plots = "p.geojson"
design = "d.csv"
[columns]
delimiter = ","
time = { name = "t", format = "unix_s" }
longitude = "lon"
latitude = "lat"
flow = { name = "f", unit = "kg_s" }
speed = { name = "s", unit = "m_s" }
width = { name = "w", unit = "m" }
moisture = "m"
"#;

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_and_crops_parse() {
        let cfg = TrialConfig::from_toml(TEST_TRIAL, "t.toml", &[]).unwrap();
        assert_eq!(cfg.clean.speed.min_m_s, 0.5);
        assert_eq!(cfg.inputs.plot_id_property, "plot_id");
        let crops = crop_table();
        // Standard moistures as listed in ../shared/CHECKS.md (EDIS AG442 for corn, OSU for
        // soybean) and bushel weights (USDA ERS AH-697).
        assert_eq!(crops["corn"].standard_moisture_pct, 15.5);
        assert_eq!(crops["soybean"].standard_moisture_pct, 13.0);
        assert_eq!(crops["corn"].bushel_lb, 56.0);
        assert_eq!(crops["oats"].bushel_lb, 32.0);
    }

    #[test]
    fn override_changes_value_and_converts_integers() {
        let o = vec!["clean.speed.min_m_s=1".to_string()];
        let cfg = TrialConfig::from_toml(TEST_TRIAL, "t.toml", &o).unwrap();
        assert_eq!(cfg.clean.speed.min_m_s, 1.0);
    }

    #[test]
    fn unknown_key_and_wrong_type_name_the_key() {
        let e = TrialConfig::from_toml(TEST_TRIAL, "t.toml", &["clean.speed.minn=1".into()])
            .unwrap_err()
            .to_string();
        assert!(e.contains("clean.speed.minn"), "{e}");
        let e = TrialConfig::from_toml(TEST_TRIAL, "t.toml", &["clean.speed.min_m_s=abc".into()])
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("clean.speed.min_m_s") && e.contains("a number"),
            "{e}"
        );
        let bad = format!("{TEST_TRIAL}\n[plots]\nmin_pointz = 3\n");
        let e = TrialConfig::from_toml(&bad, "t.toml", &[])
            .unwrap_err()
            .to_string();
        assert!(e.contains("plots.min_pointz"), "{e}");
    }

    #[test]
    fn invalid_ranges_name_the_keys() {
        let o = vec![
            "clean.speed.min_m_s=3.0".to_string(),
            "clean.speed.max_m_s=2.5".to_string(),
            "clean.flow_delay_s=-1".to_string(),
        ];
        let e = TrialConfig::from_toml(TEST_TRIAL, "t.toml", &o)
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("clean.speed.min_m_s must be below clean.speed.max_m_s (got 3 and 2.5)"),
            "{e}"
        );
        assert!(e.contains("clean.flow_delay_s must be"), "{e}");
    }

    #[test]
    fn unit_conversion_matches_checks_table() {
        // ../shared/CHECKS.md: 1 lb/ac = 1.120851 kg/ha; corn 1 bu/ac = 62.77 kg/ha.
        assert!((LB_AC_IN_KG_HA - 1.120851).abs() < 1e-6);
        let corn = crop_table()["corn"].clone();
        let one_bu = OutputUnit::BuAc.from_kg_ha(62.77, &corn);
        assert!((one_bu - 1.0).abs() < 1e-3, "{one_bu}");
    }
}
