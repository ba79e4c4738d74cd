//! The memory check made before any export is read: each export's records are bounded from
//! its size and first bytes ([`MonitorFormat::records_bound`]), and a trial whose exports
//! would need more than `ingest.max_memory_share` of the machine's memory is refused, naming
//! the largest exports, before one record is read (rather than killed by the system part-way).

use super::formats::{for_file, MonitorFormat};
use super::IngestError;
use std::path::Path;

/// Peak memory of a whole `run` per monitor record, bytes: measured 425 B (0.88 GB for the
/// benchmark's 2.07 M records) and 427 B (3.54 GB for 8.3 M) on 2026-12-06, rounded up with
/// a sixth to spare (835 and 817 B before the point tables were written a row group at a time
/// and the exact spectral forms stopped holding eigenvectors).
pub const BYTES_PER_RECORD: u64 = 500;

/// The machine's memory in bytes: the smaller of the physical memory (`MemTotal` of
/// `/proc/meminfo`) and the control group's limit (`/sys/fs/cgroup/memory.max`); `None`
/// where neither can be read (then no check is made, and `check` says so).
pub fn machine_bytes() -> Option<u64> {
    let total = std::fs::read_to_string("/proc/meminfo").ok().and_then(|t| {
        t.lines()
            .find_map(|l| l.strip_prefix("MemTotal:"))
            .and_then(|v| v.trim().trim_end_matches("kB").trim().parse::<u64>().ok())
            .map(|kb| kb * 1024)
    });
    let cgroup = std::fs::read_to_string("/sys/fs/cgroup/memory.max")
        .ok()
        .and_then(|t| t.trim().parse::<u64>().ok());
    match (total, cgroup) {
        (Some(a), Some(b)) => Some(a.min(b)),
        (a, b) => a.or(b),
    }
}

/// Each export's record bound, then the whole trial's memory need against `share` of
/// `machine` bytes. `names` are the exports as the trial names them.
pub fn check(
    files: &[std::path::PathBuf],
    names: &[String],
    share: f64,
    machine: Option<u64>,
) -> Result<u64, IngestError> {
    let mut bounds: Vec<(u64, &str)> = Vec::with_capacity(files.len());
    for (p, name) in files.iter().zip(names) {
        let format: &dyn MonitorFormat = for_file(p);
        let n = format
            .records_bound(Path::new(p))
            .map_err(|message| IngestError::Unusable {
                file: name.clone(),
                message,
            })?;
        bounds.push((n, name));
    }
    let records: u64 = bounds.iter().map(|b| b.0).sum();
    let need = records.saturating_mul(BYTES_PER_RECORD);
    if let Some(machine) = machine {
        let limit = (share * machine as f64) as u64;
        if need > limit {
            bounds.sort_by(|a, b| b.0.cmp(&a.0).then(a.1.cmp(b.1)));
            let largest: Vec<String> = bounds
                .iter()
                .take(3)
                .map(|(n, name)| format!("{name} (up to {n} records)"))
                .collect();
            return Err(IngestError::Unusable {
                file: bounds[0].1.to_string(),
                message: format!(
                    "the trial's {} export(s) hold up to {records} records, which would need about {} MiB ({BYTES_PER_RECORD} bytes a record) of the {} MiB allowed (ingest.max_memory_share = {share} of this machine's {} MiB); not read. Largest: {}. Split the harvest into several trials, or run it on a machine with more memory",
                    files.len(),
                    need >> 20,
                    limit >> 20,
                    machine >> 20,
                    largest.join(", ")
                ),
            });
        }
    }
    Ok(need)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_trial_within_the_share_passes_and_one_beyond_it_is_refused_naming_the_largest() {
        let dir = std::env::temp_dir().join(format!("plotsieve-memory-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        // 1,000 lines of 50 bytes (49 characters and the line end): about 1,250 records.
        let a = dir.join("a.csv");
        let line = format!("{}\n", "x".repeat(49));
        std::fs::write(&a, line.repeat(1000)).unwrap();
        let b = dir.join("b.csv");
        std::fs::write(&b, line.repeat(10)).unwrap();
        let files = vec![a.clone(), b.clone()];
        let names = vec!["a.csv".to_string(), "b.csv".to_string()];
        let need = check(&files, &names, 0.5, Some(1 << 30)).unwrap();
        // 1000 + 250 + 1 and 10 + 2 + 1 records.
        assert_eq!(need, (1251 + 13) * BYTES_PER_RECORD);
        let e = check(&files, &names, 0.5, Some(2 * need - 2))
            .unwrap_err()
            .to_string();
        assert!(
            e.starts_with("a.csv: the trial's 2 export(s) hold up to 1264 records"),
            "{e}"
        );
        assert!(
            e.contains("Largest: a.csv (up to 1251 records), b.csv (up to 13 records)"),
            "{e}"
        );
        assert!(e.contains("ingest.max_memory_share = 0.5"), "{e}");
        // No machine size known: no limit.
        assert!(check(&files, &names, 0.5, None).is_ok());
        // A file with no line end in its first 64 KiB is no delimited export.
        let c = dir.join("c.csv");
        std::fs::write(&c, vec![0u8; 70_000]).unwrap();
        let e = check(&[c], &["c.csv".into()], 0.5, None)
            .unwrap_err()
            .to_string();
        assert!(e.contains("c.csv: no line end in its first 64 KiB"), "{e}");
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
