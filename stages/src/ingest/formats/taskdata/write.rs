//! The task-data writer `plotsieve simulate --form taskdata` uses: a set of text-form
//! records as ISO 11783-10 (TASKDATA.XML, one task and binary time log per field).

use super::*;

/// Writes a task-data set into the folder `dir` (created; it must not exist): one task per
/// `(designator, csv)`, each with one time log made from a point table in the simulator's
/// text form (`time_utc`, `lon_deg`, `lat_deg`, `mass_flow_lb_s`, `hdop`, and where present
/// `speed_mph`, `swath_ft`, `moisture_pct`, `header_state`): mass flow as DDI 0057 (mg/s), moisture 0063
/// (ppm), speed 018D (mm/s), working width 0043 (mm), work state 008D, positions in 1e-7
/// degrees with status 2 (DGNSS) and the HDOP, each value logged when it changes. For
/// `plotsieve simulate --form taskdata`; the bytes depend only on the tables.
pub fn write_set(dir: &Path, logs: &[(String, String)]) -> Result<(), String> {
    if dir.exists() {
        return Err(format!("{} exists", dir.display()));
    }
    std::fs::create_dir_all(dir).map_err(|e| e.to_string())?;
    let mut tasks = String::new();
    // (DDI, column, factor to the DDI's unit): a column the table lacks (speed, swath) is
    // not logged.
    const QUANTITIES: [(&str, &str, f64); 5] = [
        ("0057", "mass_flow_lb_s", 0.453_592_37 * 1e6),
        ("0063", "moisture_pct", 1e4),
        ("018D", "speed_mph", 447.04),
        ("0043", "swath_ft", 304.8),
        ("008D", "header_state", 1.0),
    ];
    for (k, (task, csv_text)) in logs.iter().enumerate() {
        let tlg = format!("TLG{:05}", k + 1);
        tasks += &format!(
            "<TSK A=\"TSK{}\" B=\"{}\" G=\"4\">\n<TLG A=\"{tlg}\" C=\"1\"/>\n</TSK>\n",
            k + 1,
            task.replace('&', "&amp;")
                .replace('"', "&quot;")
                .replace('<', "&lt;")
        );
        let crate::ingest::layers::PointTable {
            mut rdr, header, ..
        } = crate::ingest::layers::point_table(csv_text)?;
        let col = |n: &str| {
            header
                .iter()
                .position(|h| h == n)
                .ok_or_else(|| format!("the point table has no {n} column"))
        };
        let idx = [
            col("time_utc")?,
            col("lon_deg")?,
            col("lat_deg")?,
            col("hdop")?,
        ];
        let logged: Vec<(&str, usize, f64)> = QUANTITIES
            .iter()
            .filter_map(|(d, c, f)| col(c).ok().map(|i| (*d, i, *f)))
            .collect();
        if !logged.iter().any(|q| q.0 == "0057") {
            return Err("the point table has no mass_flow_lb_s column".into());
        }
        let mut bin = Vec::new();
        let mut last: Vec<Option<i32>> = vec![None; logged.len()];
        for (r, rec) in rdr.records().enumerate() {
            let rec = rec.map_err(|e| e.to_string())?;
            let num = |i: usize| -> Result<f64, String> {
                rec.get(i)
                    .and_then(|v| v.parse::<f64>().ok())
                    .ok_or_else(|| format!("record {}: {} is not a number", r + 1, header[i]))
            };
            let t = crate::ingest::time::parse_iso8601(rec.get(idx[0]).unwrap_or(""))
                .ok_or_else(|| format!("record {}: time is not ISO 8601", r + 1))?;
            let since = t - EPOCH_1980_S;
            let days = (since / 86_400.0).floor();
            let ms = ((since - days * 86_400.0) * 1000.0).round();
            bin.extend((ms as u32).to_le_bytes());
            bin.extend((days as u16).to_le_bytes());
            let deg = |v: f64| (v * 1e7).round() as i32;
            bin.extend(deg(num(idx[2])?).to_le_bytes());
            bin.extend(deg(num(idx[1])?).to_le_bytes());
            bin.push(2);
            bin.extend(((num(idx[3])? * 10.0).round() as u16).to_le_bytes());
            let now = logged
                .iter()
                .map(|(_, i, f)| num(*i).map(|v| (v * f).round() as i32))
                .collect::<Result<Vec<i32>, String>>()?;
            let changed: Vec<usize> = (0..now.len())
                .filter(|&i| last[i] != Some(now[i]))
                .collect();
            bin.push(changed.len() as u8);
            for i in changed {
                bin.push(i as u8);
                bin.extend(now[i].to_le_bytes());
                last[i] = Some(now[i]);
            }
        }
        let dlvs: String = logged
            .iter()
            .map(|(d, ..)| format!("<DLV A=\"{d}\" B=\"\" C=\"DET-1\"/>\n"))
            .collect();
        let head = format!(
            "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n<TIM A=\"\" D=\"4\">\n<PTN A=\"\" B=\"\" D=\"\" F=\"\"/>\n{dlvs}</TIM>\n"
        );
        std::fs::write(dir.join(format!("{tlg}.XML")), head).map_err(|e| e.to_string())?;
        std::fs::write(dir.join(format!("{tlg}.BIN")), bin).map_err(|e| e.to_string())?;
    }
    let main = format!(
        "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n<ISO11783_TaskData VersionMajor=\"4\" VersionMinor=\"3\" ManagementSoftwareManufacturer=\"plotsieve simulate\" ManagementSoftwareVersion=\"1\" DataTransferOrigin=\"2\">\n<DVC A=\"DVC-1\" B=\"Combine\" D=\"A000860025A00001\" F=\"FF000000006C6A\" G=\"FF000000006C6A\">\n<DET A=\"DET-1\" B=\"1\" C=\"1\" D=\"Combine\" E=\"0\" F=\"0\"/>\n</DVC>\n{tasks}</ISO11783_TaskData>\n"
    );
    std::fs::write(dir.join("TASKDATA.XML"), main).map_err(|e| e.to_string())
}
