//! ISO 11783-10 task data: `TASKDATA.XML` with its binary time logs, in a folder or a zip
//! archive (`.zip` holding a `TASKDATA.XML`), as task controllers and farm software exchange
//! it. The export is the `TASKDATA.XML` file (or the archive); every time log (`TLG`) of
//! every task (`TSK`), in document order, is read: its header (`TLGnnnnn.XML`: a `TIM` with a
//! `PTN` and `DLV`s; an attribute present and empty means "in each binary record") and its
//! records (`TLGnnnnn.BIN`: time as ms since midnight and days since 1980-01-01, the
//! position fields the header leaves empty, then the number of values and (DLV index, value)
//! pairs; little-endian). Task controllers log a value when it changes, so each value holds
//! until the next one (as isoxml-js's filled time logs do); a record before the first value
//! of the yield quantity is a rejection.
//!
//! Process data by DDI (ISO 11783-11 data dictionary; scales as isoxml 1.11.2 lists them):
//! 0x0057 mass per time yield, mg/s (the mass flow); without it 0x0054 mass per area yield,
//! mg/m2, wet, standardised with the moisture, or 0x00B5 dry mass per area yield, mg/m2, at
//! 0 % moisture (from memory of the dictionary's definition; standardised to the crop's
//! moisture); 0x0063 crop moisture, ppm; 0x0043 actual working width, mm; 0x018D actual
//! speed, mm/s; 0x008D actual work state (0 off, 1 on). A log without a speed gets it from
//! successive positions and times; one without a working width takes `columns.width.value`
//! (else the rules that need a width are skipped). Where several device elements log
//! one DDI the first in the header is read, and `check` says which. Positions are WGS 84
//! degrees (1e-7 units); a record with north = east = 0 or position status 0 (no fix) is
//! `no_position`. Time is read as UTC. The PTN's HDOP and status go to the optional HDOP and
//! fix-quality fields (the status codes 0-5 follow the GGA fix qualities).
//!
//! A rejection's row is the record's place in its time log (from 1) and its file is
//! `<export>#TLGnnnnn`.
//!
//! Memory is bounded before anything is inflated: a zip member that would inflate to more
//! than [`MAX_MEMBER_BYTES`] (declared or while reading), that inflates more than
//! [`MAX_INFLATION`] times its compressed size, or members that together exceed
//! [`MAX_TOTAL_BYTES`] make the archive unusable, with an error naming the member (an archive
//! built to exhaust memory, or a log that is not one); a file of a task-data folder larger
//! than [`MAX_MEMBER_BYTES`] likewise. Real binary time logs deflate 2-10 times (position and
//! value fields change from record to record; measured on the simulator's logs and the
//! forage-harvester logs of the real-data tests, not a published figure).

mod files;
mod write;
use files::{log_size, Files, MIN_RECORD_BYTES};
pub use files::{MAX_INFLATION, MAX_MEMBER_BYTES, MAX_TOTAL_BYTES};
pub use write::write_set;

use super::{reject, ExportRead, MonitorFormat, RawPoint};
use crate::ingest::settings::IngestConfig;
use crate::ingest::IngestError;
use std::collections::BTreeMap;
use std::path::Path;

/// The task-data reader.
pub struct TaskData;

/// A task-data export read one time log at a time: `…/TASKDATA.XML#TLG00001` (or
/// `….zip#TLG00001`) is that log of that set; each is an export of its own, as each task is
/// its own run of the machine. Splits such a path into the file and the log.
pub fn split(path: &Path) -> (std::path::PathBuf, Option<String>) {
    let s = path.to_string_lossy();
    match s.rsplit_once('#') {
        Some((file, log)) if log.to_ascii_uppercase().starts_with("TLG") => {
            (std::path::PathBuf::from(file), Some(log.to_string()))
        }
        _ => (path.to_path_buf(), None),
    }
}

/// The time logs of a task-data export, in document order.
pub fn time_logs(path: &Path) -> Result<Vec<String>, String> {
    let files = Files::open(&split(path).0)?;
    let (logs, _) = tasks(&text(files.get("TASKDATA.XML")?, "TASKDATA.XML")?)?;
    Ok(logs.into_iter().map(|l| l.file).collect())
}

/// Seconds from 1970-01-01 to 1980-01-01.
const EPOCH_1980_S: f64 = 315_532_800.0;

/// The DDIs read, with what they become.
const FLOW: u16 = 0x0057;
const WET_YIELD: u16 = 0x0054;
const DRY_YIELD: u16 = 0x00B5;
const MOISTURE: u16 = 0x0063;
const WIDTH: u16 = 0x0043;
const SPEED: u16 = 0x018D;
const WORK_STATE: u16 = 0x008D;

/// A time log whose first this many records are all without a time or a position is refused
/// there (an hour of records at one a second; a real log gets its first fix in minutes).
const MAX_LEADING_UNUSABLE: u64 = 3600;

fn text(bytes: &[u8], what: &str) -> Result<String, String> {
    String::from_utf8(bytes.to_vec()).map_err(|_| format!("{what} is not UTF-8 text"))
}

/// A time log named by a task.
struct LogRef {
    task: String,
    file: String,
}

/// The time logs of every task, in document order; device elements' designators by id.
fn tasks(xml: &str) -> Result<(Vec<LogRef>, BTreeMap<String, String>), String> {
    let doc = roxmltree::Document::parse(xml).map_err(|e| format!("TASKDATA.XML: {e}"))?;
    let root = doc.root_element();
    if root.tag_name().name() != "ISO11783_TaskData" {
        return Err(format!(
            "TASKDATA.XML: root element {}, expected ISO11783_TaskData",
            root.tag_name().name()
        ));
    }
    let mut logs = Vec::new();
    let mut dets = BTreeMap::new();
    for n in root.descendants().filter(|n| n.is_element()) {
        match n.tag_name().name() {
            "TSK" => {
                let task = n
                    .attribute("B")
                    .or(n.attribute("A"))
                    .unwrap_or("")
                    .to_string();
                for t in n.children().filter(|c| c.has_tag_name("TLG")) {
                    let file = t.attribute("A").ok_or_else(|| {
                        format!("TASKDATA.XML: task {task}: a TLG without A (file name)")
                    })?;
                    logs.push(LogRef {
                        task: task.clone(),
                        file: file.to_string(),
                    });
                }
            }
            "DET" => {
                if let Some(id) = n.attribute("A") {
                    dets.insert(id.to_string(), n.attribute("D").unwrap_or("").to_string());
                }
            }
            _ => {}
        }
    }
    Ok((logs, dets))
}

/// How a position field is given: absent, fixed in the header, or in each record.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Field {
    Absent,
    Fixed(f64),
    InRecord,
}

/// A time log's header.
struct Header {
    /// north, east, up, status, PDOP, HDOP, satellites, GPS time, GPS date.
    ptn: [Field; 9],
    /// (DDI, device element) of each data log value.
    dlv: Vec<(u16, String)>,
}

const PTN_ATTRS: [&str; 9] = ["A", "B", "C", "D", "E", "F", "G", "H", "I"];
/// Bytes of each position field in a record.
const PTN_BYTES: [usize; 9] = [4, 4, 4, 1, 2, 2, 1, 4, 2];

fn header(xml: &str, file: &str) -> Result<Header, String> {
    let doc = roxmltree::Document::parse(xml).map_err(|e| format!("{file}: {e}"))?;
    let tim = doc
        .descendants()
        .find(|n| n.has_tag_name("TIM"))
        .ok_or_else(|| format!("{file}: no TIM element"))?;
    if tim.attribute("A") != Some("") {
        return Err(format!(
            "{file}: TIM A (start) must be empty, as in a binary time log whose records carry their times"
        ));
    }
    let mut ptn = [Field::Absent; 9];
    if let Some(p) = tim.children().find(|n| n.has_tag_name("PTN")) {
        for (k, a) in PTN_ATTRS.iter().enumerate() {
            ptn[k] =
                match p.attribute(*a) {
                    None => Field::Absent,
                    Some("") => Field::InRecord,
                    Some(v) => Field::Fixed(v.parse().map_err(|_| {
                        format!("{file}: PTN {a} = {v:?}, expected a number or empty")
                    })?),
                };
        }
    }
    let mut dlv = Vec::new();
    for d in tim.children().filter(|n| n.has_tag_name("DLV")) {
        let ddi = d.attribute("A").unwrap_or("");
        let ddi = u16::from_str_radix(ddi, 16)
            .map_err(|_| format!("{file}: DLV A = {ddi:?}, expected a DDI in hexadecimal"))?;
        if d.attribute("B") != Some("") {
            return Err(format!(
                "{file}: DLV {ddi:04X}: B (value) must be empty (the value in each record)"
            ));
        }
        dlv.push((ddi, d.attribute("C").unwrap_or("").to_string()));
    }
    Ok(Header { ptn, dlv })
}

/// Which data log value feeds each quantity (the first with its DDI).
struct Picks {
    flow: Option<usize>,
    wet: Option<usize>,
    dry: Option<usize>,
    moisture: Option<usize>,
    width: Option<usize>,
    speed: Option<usize>,
    state: Option<usize>,
}

impl Picks {
    fn of(h: &Header) -> Picks {
        let f = |ddi: u16| h.dlv.iter().position(|d| d.0 == ddi);
        Picks {
            flow: f(FLOW),
            wet: f(WET_YIELD),
            dry: f(DRY_YIELD),
            moisture: f(MOISTURE),
            width: f(WIDTH),
            speed: f(SPEED),
            state: f(WORK_STATE),
        }
    }
    /// The quantity yields come from, or why none can.
    fn amount(&self, file: &str) -> Result<usize, String> {
        self.flow.or(self.wet).or(self.dry).ok_or_else(|| {
            format!("{file}: logs no mass per time yield (DDI 0057), mass per area yield (0054) or dry mass per area yield (00B5)")
        })
    }
}

/// One time log read to points (row = record number from 1).
#[allow(clippy::too_many_arguments)]
fn read_log(
    h: &Header,
    bin: &[u8],
    source: &str,
    file_idx: u32,
    standard: f64,
    fixed_width_m: f64,
    out: &mut ExportRead,
) -> Result<(), String> {
    let picks = Picks::of(h);
    let first_point = out.points.len();
    let amount = picks.amount(source)?;
    let mut last: Vec<Option<i32>> = vec![None; h.dlv.len()];
    // Moisture logged as 0 is no reading: the last reading before it stands (counted).
    let mut zeros = super::ZeroMoisture {
        source: source.to_string(),
        ..Default::default()
    };
    let mut last_moisture = f64::NAN;
    let mut at = 0usize;
    let mut row = 0u64;
    while at < bin.len() {
        if row >= MAX_LEADING_UNUSABLE && out.points.len() == first_point {
            return Err(format!(
                "{source}: none of its first {row} records has both a time and a position (all at 1980-01-01 00:00 or at 0,0 / without a fix: a log of zeros, or not a time log); not read further"
            ));
        }
        row += 1;
        let left = bin.len() - at;
        let cut = |row: u64| {
            reject(
                source,
                row,
                "unreadable_row",
                "",
                &format!("{left} bytes left"),
                "a whole time-log record (the file ends inside one)",
            )
        };
        let (ms, days, pos) = match next_record(h, bin, &mut at, &mut last) {
            Record::Cut => {
                out.rejections.push(cut(row));
                out.rows += 1;
                break;
            }
            Record::BadIndex(idx) => {
                out.rows += 1;
                // The rest of the log cannot be trusted to line up either.
                out.rejections.push(reject(
                    source,
                    row,
                    "unreadable_row",
                    "DLV",
                    &idx.to_string(),
                    &format!("a data log value index below {}", h.dlv.len()),
                ));
                break;
            }
            Record::Whole { ms, days, pos } => {
                out.rows += 1;
                (ms, days, pos)
            }
        };
        // Positions: the header's fixed values are in degrees, the records' in 1e-7.
        let deg = |k: usize| match h.ptn[k] {
            Field::InRecord => pos[k] * 1e-7,
            _ => pos[k],
        };
        let (lat, lon) = (deg(0), deg(1));
        let status = pos[3];
        if ms == 0 && days == 0 {
            out.rejections.push(reject(
                source,
                row,
                "no_time",
                "TIM",
                "1980-01-01T00:00:00Z",
                "a time after the time log's zero",
            ));
            continue;
        }
        if !(lat.is_finite() && lon.is_finite()) || (lat == 0.0 && lon == 0.0) || status == 0.0 {
            out.rejections.push(reject(
                source,
                row,
                "no_position",
                "PTN",
                &format!("{lat}, {lon}, status {status}"),
                "a GPS fix",
            ));
            continue;
        }
        let value = |p: Option<usize>| p.and_then(|i| last[i]).map(f64::from);
        let Some(raw) = value(Some(amount)) else {
            out.rejections.push(reject(
                source,
                row,
                "missing_value",
                &format!("DDI {:04X}", h.dlv[amount].0),
                "",
                "a yield value logged at or before this record",
            ));
            continue;
        };
        let moisture = match value(picks.moisture) {
            Some(v) => zeros.take(v * 1e-4, &mut last_moisture),
            None => f64::NAN,
        };
        let (flow, given) = if Some(amount) == picks.flow {
            (raw * 1e-6, f64::NAN)
        } else if Some(amount) == picks.wet {
            // mg/m2 -> kg/ha is x 0.01; wet, to standard moisture.
            let kg = raw * 0.01;
            (
                f64::NAN,
                crate::crop::to_standard_moisture(kg, moisture.min(99.0), standard),
            )
        } else {
            (
                f64::NAN,
                crate::crop::to_standard_moisture(raw * 0.01, 0.0, standard),
            )
        };
        let hdop = pos[5] / 10.0;
        let state = value(picks.state).map_or(f64::NAN, |v| match v as i32 {
            0 => 0.0,
            1 => 1.0,
            _ => f64::NAN,
        });
        out.points.push(RawPoint {
            file: file_idx,
            row,
            time_s: EPOCH_1980_S + days as f64 * 86_400.0 + ms as f64 / 1000.0,
            lon,
            lat,
            flow_kg_s: flow,
            speed_m_s: value(picks.speed).map_or(f64::NAN, |v| v * 1e-3),
            width_m: value(picks.width).map_or(fixed_width_m, |v| v * 1e-3),
            moisture_pct: moisture,
            optional: [state, hdop, status, f64::NAN],
            yield_kg_ha: given,
            label: 0,
        });
    }
    if picks.speed.is_none() {
        super::speed_from_positions(&mut out.points[first_point..]);
    }
    out.zero_moisture.push(zeros);
    Ok(())
}

/// One time-log record as read.
enum Record {
    /// The file ends inside the record.
    Cut,
    /// A data log value index the header does not have.
    BadIndex(usize),
    /// Time (milliseconds of the day, days since 1980-01-01) and the nine position fields.
    Whole { ms: u32, days: u16, pos: [f64; 9] },
}

/// Read the record at `at` (moved past it); the data log values it carries update `last`.
fn next_record(h: &Header, bin: &[u8], at: &mut usize, last: &mut [Option<i32>]) -> Record {
    let take = |at: &mut usize, n: usize| -> Option<&[u8]> {
        let s = bin.get(*at..*at + n)?;
        *at += n;
        Some(s)
    };
    let Some(t) = take(at, 6) else {
        return Record::Cut;
    };
    let ms = u32::from_le_bytes([t[0], t[1], t[2], t[3]]);
    let days = u16::from_le_bytes([t[4], t[5]]);
    let mut pos = [f64::NAN; 9];
    for k in 0..9 {
        pos[k] = match h.ptn[k] {
            Field::Absent => f64::NAN,
            Field::Fixed(v) => v,
            Field::InRecord => match take(at, PTN_BYTES[k]) {
                None => return Record::Cut,
                Some(b) => match PTN_BYTES[k] {
                    4 if k < 3 => i32::from_le_bytes([b[0], b[1], b[2], b[3]]) as f64,
                    4 => u32::from_le_bytes([b[0], b[1], b[2], b[3]]) as f64,
                    2 => u16::from_le_bytes([b[0], b[1]]) as f64,
                    _ => b[0] as f64,
                },
            },
        };
    }
    let Some(count) = take(at, 1) else {
        return Record::Cut;
    };
    let mut bad_index = None;
    for _ in 0..count[0] {
        let Some(v) = take(at, 5) else {
            return Record::Cut;
        };
        let idx = v[0] as usize;
        let value = i32::from_le_bytes([v[1], v[2], v[3], v[4]]);
        match last.get_mut(idx) {
            Some(slot) => *slot = Some(value),
            None => bad_index = Some(idx),
        }
    }
    match bad_index {
        Some(idx) => Record::BadIndex(idx),
        None => Record::Whole { ms, days, pos },
    }
}

/// The swath a log without a working width falls back to: `columns.width.value` (in
/// `columns.width.unit`), else NaN (and the rules that need a width are skipped).
fn fixed_width_m(cfg: &IngestConfig) -> f64 {
    let w = &cfg.columns.width;
    w.value.unwrap_or(f64::NAN) * super::column_map::width_factor(w.unit)
}

/// The whole task data read (records = points + rejections), or why it cannot be.
fn read_all(cfg: &IngestConfig, path: &Path, name: &str, file: u32) -> Result<ExportRead, String> {
    let (path, only) = split(path);
    let files = Files::open(&path)?;
    let (mut logs, _) = tasks(&text(files.get("TASKDATA.XML")?, "TASKDATA.XML")?)?;
    if let Some(o) = &only {
        logs.retain(|l| l.file.eq_ignore_ascii_case(o));
        if logs.is_empty() {
            return Err(format!("TASKDATA.XML names no time log {o}"));
        }
    }
    if logs.is_empty() {
        return Err("TASKDATA.XML: no task has a time log (TLG)".into());
    }
    let standard = cfg.standard_moisture_pct();
    let fixed_width = fixed_width_m(cfg);
    let mut out = ExportRead::default();
    for l in &logs {
        let h = header(
            &text(files.get(&format!("{}.XML", l.file))?, &l.file)?,
            &format!("{}.XML", l.file),
        )?;
        let bin = files.get(&format!("{}.BIN", l.file))?;
        let source = if only.is_some() {
            name.to_string()
        } else {
            format!("{name}#{}", l.file)
        };
        read_log(&h, bin, &source, file, standard, fixed_width, &mut out)?;
    }
    if out.rows == 0 {
        return Err("the time logs hold no record".into());
    }
    Ok(out)
}

/// What each time log maps, in words.
fn mapping(cfg: &IngestConfig, path: &Path) -> Result<Vec<String>, String> {
    let (path, only) = split(path);
    let files = Files::open(&path)?;
    let (logs, dets) = tasks(&text(files.get("TASKDATA.XML")?, "TASKDATA.XML")?)?;
    let mut out = Vec::new();
    for l in logs
        .iter()
        .filter(|l| only.as_ref().is_none_or(|o| l.file.eq_ignore_ascii_case(o)))
    {
        let file = format!("{}.XML", l.file);
        let h = header(&text(files.get(&file)?, &file)?, &file)?;
        files.get(&format!("{}.BIN", l.file))?;
        let p = Picks::of(&h);
        let amount = p.amount(&l.file)?;
        let det = |i: Option<usize>| {
            i.map(|i| {
                let id = &h.dlv[i].1;
                let d = dets.get(id).map(String::as_str).unwrap_or("");
                format!(
                    "{:04X} of {id}{}",
                    h.dlv[i].0,
                    if d.is_empty() {
                        String::new()
                    } else {
                        format!(" ({d})")
                    }
                )
            })
            .unwrap_or_else(|| "not logged".into())
        };
        let what = if Some(amount) == p.flow {
            "mass flow"
        } else if Some(amount) == p.wet {
            "wet yield"
        } else {
            "dry yield"
        };
        let width = match (p.width, fixed_width_m(cfg)) {
            (None, w) if w.is_finite() => format!("not logged: {w} m (columns.width.value)"),
            (i, _) => det(i),
        };
        let speed = match p.speed {
            None => "not logged: from positions and times".to_string(),
            i => det(i),
        };
        out.push(format!(
            "task {:?}, {}: {what} {}, moisture {}, width {width}, speed {speed}, work state {}",
            l.task,
            l.file,
            det(Some(amount)),
            det(p.moisture),
            det(p.state)
        ));
    }
    Ok(out)
}

impl MonitorFormat for TaskData {
    fn name(&self) -> &'static str {
        "iso11783_taskdata"
    }
    fn extensions(&self) -> &'static [&'static str] {
        &["xml", "zip"]
    }
    fn claims(&self, path: &Path) -> bool {
        let path = split(path).0;
        path.file_name()
            .and_then(|n| n.to_str())
            .is_some_and(|n| n.eq_ignore_ascii_case("TASKDATA.XML"))
            || path
                .extension()
                .is_some_and(|x| x.eq_ignore_ascii_case("zip"))
    }
    fn sniff(&self, path: &Path, head: &[u8]) -> bool {
        self.claims(path)
            && (head.starts_with(b"PK\x03\x04")
                || String::from_utf8_lossy(head).contains("ISO11783_TaskData"))
    }
    fn describe(&self, _cfg: &IngestConfig) -> String {
        "ISO 11783-10 task data: every task's binary time logs; mass flow from DDI 0057 (mg/s), else yield from 0054 (wet, mg/m2) or 00B5 (dry, mg/m2); moisture 0063 (ppm), width 0043 (mm), speed 018D (mm/s), work state 008D; positions WGS 84; [columns] is not used".into()
    }
    fn describe_file(&self, cfg: &IngestConfig, path: &Path) -> String {
        match mapping(cfg, path) {
            Ok(m) => format!(
                "ISO 11783-10 task data, {}; positions WGS 84; [columns] is not used",
                m.join("; ")
            ),
            Err(_) => self.describe(cfg),
        }
    }
    fn reads_columns(&self) -> bool {
        false
    }
    fn records_bound(&self, path: &Path) -> Result<u64, String> {
        // A time-log record takes at least MIN_RECORD_BYTES; the log's size as the archive
        // declares it (nothing inflated) or as the folder holds it.
        let (file, log) = split(path);
        let size = match log {
            None => std::fs::metadata(&file).map_err(|e| e.to_string())?.len(),
            Some(log) => log_size(&file, &log)?,
        };
        Ok(size / MIN_RECORD_BYTES + 1)
    }
    fn check(&self, cfg: &IngestConfig, path: &Path, name: &str) -> Result<(), String> {
        mapping(cfg, path)
            .map(|_| ())
            .map_err(|e| format!("{name}: {e}"))
    }
    fn read(
        &self,
        cfg: &IngestConfig,
        path: &Path,
        name: &str,
        file: u32,
    ) -> Result<ExportRead, IngestError> {
        read_all(cfg, path, name, file).map_err(|message| IngestError::Unusable {
            file: name.to_string(),
            message,
        })
    }
    fn positions(
        &self,
        _cfg: &IngestConfig,
        bytes: &[u8],
    ) -> Result<Option<Vec<(f64, f64)>>, String> {
        // Intake takes a zipped set (its time logs travel with it).
        if !bytes.starts_with(b"PK\x03\x04") {
            return Err(
                "unreadable: a task-data set goes into the inbox zipped, with its time logs".into(),
            );
        }
        let files =
            Files::from_zip(std::io::Cursor::new(bytes)).map_err(|e| format!("unreadable: {e}"))?;
        let (logs, _) = tasks(&text(files.get("TASKDATA.XML")?, "TASKDATA.XML")?)?;
        let mut out = ExportRead::default();
        for l in &logs {
            let file = format!("{}.XML", l.file);
            let h = header(&text(files.get(&file)?, &file)?, &file)?;
            let bin = files.get(&format!("{}.BIN", l.file))?;
            read_log(&h, bin, &l.file, 0, f64::NAN, f64::NAN, &mut out)?;
        }
        Ok(Some(out.points.iter().map(|p| (p.lon, p.lat)).collect()))
    }
}

/// The mapping `check` prints for a task-data export.
pub fn describe_file(cfg: &IngestConfig, path: &Path) -> Result<Vec<String>, String> {
    mapping(cfg, path)
}

#[cfg(test)]
mod tests;
