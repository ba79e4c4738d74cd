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

pub(crate) mod column_map;
pub(crate) mod mapped_text;
mod mapping_words;
mod point_layers;
pub mod taskdata;
mod text_records;

use super::IngestError;
use crate::ingest::settings::IngestConfig;
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
    /// Whether this format's exports are read through `[columns]` (task data says not: its
    /// quantities come by DDI); a trial with such an export and no `[columns]` is refused.
    fn reads_columns(&self) -> bool {
        true
    }
    /// Whether this format reads the file, from its path and first bytes.
    fn sniff(&self, path: &Path, head: &[u8]) -> bool;
    /// How this format reads an export under the trial's settings (the mapping, units and
    /// any fixed values standing in for missing columns), in words.
    fn describe(&self, cfg: &IngestConfig) -> String;
    /// How this format reads the export at `path` (by default [`MonitorFormat::describe`];
    /// a format whose mapping comes from the file itself says what it found there).
    fn describe_file(&self, cfg: &IngestConfig, path: &Path) -> String {
        let _ = path;
        self.describe(cfg)
    }
    /// What can be checked without reading every record (readable, header, mapped columns);
    /// `Err` is the problem, naming the file.
    fn check(&self, cfg: &IngestConfig, path: &Path, name: &str) -> Result<(), String>;
    /// Read every record. `name` is the file as the trial names it (for rejection rows and
    /// errors), `file` its index among the trial's exports.
    fn read(
        &self,
        cfg: &IngestConfig,
        path: &Path,
        name: &str,
        file: u32,
    ) -> Result<ExportRead, IngestError>;
    /// An estimate from above of the records the export holds, from its size and first bytes
    /// alone (nothing inflated or parsed), for the memory check before any export is read
    /// ([`crate::ingest::memory`]); `Err` when the file cannot be an export of this format at
    /// all (the reason). By default: delimited text, its size over the mean length of the
    /// lines in its first 64 KiB, plus a quarter.
    fn records_bound(&self, path: &Path) -> Result<u64, String> {
        text_records_bound(path)
    }
    /// WGS84 (lon, lat) of every record that has one, from the export's bytes, for matching
    /// exports to trials. `Ok(None)`: the trial's mapping does not fit this export; `Err`:
    /// the export is cut short or unreadable (the reason).
    fn positions(
        &self,
        cfg: &IngestConfig,
        bytes: &[u8],
    ) -> Result<Option<Vec<(f64, f64)>>, String>;
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
    /// Work state, HDOP, fix quality and the as-applied rate (base units per hectare, see
    /// [`crate::ingest::settings::AppliedRateColumn`]); NaN where the export has no such column (or,
    /// for the rate, an empty cell).
    pub optional: [f64; 4],
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
    /// Records whose moisture read 0 (a sensor's "no reading", never 0 % grain moisture),
    /// per log (`name#TLG…` for task data, else the export): those that took the last
    /// reading before them, and those with none before them (moisture missing).
    pub zero_moisture: Vec<ZeroMoisture>,
}

/// Zero moisture readings of one export or time log ([`ExportRead::zero_moisture`]).
#[derive(Clone, Debug, Default)]
pub struct ZeroMoisture {
    pub source: String,
    pub records: u64,
    pub held: u64,
    pub missing: u64,
}

impl ZeroMoisture {
    /// The warning, or None when no record read 0.
    pub fn warning(&self) -> Option<String> {
        (self.held + self.missing > 0).then(|| {
            format!(
                "{}: {} of its {} records read moisture 0, which is no reading (never 0 %): {} took the last reading before them, {} had none before them and have no moisture",
                self.source,
                self.held + self.missing,
                self.records,
                self.held,
                self.missing
            )
        })
    }

    /// One record's moisture: a reading of 0 becomes the last reading before it (or NaN),
    /// counted; any other reading becomes the last one.
    pub fn take(&mut self, reading: f64, last: &mut f64) -> f64 {
        self.records += 1;
        if reading == 0.0 {
            if last.is_finite() {
                self.held += 1;
            } else {
                self.missing += 1;
            }
            *last
        } else {
            if reading.is_finite() {
                *last = reading;
            }
            reading
        }
    }
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

/// Without a `[columns]` section, the problems of the empty mapping when some export is read
/// through it (named by the first such export), else none.
pub fn columns_needed(
    cfg: &IngestConfig,
    files: &[std::path::PathBuf],
    names: &[String],
) -> Result<(), IngestError> {
    if cfg.columns_given {
        return Ok(());
    }
    let Some(k) = files.iter().position(|p| for_file(p).reads_columns()) else {
        return Ok(());
    };
    let mut p = Vec::new();
    cfg.columns.problems(&mut p);
    Err(IngestError::Unusable {
        file: names[k].clone(),
        message: format!(
            "a {} export is read through [columns], and the trial file has none: {}",
            for_file(&files[k]).name(),
            p.join("; ")
        ),
    })
}

/// [`MonitorFormat::records_bound`] of a delimited text export: its size over the mean
/// length of the lines in its first 64 KiB, plus a quarter. A file without a line end in its
/// first 64 KiB is no delimited export (a header line is never that long): an error, so that
/// such a file is never read whole in search of a line end.
pub fn text_records_bound(path: &Path) -> Result<u64, String> {
    const SAMPLE: usize = 64 << 10;
    let size = std::fs::metadata(path).map_err(|e| e.to_string())?.len();
    let mut head = Vec::with_capacity(SAMPLE);
    std::fs::File::open(path)
        .map_err(|e| e.to_string())?
        .take(SAMPLE as u64)
        .read_to_end(&mut head)
        .map_err(|e| e.to_string())?;
    let lines = head.iter().filter(|&&b| b == b'\n').count() as u64;
    if lines == 0 {
        return if (head.len() as u64) < size || head.len() == SAMPLE {
            Err(format!(
                "no line end in its first {} KiB ({size} bytes in all): not a delimited export; not read",
                SAMPLE >> 10
            ))
        } else {
            Ok(1)
        };
    }
    let per_line = (head.len() as u64 / lines).max(1);
    Ok(size / per_line + size / per_line / 4 + 1)
}

/// Half-width, in records, of the window over which [`speed_from_positions`] measures speed.
const SPEED_HALF_WINDOW: usize = 6;
/// Pairs of records closer than this many records apart are not used for speed: their time
/// apart is too uncertain when stamps are cut to whole seconds.
const SPEED_MIN_PAIR: usize = 3;
/// A window spanning a time gap longer than this (s) is cut at the gap: the machine stopped
/// or turned away; common practice, no source.
const SPEED_MAX_GAP_S: f64 = 5.0;

/// Ground speed (m/s) from positions and times, for an export that logs neither speed nor
/// distance.
///
/// A speed from one step (the distance to the previous record over the time between them)
/// reads GPS jitter and time stamps cut to whole seconds as speed changes: 0.5 m of jitter
/// on a 2 m step is a 25 % change, and a 1 s step stamped as 0 or 2 s is none or half the
/// speed. Each record's speed is therefore the velocity of a robust line through the
/// records within four of it (nine records, cut at a time gap longer than 5 s): per axis the
/// median over pairs of records at least three apart of their displacement over their time
/// apart (Theil 1950; Sen 1968, JASA 63:1379), and the speed the length of that velocity.
/// Position noise enters once per pair over several metres, a stamp's error of up to 1 s
/// over several seconds, and a record thrown off by a GPS jump is in a minority of the pairs,
/// so the jump is not read as speed and the `gps_jump` rule still sees it. A record with no
/// usable pair gets NaN (the speed rules then skip it like a missing reading). Distances on
/// a local sphere of radius 6,371,008.8 m (the mean Earth radius), which at field scale
/// differs from the ellipsoid's by well under 1 %.
pub(crate) fn speed_from_positions(pts: &mut [RawPoint]) {
    const R: f64 = 6_371_008.8;
    let n = pts.len();
    let mut vx = Vec::new();
    let mut vy = Vec::new();
    let mut speeds = vec![f64::NAN; n];
    for (i, speed) in speeds.iter_mut().enumerate() {
        // The window, cut where a time step is longer than the gap limit (equal stamps
        // stay in it but give no pair below).
        let mut a = i;
        while a > 0
            && i - a < SPEED_HALF_WINDOW
            && pts[a].time_s - pts[a - 1].time_s <= SPEED_MAX_GAP_S
        {
            a -= 1;
        }
        let mut b = i;
        while b + 1 < n
            && b - i < SPEED_HALF_WINDOW
            && pts[b + 1].time_s - pts[b].time_s <= SPEED_MAX_GAP_S
        {
            b += 1;
        }
        let cos = pts[i].lat.to_radians().cos();
        vx.clear();
        vy.clear();
        for p in a..=b {
            for q in p + SPEED_MIN_PAIR..=b {
                let dt = pts[q].time_s - pts[p].time_s;
                if dt > 0.0 && dt.is_finite() {
                    vx.push(R * cos * (pts[q].lon - pts[p].lon).to_radians() / dt);
                    vy.push(R * (pts[q].lat - pts[p].lat).to_radians() / dt);
                }
            }
        }
        if !vx.is_empty() {
            *speed = crate::util::median_mut(&mut vx).hypot(crate::util::median_mut(&mut vy));
        }
    }
    for (p, v) in pts.iter_mut().zip(speeds) {
        p.speed_m_s = v;
    }
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

    /// Records of a combine driving north at `v` m/s, logged about once a second (each
    /// interval 1 s +- 0.15 s) with time stamps cut to whole seconds, and positions with
    /// GPS noise of SD `noise_m` in each axis; the true speed drops to 60 % from record
    /// 120 on.
    fn noisy_run(v: f64, noise_m: f64, seed: u64) -> (Vec<RawPoint>, Vec<f64>) {
        let mut rng = crate::util::Rng::new(seed);
        let per_deg = 6_371_008.8f64.to_radians();
        let (mut t, mut y) = (1_000_000.0f64, 0.0f64);
        let mut pts = Vec::new();
        let mut truth = Vec::new();
        for i in 0..240 {
            let speed = if i < 120 { v } else { 0.6 * v };
            let dt = 1.0 + 0.15 * (2.0 * rng.uniform() - 1.0);
            t += dt;
            y += speed * dt;
            truth.push(speed);
            pts.push(RawPoint {
                file: 0,
                row: i + 2,
                time_s: t.floor(),
                lon: -97.8 + noise_m * rng.normal() / (per_deg * 40.6f64.to_radians().cos()),
                lat: 40.6 + (y + noise_m * rng.normal()) / per_deg,
                flow_kg_s: 10.0,
                speed_m_s: f64::NAN,
                width_m: 9.0,
                moisture_pct: 18.0,
                optional: [f64::NAN; 4],
                yield_kg_ha: f64::NAN,
                label: 0,
            });
        }
        (pts, truth)
    }

    #[test]
    fn speed_from_jittery_positions_and_whole_second_stamps_is_steady() {
        // 2.2 m/s with 0.3 m of GPS noise (common for a non-RTK receiver, from memory) and
        // time stamps cut to whole seconds. One-step speeds change by more than 25 % from
        // record to record at about a quarter of the steps (as in real forage-harvester
        // logs); the smoothed speeds almost never do, and stay within 20 % of the truth
        // (half the records within 5 %) away from the real slow-down.
        let (mut pts, truth) = noisy_run(2.2, 0.3, 7);
        let step = |a: &RawPoint, b: &RawPoint| {
            let per_deg = 6_371_008.8f64.to_radians();
            let dy = (b.lat - a.lat) * per_deg;
            let dx = (b.lon - a.lon) * per_deg * 40.6f64.to_radians().cos();
            dx.hypot(dy) / (b.time_s - a.time_s)
        };
        let raw: Vec<f64> = pts.windows(2).map(|w| step(&w[0], &w[1])).collect();
        let jumps = |v: &[f64]| {
            let changes: Vec<bool> = v
                .windows(2)
                .filter(|w| w[0].is_finite() && w[1].is_finite() && w[0] > 0.0)
                .map(|w| (w[1] - w[0]).abs() / w[0] > 0.25)
                .collect();
            changes.iter().filter(|c| **c).count() as f64 / changes.len() as f64
        };
        assert!(jumps(&raw) > 0.15, "one-step speeds: {}", jumps(&raw));
        speed_from_positions(&mut pts);
        let smooth: Vec<f64> = pts.iter().map(|p| p.speed_m_s).collect();
        // The one real change (record 120) is spread over the window's 13 records.
        assert!(jumps(&smooth) < 0.01, "smoothed: {}", jumps(&smooth));
        let mut errors = Vec::new();
        for (i, (s, t)) in smooth.iter().zip(&truth).enumerate() {
            if (112..128).contains(&i) {
                continue;
            }
            assert!((s / t - 1.0).abs() < 0.2, "record {i}: {s} against {t}");
            errors.push((s / t - 1.0).abs());
        }
        assert!(crate::util::median(&errors) < 0.05);
    }

    #[test]
    fn a_zero_moisture_reading_is_no_reading() {
        // 0 is a sensor's "no reading": the last reading before it stands, and a zero before
        // any reading leaves the record without moisture; both are counted and said.
        let mut z = ZeroMoisture {
            source: "a.csv".into(),
            ..Default::default()
        };
        let mut last = f64::NAN;
        let got: Vec<f64> = [0.0, 18.5, 0.0, 0.0, 19.0]
            .iter()
            .map(|&m| z.take(m, &mut last))
            .collect();
        assert!(got[0].is_nan());
        assert_eq!(&got[1..], &[18.5, 18.5, 18.5, 19.0]);
        assert_eq!((z.records, z.held, z.missing), (5, 2, 1));
        assert_eq!(
            z.warning().unwrap(),
            "a.csv: 3 of its 5 records read moisture 0, which is no reading (never 0 %): 2 took the last reading before them, 1 had none before them and have no moisture"
        );
    }

    #[test]
    fn a_gps_jump_is_not_read_as_speed() {
        // One record thrown 25 m sideways: its one-step speeds are 12x the truth; the
        // smoothed speeds of it and its neighbours stay within 15 %.
        let (mut pts, _) = noisy_run(2.0, 0.0, 3);
        let per_deg = 6_371_008.8f64.to_radians();
        pts[60].lon += 25.0 / (per_deg * 40.6f64.to_radians().cos());
        speed_from_positions(&mut pts);
        for p in &pts[55..66] {
            assert!((p.speed_m_s / 2.0 - 1.0).abs() < 0.15, "{}", p.speed_m_s);
        }
        // A stop of 8 s (a gap longer than 5 s) leaves no chord across it.
        let (mut pts, _) = noisy_run(2.0, 0.0, 4);
        for p in &mut pts[100..] {
            p.time_s += 8.0;
        }
        speed_from_positions(&mut pts);
        assert!(pts.iter().all(|p| p.speed_m_s.is_finite()));
        assert!((pts[99].speed_m_s / 2.0 - 1.0).abs() < 0.15);
    }

    #[test]
    fn text_exports_go_to_the_mapped_reader_and_positions_follow_the_mapping() {
        let cfg = TrialConfig::from_toml(TEST_TRIAL, "t.toml", &[])
            .unwrap()
            .for_ingest();
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
