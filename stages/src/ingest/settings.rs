//! Ingest's settings: `[inputs]` (the trial's files), `[columns]` (how the monitor export
//! names and scales its columns) and `[ingest]` (projection), typed, with their checks.

use serde::{Deserialize, Serialize};

crate::choice! {
    /// `ingest.hemisphere` for a fixed UTM zone.
    pub enum Hemisphere {
        /// From the median latitude of the points.
        Auto = "auto",
        North = "north",
        South = "south",
    }
}

/// `[inputs]`: files, relative to the trial file.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct InputsSection {
    /// Monitor export CSVs, or folders whose `*.csv` files are all taken (sorted by name).
    #[serde(default)]
    pub monitor: Vec<String>,
    /// Plot boundaries, GeoJSON (RFC 7946, WGS84 lon/lat, or a `crs` member) or an ESRI
    /// Shapefile (`.shp`); empty when `[[layout]]` gives the plots as grids.
    pub plots: String,
    /// Feature property holding the plot id.
    pub plot_id_property: String,
    /// The layer to read from a GeoPackage with several feature layers.
    pub layer: String,
    /// Design table CSV with columns plot_id, treatment, block, field.
    #[serde(default)]
    pub design: String,
    /// Plot-table entry: plot-level yields instead of monitor exports, plots and design
    /// ([`crate::ingest::plot_table`]).
    pub plot_table: String,
    /// A plot table's yield column or attribute when its name does not carry the unit
    /// (`yield_t_ha`, ...), with `yield_unit`.
    pub yield_property: String,
    /// The unit of `yield_property`: t_ha, kg_ha, q_ha, bu_ac or lb_ac.
    pub yield_unit: String,
    /// Prescription polygons (GeoJSON, Shapefile or GeoPackage) whose attribute
    /// `prescription_property` names the treatment applied in each: every record takes the
    /// treatment of the polygon it lies in, and the plots and design are built from these
    /// labels as from `columns.treatment`.
    pub prescription: String,
    pub prescription_property: String,
    /// The CRS of coordinates in the inputs (`EPSG:32614`, ...): monitor exports' x/y
    /// columns, and plot files without a `crs` member of their own. Empty: WGS84 lon/lat.
    pub crs: String,
}

/// Mass-flow units a monitor may log.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum FlowUnit {
    #[default]
    KgS,
    LbS,
}
/// Speed units a monitor may log.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SpeedUnit {
    #[default]
    MS,
    KmH,
    Mph,
}
/// Width (and distance) units a monitor may log.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum WidthUnit {
    #[default]
    M,
    Ft,
    In,
}
/// Timestamp formats a monitor may log.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum TimeFormat {
    /// `2026-09-14T10:22:05Z`, `2026-09-14 10:22:05.5`, optional offset `+02:00`.
    #[default]
    Iso8601,
    /// Seconds since 1970-01-01 UTC.
    UnixS,
    /// `10:22:05` or `10:22:05.5` (UTC), with the date in the column `time.date`.
    TimeOfDay,
    /// No time column (a yield-point export whose records were averaged or resampled by
    /// other software): records are taken in file order, speed is unknown, and the rules
    /// timed in seconds are skipped and listed.
    None,
}

/// Order of day, month and year in a date column (`18/09/2026`, `09/18/2026`, `2026-09-18`).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DateOrder {
    Dmy,
    Mdy,
    Ymd,
}

/// A mapped column with its unit, or (where allowed) a fixed value in that unit for an
/// export that lacks the column.
#[derive(Clone, Debug, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Mapped<U> {
    #[serde(default)]
    pub name: String,
    pub unit: U,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub value: Option<f64>,
}

/// Units of a yield column.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum YieldColumnUnit {
    #[default]
    THa,
    KgHa,
    /// Quintals (100 kg) per hectare.
    QHa,
    /// Bushels of the trial's crop per acre.
    BuAc,
    /// Pounds per acre.
    LbAc,
}

impl YieldColumnUnit {
    /// kg/ha in one unit (bushels need the crop's bushel weight, lb).
    pub fn kg_ha_per_unit(self, bushel_lb: f64) -> f64 {
        use crate::crop::LB_AC_IN_KG_HA;
        match self {
            YieldColumnUnit::THa => 1000.0,
            YieldColumnUnit::KgHa => 1.0,
            YieldColumnUnit::QHa => 100.0,
            YieldColumnUnit::BuAc => LB_AC_IN_KG_HA * bushel_lb,
            YieldColumnUnit::LbAc => LB_AC_IN_KG_HA,
        }
    }
}

/// Moisture basis of a yield column.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum YieldBasis {
    /// At the crop's standard moisture (dry yield as farm software reports it).
    #[default]
    Dry,
    /// At harvest moisture: standardised with the moisture column.
    Wet,
}

/// A yield column of a yield-point export.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct YieldColumn {
    pub name: String,
    pub unit: YieldColumnUnit,
    pub basis: YieldBasis,
}

/// `[columns]`: how the monitor export names and scales its columns.
#[derive(Clone, Debug, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ColumnsSection {
    /// Field delimiter, one character.
    pub delimiter: String,
    /// Decimal separator of numbers: "." or "," (with another delimiter, e.g. ";").
    #[serde(default = "dot", skip_serializing_if = "is_dot")]
    pub decimal: String,
    pub time: TimeColumn,
    /// Longitude column (or easting, `x`, with `inputs.crs`).
    #[serde(alias = "x")]
    pub longitude: String,
    /// Latitude column (or northing, `y`, with `inputs.crs`).
    #[serde(alias = "y")]
    pub latitude: String,
    /// Mass flow; left out for a yield-point export (`yield`).
    #[serde(default)]
    pub flow: Mapped<FlowUnit>,
    /// A yield-point export's yield column, instead of `flow`.
    #[serde(default, rename = "yield", skip_serializing_if = "Option::is_none")]
    pub yield_col: Option<YieldColumn>,
    /// Ground speed; may be left out when `distance` is given.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub speed: Option<Mapped<SpeedUnit>>,
    /// Distance travelled during each record (m, ft or in): speed = distance / interval.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub distance: Option<Mapped<WidthUnit>>,
    /// Column of each record's interval in seconds (with `distance`); left empty, the
    /// interval is the time since the previous record.
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub interval: String,
    /// Swath width column, or `value` for an export without one (a yield-point export may
    /// have neither).
    #[serde(default)]
    pub width: Mapped<WidthUnit>,
    /// Grain moisture column, in percent (wet basis); a yield-point export with yields at
    /// standard moisture may have none.
    #[serde(default)]
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
    /// Optional, for a rate trial: the input's rate the machine logged where each record
    /// was cut (as-applied; an empty cell = none there), with its unit. Plots summarise it
    /// per plot (`3-plots/applied_rates.csv`) and adjust sets it against each treatment's
    /// target rate.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub applied_rate: Option<AppliedRateColumn>,
    /// A strip trial without plot polygons: the column naming the treatment applied where
    /// each record was cut (as-applied or prescription label; empty text = none). The plots
    /// and the design are then built from the labels ([`crate::ingest::strips`]).
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub treatment: String,
    /// With `treatment`: a column naming each record's strip (else strips are found from
    /// where the labelled records lie).
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub strip: String,
    /// With `treatment`: a column naming each record's replicate (else replicates are formed
    /// from neighbouring strips).
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub replicate: String,
}

/// The as-applied rate column of a monitor export and its unit.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AppliedRateColumn {
    pub name: String,
    pub unit: crate::crop::RateUnit,
}

impl AppliedRateColumn {
    /// Factor from the column's unit to base units (kg, l or seeds) per hectare.
    pub fn to_per_ha(&self) -> f64 {
        self.unit.per_ha()
    }
}

/// Time column and its format.
#[derive(Clone, Debug, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TimeColumn {
    #[serde(default)]
    pub name: String,
    pub format: TimeFormat,
    /// With `format = "time_of_day"`: the date column and its order.
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub date: String,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub date_order: Option<DateOrder>,
}

fn dot() -> String {
    ".".into()
}

fn is_dot(s: &str) -> bool {
    s == "."
}

/// `[ingest]` settings.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct IngestSettings {
    pub utm_zone: i64,
    pub hemisphere: Hemisphere,
    /// Plots built from treatment labels: each strip piece is cut into plots about this
    /// long along travel; 0 = each piece is one plot.
    pub strip_plot_length_m: f64,
    /// Plots built from treatment labels: a strip piece with fewer labelled records than
    /// this is not a plot (a stray label), with a warning.
    pub strip_min_records: u64,
    /// Refuse a trial whose exports would need more than this share of the machine's memory
    /// ([`crate::ingest::memory`]).
    pub max_memory_share: f64,
}

/// What ingest reads of a checked trial configuration: `[inputs]`, `[columns]`, `[ingest]`
/// and the grid layouts, with the few values of other sections that ingest checks its inputs
/// against. Built by `TrialConfig::for_ingest` after the whole configuration is validated,
/// so ingest depends on nothing but its own settings.
#[derive(Clone, Debug)]
pub struct IngestConfig {
    pub inputs: InputsSection,
    pub columns: ColumnsSection,
    /// Whether the trial gives a `[columns]` section (see `formats::columns_needed`).
    pub columns_given: bool,
    pub ingest: IngestSettings,
    /// `[[layout]]`: plot grids, one per field, for trials without a boundary file.
    pub layout: Vec<super::grid::GridLayout>,
    /// `trial.check`: the check treatment the design must contain.
    pub check: String,
    /// `plots.design_mismatch`: how design and geometry that disagree are taken.
    pub design_mismatch: DesignMismatch,
    /// `plots.far_m`: `check` warns of exports this far from every plot.
    pub far_m: f64,
    /// `adjust.row_spacing_m` and `adjust.range_spacing_m`: a plot table's row and range
    /// numbers to metres when it has no geometry.
    pub row_spacing_m: f64,
    pub range_spacing_m: f64,
    /// The trial's crop, or why it is not known (`check` lists that problem).
    pub crop: Result<crate::crop::Crop, String>,
}

/// Whether the plots and design are built from treatment labels on the records
/// (`columns.treatment`, or prescription polygons) rather than read.
pub fn plots_from_labels(inputs: &InputsSection, columns: &ColumnsSection) -> bool {
    !columns.treatment.is_empty() || !inputs.prescription.is_empty()
}

impl IngestConfig {
    /// Whether the plots and design are built from treatment labels on the records
    /// (`columns.treatment`, or prescription polygons) rather than read.
    pub fn plots_from_labels(&self) -> bool {
        plots_from_labels(&self.inputs, &self.columns)
    }

    /// `inputs.plots` read as plot polygons (in WGS 84), as the trial names them.
    pub fn read_plot_input(
        &self,
        base: &std::path::Path,
    ) -> Result<Vec<crate::table::PlotPolygon>, super::IngestError> {
        let i = &self.inputs;
        super::geojson::read_plot_input(
            &base.join(&i.plots),
            &i.plots,
            &i.plot_id_property,
            &i.crs,
            &i.layer,
        )
    }

    /// The crop's bushel weight (lb), NaN when the crop is not known.
    pub fn bushel_lb(&self) -> f64 {
        self.crop.as_ref().map(|c| c.bushel_lb).unwrap_or(f64::NAN)
    }

    /// The crop's standard moisture (%), NaN when the crop is not known.
    pub fn standard_moisture_pct(&self) -> f64 {
        self.crop
            .as_ref()
            .map(|c| c.standard_moisture_pct)
            .unwrap_or(f64::NAN)
    }
}

impl IngestSettings {
    /// `ingest.max_memory_share` of `config/defaults.toml` (for intake, which reads exports
    /// before it knows their trial).
    pub fn default_share() -> f64 {
        crate::defaults::section::<IngestSettings>("ingest").max_memory_share
    }

    /// Range problems, each naming its key.
    pub fn problems(&self, p: &mut Vec<String>) {
        if !(0..=60).contains(&self.utm_zone) {
            p.push(format!(
                "ingest.utm_zone must be 0 (automatic) or a zone 1-60 (got {})",
                self.utm_zone
            ));
        }
        let l = self.strip_plot_length_m;
        if !(l == 0.0 || (l >= 5.0 && l.is_finite())) {
            p.push(format!(
                "ingest.strip_plot_length_m must be 0 (whole strips) or at least 5 m (got {l})"
            ));
        }
        if !(self.max_memory_share > 0.0 && self.max_memory_share <= 1.0) {
            p.push(format!(
                "ingest.max_memory_share must be above 0 and at most 1 (got {})",
                self.max_memory_share
            ));
        }
        if self.strip_min_records < 3 {
            p.push(format!(
                "ingest.strip_min_records must be at least 3 (got {})",
                self.strip_min_records
            ));
        }
    }
}

impl ColumnsSection {
    /// Problems with the mapping, each naming its key.
    pub fn problems(&self, p: &mut Vec<String>) {
        if self.delimiter.chars().count() != 1 {
            p.push(format!(
                "columns.delimiter must be one character (got {:?})",
                self.delimiter
            ));
        }
        if self.decimal != "." && self.decimal != "," {
            p.push(format!(
                "columns.decimal must be \".\" or \",\" (got {:?})",
                self.decimal
            ));
        } else if self.decimal == self.delimiter {
            p.push(format!(
                "columns.decimal and columns.delimiter are both {:?}; a decimal comma needs another delimiter, e.g. \";\"",
                self.decimal
            ));
        }
        let points = self.yield_col.is_some();
        match (self.flow.name.is_empty() && self.flow.value.is_none(), points) {
            (true, false) => p.push(
                "[columns] needs flow (a mass-flow column) or yield (a yield-point export's yield column)".into(),
            ),
            (false, true) => p.push("[columns] has both flow and yield; give one".into()),
            _ => {}
        }
        if let Some(y) = &self.yield_col {
            if y.name.is_empty() {
                p.push("columns.yield needs a column name".into());
            }
            if y.basis == YieldBasis::Wet && self.moisture.is_empty() {
                p.push("columns.yield with basis = \"wet\" needs the moisture column to standardise it".into());
            }
        } else if self.moisture.is_empty() {
            p.push("columns.moisture needs a column name".into());
        }
        match (&self.speed, &self.distance) {
            // Neither: speed from positions and times (a flow export needs times for it).
            (None, None) if points || self.time.format != TimeFormat::None => {}
            (None, None) => p.push(
                "[columns] needs speed (a speed column) or distance (distance travelled per record), or times to derive speed from"
                    .into(),
            ),
            (Some(_), Some(_)) => p.push(
                "[columns] has both speed and distance; give one (speed is read, or computed from distance / interval)".into(),
            ),
            _ => {}
        }
        if self.treatment.is_empty() && !(self.strip.is_empty() && self.replicate.is_empty()) {
            p.push("columns.strip and columns.replicate go with columns.treatment (plots built from treatment labels)".into());
        }
        if self
            .applied_rate
            .as_ref()
            .is_some_and(|a| a.name.is_empty())
        {
            p.push("columns.applied_rate needs a column name".into());
        }
        if !self.interval.is_empty() && self.distance.is_none() {
            p.push("columns.interval is only read with columns.distance".into());
        }
        // Each mapped quantity: a column, or (where a fixed value may stand in) a value.
        let mapped: [(&str, Option<(&str, Option<f64>)>, bool); 4] = [
            (
                "flow",
                (!points).then_some((self.flow.name.as_str(), self.flow.value)),
                false,
            ),
            (
                "speed",
                self.speed.as_ref().map(|m| (m.name.as_str(), m.value)),
                false,
            ),
            (
                "distance",
                self.distance.as_ref().map(|m| (m.name.as_str(), m.value)),
                true,
            ),
            (
                "width",
                (!points || !self.width.name.is_empty() || self.width.value.is_some())
                    .then_some((self.width.name.as_str(), self.width.value)),
                true,
            ),
        ];
        for (key, m, fixed_ok) in mapped {
            let Some((name, value)) = m else { continue };
            match (name.is_empty(), value) {
                (true, None) => p.push(format!(
                    "columns.{key} needs a column name{}",
                    if fixed_ok { " or a fixed value" } else { "" }
                )),
                (false, Some(_)) => p.push(format!(
                    "columns.{key} has both a column name and a value; give one"
                )),
                (true, Some(v)) if !fixed_ok => p.push(format!(
                    "columns.{key} must be a column (a fixed value {v} is not accepted for it)"
                )),
                (true, Some(v)) if !(v > 0.0 && v.is_finite()) => {
                    p.push(format!("columns.{key}.value must be above 0 (got {v})"))
                }
                _ => {}
            }
        }
        let t = &self.time;
        match t.format {
            TimeFormat::TimeOfDay => {
                if t.date.is_empty() || t.date_order.is_none() {
                    p.push("columns.time with format = \"time_of_day\" needs date (the date column) and date_order (\"dmy\", \"mdy\" or \"ymd\")".into());
                }
            }
            TimeFormat::None => {
                if !t.name.is_empty() || !t.date.is_empty() || t.date_order.is_some() {
                    p.push(format!(
                        "columns.time with format = \"none\" takes no column (got name {:?}); leave name, date and date_order out",
                        t.name
                    ));
                }
                if self.yield_col.is_none() {
                    p.push("columns.time.format = \"none\" is for yield-point exports (columns.yield): mass flow needs each record's time for the delays and the speed".into());
                }
            }
            _ => {
                if t.name.is_empty() {
                    p.push("columns.time needs name (the time column), or format = \"none\" for a yield-point export without times".into());
                }
                if !t.date.is_empty() || t.date_order.is_some() {
                    p.push(
                        "columns.time.date and date_order go with format = \"time_of_day\"".into(),
                    );
                }
            }
        }
    }
}

crate::choice! {
    /// `plots.design_mismatch`: what to do when design and geometry disagree (ingest matches
    /// them; the key sits with the plots settings).
    pub enum DesignMismatch {
        /// Stop, listing every id.
        Error = "error",
        /// Drop the unmatched plots with a warning.
        Warn = "warn",
    }
}
