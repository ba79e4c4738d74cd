//! Monitor export formats: one file per format, one list ([`FORMATS`]).
//!
//! A format reads one export into points in SI units with WGS84 lon/lat (projection comes
//! later, for all exports together) plus one rejection row for every record it could not
//! read; a file unusable as a whole is an [`IngestError`] naming it. `ingest`, `check` and
//! `intake` all go through these readers.
//!
//! To add a format: write `formats/<name>.rs` with a unit struct implementing
//! [`MonitorFormat`] and its tests, then add one line to [`FORMATS`]. Formats are sniffed in
//! list order, so a format that recognises its files by content goes before the fallback.

pub(crate) mod mapped_text;
mod mapping_words;
mod point_layers;
pub mod taskdata;

use super::IngestError;
use crate::config::TrialConfig;
use crate::table::Rejection;
use std::io::Read;
use std::path::Path;

/// Every monitor format, in sniffing order (the last is the fallback).
pub static FORMATS: &[&dyn MonitorFormat] = &[
    &taskdata::TaskData,
    &point_layers::ShapefilePoints,
    &point_layers::GeoPackagePoints,
    &mapped_text::MappedText,
];

/// A monitor export format.
pub trait MonitorFormat: Sync {
    /// The format's name, as the summaries print it.
    fn name(&self) -> &'static str;
    /// File-name extensions (lower case, no dot) of this format's exports: a folder named in
    /// `inputs.monitor` contributes every file with one of them.
    fn extensions(&self) -> &'static [&'static str];
    /// Whether a file in a folder named by `inputs.monitor` is one of this format's exports
    /// (by default: its extension is one of [`MonitorFormat::extensions`]).
    fn claims(&self, path: &Path) -> bool {
        path.extension().is_some_and(|x| {
            let x = x.to_string_lossy().to_ascii_lowercase();
            self.extensions().contains(&x.as_str())
        })
    }
    /// Whether this format reads the file, from its path and first bytes.
    fn sniff(&self, path: &Path, head: &[u8]) -> bool;
    /// How this format reads an export under the trial's settings (the mapping, units and
    /// any fixed values standing in for missing columns), in words.
    fn describe(&self, cfg: &TrialConfig) -> String;
    /// How this format reads the export at `path` (by default [`MonitorFormat::describe`];
    /// a format whose mapping comes from the file itself says what it found there).
    fn describe_file(&self, cfg: &TrialConfig, path: &Path) -> String {
        let _ = path;
        self.describe(cfg)
    }
    /// What can be checked without reading every record (readable, header, mapped columns);
    /// `Err` is the problem, naming the file.
    fn check(&self, cfg: &TrialConfig, path: &Path, name: &str) -> Result<(), String>;
    /// Read every record. `name` is the file as the trial names it (for rejection rows and
    /// errors), `file` its index among the trial's exports.
    fn read(
        &self,
        cfg: &TrialConfig,
        path: &Path,
        name: &str,
        file: u32,
    ) -> Result<ExportRead, IngestError>;
    /// WGS84 (lon, lat) of every record that has one, from the export's bytes, for matching
    /// exports to trials. `Ok(None)`: the trial's mapping does not fit this export; `Err`:
    /// the export is cut short or unreadable (the reason).
    fn positions(&self, cfg: &TrialConfig, bytes: &[u8])
        -> Result<Option<Vec<(f64, f64)>>, String>;
}

/// A record read to SI units, before projection.
#[derive(Clone, Debug)]
pub struct RawPoint {
    pub file: u32,
    /// Line number in the source file (the header is line 1).
    pub row: u64,
    /// Seconds since 1970-01-01 UTC.
    pub time_s: f64,
    pub lon: f64,
    pub lat: f64,
    pub flow_kg_s: f64,
    pub speed_m_s: f64,
    pub width_m: f64,
    pub moisture_pct: f64,
    /// Work state, HDOP, fix quality; NaN where the export has no such column.
    pub optional: [f64; 3],
    /// Yield at standard moisture, kg/ha, of a yield-point export; NaN otherwise.
    pub yield_kg_ha: f64,
    /// Index into [`ExportRead::labels`]: the record's treatment, strip and replicate
    /// labels (0: no treatment label, or the export has none).
    pub label: u32,
}

/// One export read: records seen (`rows = points + rejections`), points and rejections.
#[derive(Clone, Debug, Default)]
pub struct ExportRead {
    pub rows: u64,
    pub points: Vec<RawPoint>,
    pub rejections: Vec<Rejection>,
    /// Treatment, strip and replicate label texts of the records (`columns.treatment`,
    /// `strip`, `replicate`); the first entry is "no label". Empty when none are read.
    pub labels: Vec<[String; 3]>,
}

/// The format that reads `path`: the first of [`FORMATS`] whose sniff accepts its first
/// 4 KiB (a file that cannot be opened goes to the fallback, whose reader names the error).
pub fn for_file(path: &Path) -> &'static dyn MonitorFormat {
    let mut head = Vec::new();
    // One time log of a task-data set is read from the set's file.
    if let Ok(f) = std::fs::File::open(taskdata::split(path).0) {
        let _ = f.take(4096).read_to_end(&mut head);
    }
    for_bytes(path, &head)
}

/// The format for a file with these first bytes.
pub fn for_bytes(path: &Path, head: &[u8]) -> &'static dyn MonitorFormat {
    FORMATS
        .iter()
        .copied()
        .find(|f| f.sniff(path, head))
        .unwrap_or(*FORMATS.last().expect("at least one format"))
}

/// Whether some format claims this file (by its extension, or its name).
pub fn is_export(path: &Path) -> bool {
    FORMATS.iter().any(|f| f.claims(path))
}

/// A CSV record the reader could not parse, at `line` of `file`.
pub(crate) fn unreadable_row(file: &str, line: u64, e: &csv::Error) -> Rejection {
    reject(
        file,
        line,
        "unreadable_row",
        "",
        &e.to_string(),
        "a CSV record",
    )
}

/// A rejection row of ingest. Records that cannot be read get no point id (ids go to
/// readable records), so their `id` is `line N` of their file.
pub(crate) fn reject(
    file: &str,
    row: u64,
    rule: &str,
    column: &str,
    value: &str,
    limit: &str,
) -> Rejection {
    Rejection {
        source_file: file.into(),
        source_row: row,
        id: format!("line {row}"),
        rule: rule.into(),
        column: column.into(),
        value: value.to_string(),
        limit: limit.into(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::{TrialConfig, TEST_TRIAL};

    #[test]
    fn text_exports_go_to_the_mapped_reader_and_positions_follow_the_mapping() {
        let cfg = TrialConfig::from_toml(TEST_TRIAL, "t.toml", &[]).unwrap();
        let bytes = b"t,lon,lat,f,s,w,m\n1,-97.5,38.2,1,2,9,15\n2,-97.6,38.3,1,2,9,15\n";
        let f = for_bytes(Path::new("a.csv"), bytes);
        assert_eq!(f.name(), "mapped_text");
        assert!(is_export(Path::new("x/A.CSV")) && !is_export(Path::new("x/a.json")));
        assert_eq!(
            f.positions(&cfg, bytes).unwrap(),
            Some(vec![(-97.5, 38.2), (-97.6, 38.3)])
        );
        // Another trial's mapping does not fit; a last record cut short is an error.
        assert_eq!(f.positions(&cfg, b"a,b\n1,2\n").unwrap(), None);
        let cut = b"t,lon,lat,f,s,w,m\n1,-97.5,38.2,1,2,9,15\n2,-97.6\n";
        let e = f.positions(&cfg, cut).unwrap_err();
        assert_eq!(e, "partial: the last record has 2 fields, the header 7");
    }
}
