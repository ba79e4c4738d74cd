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

pub use crate::adjust::settings::AdjustSettings;
pub use crate::clean::settings::CleanSettings;
use crate::crop::{crop_table, Crop, OutputUnit};
use crate::defaults::DEFAULTS_TOML;
pub use crate::ingest::settings::{ColumnsSection, IngestConfig, IngestSettings, InputsSection};
pub use crate::plots::settings::PlotsSettings;
pub use crate::report::ReportSettings;
use serde::{Deserialize, Serialize};
use toml::Value;

/// Sections whose every key must appear in the defaults.
const SETTINGS_SECTIONS: &[&str] = &[
    "inputs", "crop", "ingest", "clean", "plots", "adjust", "report",
];
/// Settings tables whose keys are names chosen by the user.
const FREE_TABLES: &[&str] = &[
    "adjust.product_cost",
    "adjust.product_prior_mean",
    "adjust.product_prior_sd",
    "adjust.rates",
];
/// Keys that were renamed, with what to write instead: never read under the old meaning.
pub const RENAMED_KEYS: &[(&str, &str)] = &[
    (
        "adjust.grain_price_per_t",
        "write adjust.grain_price with adjust.grain_price_unit = \"t\" (or \"q\", \"kg\", \"bu\")",
    ),
    (
        "adjust.product_cost_per_ha",
        "write adjust.product_cost with adjust.product_cost_unit = \"ha\" (or \"ac\")",
    ),
];

/// The refusal of a renamed key, or None.
pub fn renamed(key: &str) -> Option<String> {
    RENAMED_KEYS
        .iter()
        .find(|(k, _)| key == *k || key.starts_with(&format!("{k}.")))
        .map(|(k, new)| format!("{k} is no longer read (its unit was fixed): {new}"))
}

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
    /// Crop not in the crop table and not defined in `[crop]`.
    #[error("trial.crop = {crop:?} is not in config/crops.toml (known: {known}); define it in the trial file's [crop] section with standard_moisture_pct, bushel_lb, yield_min_kg_ha and yield_max_kg_ha{missing}")]
    UnknownCrop {
        crop: String,
        known: String,
        missing: String,
    },
}

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

/// The whole trial configuration after defaults and overrides.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TrialConfig {
    pub trial: TrialSection,
    pub inputs: InputsSection,
    /// `[crop]`: this trial's crop values over the crop table's.
    #[serde(rename = "crop")]
    pub crop_values: crate::crop::CropSettings,
    /// The monitor exports' mapping (absent for plot-table entry, and for a trial whose
    /// exports are all of formats that do not read it: task data).
    #[serde(default)]
    pub columns: ColumnsSection,
    /// Whether the trial file (or an override) has a `[columns]` section: without one its
    /// problems are ingest's to raise, for the exports that read it.
    #[serde(skip)]
    pub columns_given: bool,
    pub ingest: IngestSettings,
    pub clean: CleanSettings,
    pub plots: PlotsSettings,
    pub adjust: AdjustSettings,
    pub report: ReportSettings,
    /// Plot grids, one per field, for trials without a boundary file.
    #[serde(default)]
    pub layout: Vec<crate::ingest::grid::GridLayout>,
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
                        if let Some(hint) = renamed(&key) {
                            return Err(ConfigError::UnknownKey { key, hint });
                        }
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
                hint: renamed(key).unwrap_or_else(|| {
                    "no such key in the configuration (see config/defaults.toml)".into()
                }),
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
        let columns_given = matches!(&tree, Value::Table(t) if t.contains_key("columns"));
        let mut cfg: TrialConfig = serde_path_to_error::deserialize(tree).map_err(|e| {
            let (path, message) = (e.path().to_string(), e.inner().to_string());
            let message = message.trim_end().to_string();
            if message.starts_with("must be ") {
                // A choice outside its options (see `crate::choice`); the TOML reader adds
                // the key on a line of its own, which the path already says.
                let first = message.lines().next().unwrap_or_default();
                ConfigError::Invalid(vec![format!("{path} {first}")])
            } else {
                ConfigError::Shape { path, message }
            }
        })?;
        cfg.columns_given = columns_given;
        cfg.validate()?;
        Ok(cfg)
    }

    /// Whether the plots and design are built from treatment labels on the records
    /// (`columns.treatment`, or prescription polygons) rather than read.
    pub fn plots_from_labels(&self) -> bool {
        crate::ingest::settings::plots_from_labels(&self.inputs, &self.columns)
    }

    /// Ingest's settings: its own sections and what it checks its inputs against.
    pub fn for_ingest(&self) -> IngestConfig {
        IngestConfig {
            inputs: self.inputs.clone(),
            columns: self.columns.clone(),
            columns_given: self.columns_given,
            ingest: self.ingest.clone(),
            layout: self.layout.clone(),
            check: self.trial.check.clone(),
            design_mismatch: self.plots.design_mismatch,
            far_m: self.plots.far_m,
            row_spacing_m: self.adjust.row_spacing_m,
            range_spacing_m: self.adjust.range_spacing_m,
            crop: self.crop().map_err(|e| e.to_string()),
        }
    }

    /// The design table's name in rejection rows: `inputs.design`, or for plots built from
    /// treatment labels the table ingest writes.
    pub fn design_name(&self) -> String {
        if !self.plots_from_labels() {
            self.inputs.design.clone()
        } else {
            "1-ingest/design.csv".into()
        }
    }

    /// The crop of this trial: the crop table's entry for `trial.crop` with the trial's
    /// `[crop]` values over it, or a crop the `[crop]` section defines whole.
    pub fn crop(&self) -> Result<Crop, ConfigError> {
        let table = crop_table();
        let v = &self.crop_values;
        match table.get(&self.trial.crop) {
            Some(c) => Ok(v.over(c)),
            None => v.whole().map_err(|missing| ConfigError::UnknownCrop {
                crop: self.trial.crop.clone(),
                known: table.keys().cloned().collect::<Vec<_>>().join(", "),
                missing: if missing.len() == 4 {
                    String::new()
                } else {
                    format!(" (missing: {})", missing.join(", "))
                },
            }),
        }
    }

    /// Check ranges and orderings; every problem names its key. Each section checks itself
    /// (beside its struct, in its stage); here only what spans sections.
    pub fn validate(&self) -> Result<(), ConfigError> {
        let mut p = Vec::new();
        let table = !self.inputs.plot_table.is_empty();
        if !table && self.columns_given {
            self.columns.problems(&mut p);
        }
        self.crop_values.problems(&mut p);
        if let Ok(c) = self.crop() {
            if self.trial.output_unit == OutputUnit::BuAc && !(c.bushel_lb > 0.0) {
                p.push(format!(
                    "trial.output_unit = \"bu_ac\" needs a bushel weight, and {} has none (a forage crop reported as dry matter): use \"t_ha\", or give crop.bushel_lb",
                    self.trial.crop
                ));
            }
            if !(c.yield_min_kg_ha < c.yield_max_kg_ha) {
                p.push(format!(
                    "crop.yield_min_kg_ha must be below crop.yield_max_kg_ha (got {} and {} for {})",
                    c.yield_min_kg_ha, c.yield_max_kg_ha, self.trial.crop
                ));
            }
        }
        self.ingest.problems(&mut p);
        self.clean.problems(&mut p);
        crate::clean::rules::unknown_disabled(&self.clean.disabled_rules, &mut p);
        self.plots.problems(&mut p);
        self.adjust.problems(&mut p);
        self.report.problems(&mut p);
        match (self.inputs.plots.is_empty(), self.layout.is_empty()) {
            _ if table => {
                if !self.inputs.monitor.is_empty()
                    || !self.inputs.plots.is_empty()
                    || !self.inputs.design.is_empty()
                    || !self.layout.is_empty()
                {
                    p.push("inputs.plot_table is the whole input of a plot-table trial: leave out inputs.monitor, inputs.plots, inputs.design and [[layout]]".into());
                }
            }
            _ if self.plots_from_labels() => {
                let key = if self.columns.treatment.is_empty() {
                    "inputs.prescription"
                } else {
                    "columns.treatment"
                };
                if !self.inputs.plots.is_empty()
                    || !self.inputs.design.is_empty()
                    || !self.layout.is_empty()
                {
                    p.push(format!("{key} builds the plots and the design from the records' treatment labels: leave out inputs.plots, inputs.design and [[layout]]"));
                }
                if !self.columns.treatment.is_empty() && !self.inputs.prescription.is_empty() {
                    p.push("give columns.treatment (labels on the records) or inputs.prescription (labels from polygons), not both".into());
                }
            }
            (true, true) => p.push(
                "inputs.plots is empty and there is no [[layout]]: give one of them (or columns.treatment or inputs.prescription for a strip trial without drawn plots, or inputs.plot_table for plot-level yields)".into(),
            ),
            (false, false) => p.push("give inputs.plots or [[layout]], not both".into()),
            _ => {}
        }
        for (i, l) in self.layout.iter().enumerate() {
            p.extend(l.problems(i));
        }
        if !self.inputs.crs.is_empty() {
            if let Err(e) = crate::projection::Crs::parse(&self.inputs.crs) {
                p.push(format!("inputs.crs: {e}"));
            }
        }
        if self.inputs.monitor.is_empty() && !table {
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
    use crate::crop::LB_AC_IN_KG_HA;

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
    fn crop_values_come_from_the_trial_file_and_a_new_crop_can_be_defined_there() {
        let cfg =
            TrialConfig::from_toml(TEST_TRIAL, "t.toml", &["crop.yield_min_kg_ha=100".into()])
                .unwrap();
        let c = cfg.crop().unwrap();
        assert_eq!((c.yield_min_kg_ha, c.standard_moisture_pct), (100.0, 15.5));
        let quinoa = TEST_TRIAL.replace("crop = \"corn\"", "crop = \"quinoa\"");
        let cfg = TrialConfig::from_toml(&quinoa, "t.toml", &["crop.bushel_lb=60".into()]).unwrap();
        let e = cfg.crop().unwrap_err().to_string();
        assert!(
            e.contains("define it in the trial file's [crop] section")
                && e.contains("(missing: crop.standard_moisture_pct, crop.yield_min_kg_ha, crop.yield_max_kg_ha)"),
            "{e}"
        );
        let all = [
            "crop.standard_moisture_pct=12".to_string(),
            "crop.bushel_lb=60".into(),
            "crop.yield_min_kg_ha=200".into(),
            "crop.yield_max_kg_ha=6000".into(),
        ];
        let c = TrialConfig::from_toml(&quinoa, "t.toml", &all)
            .unwrap()
            .crop()
            .unwrap();
        assert_eq!(
            (c.standard_moisture_pct, c.bushel_lb, c.yield_max_kg_ha),
            (12.0, 60.0, 6000.0)
        );
        // Plot bounds must be a range.
        let e = TrialConfig::from_toml(
            TEST_TRIAL,
            "t.toml",
            &["crop.plot_yield_min_kg_ha=500".into()],
        )
        .unwrap_err()
        .to_string();
        assert!(
            e.contains("crop.plot_yield_min_kg_ha must be below crop.plot_yield_max_kg_ha"),
            "{e}"
        );
    }

    #[test]
    fn forage_crops_report_dry_matter_and_bring_their_own_moisture_bounds() {
        let crops = crop_table();
        let s = &crops["silage_maize"];
        assert!(s.dry_matter() && !crops["corn"].dry_matter());
        // 60 t/ha wet at 65 % moisture is 21 t DM/ha: DM = wet x (100 - M) / 100
        // (../shared/CHECKS.md, forage crops; common practice).
        let dm = crate::crop::to_standard_moisture(60_000.0, 65.0, s.standard_moisture_pct);
        assert!((dm - 21_000.0).abs() < 1e-9, "{dm}");
        assert_eq!(s.moisture_bounds(8.0, 40.0), (45.0, 85.0));
        assert_eq!(crops["corn"].moisture_bounds(8.0, 40.0), (8.0, 40.0));
        // No bushel: bu/ac output is refused, naming the fix.
        let t = TEST_TRIAL
            .replace("crop = \"corn\"", "crop = \"silage_maize\"")
            .replace("output_unit = \"t_ha\"", "output_unit = \"bu_ac\"");
        let e = TrialConfig::from_toml(&t, "t.toml", &[])
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("needs a bushel weight, and silage_maize has none"),
            "{e}"
        );
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
        let bu = crate::crop::YieldUnit::new(OutputUnit::BuAc, &corn);
        let one_bu = bu.to_unit(62.77);
        assert!((one_bu - 1.0).abs() < 1e-3, "{one_bu}");
        // Written and read back, a value comes home; t/ha is kg/ha over 1000.
        assert!((bu.to_kg_ha(one_bu) - 62.77).abs() < 1e-9);
        let t = crate::crop::YieldUnit::new(OutputUnit::THa, &corn);
        assert_eq!((t.to_unit(8125.0), t.to_kg_ha(8.125)), (8.125, 8125.0));
        assert_eq!(t.as_written().to_unit(8.5), 8.5);
    }
}
