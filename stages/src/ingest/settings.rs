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
    pub hemisphere: Hemisphere,
}

impl IngestSettings {
    /// Range problems, each naming its key.
    pub fn problems(&self, p: &mut Vec<String>) {
        if !(0..=60).contains(&self.utm_zone) {
            p.push(format!(
                "ingest.utm_zone must be 0 (automatic) or a zone 1-60 (got {})",
                self.utm_zone
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
    }
}
