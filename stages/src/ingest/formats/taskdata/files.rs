//! A task-data set's files (the folder of `TASKDATA.XML`, or its folder inside a zip), read
//! within stated memory limits checked before anything is inflated.

use std::collections::BTreeMap;
use std::io::Read;
use std::path::Path;

/// The task data's files by upper-case name (the folder of `TASKDATA.XML`, or its folder
/// inside the archive).
pub(super) struct Files(BTreeMap<String, Vec<u8>>);

/// The largest file of a task-data set read (512 MiB: a time log of 20 million records of
/// 24 bytes, weeks of logging every second).
pub const MAX_MEMBER_BYTES: u64 = 512 << 20;

/// The largest inflation of a zip member (uncompressed / compressed size) taken as a real
/// file; a file of zero bytes deflates about 1,000 times.
pub const MAX_INFLATION: u64 = 100;

/// The most a task-data set may hold in all (2 GiB).
pub const MAX_TOTAL_BYTES: u64 = 2 << 30;

/// A zip member's declared size and inflation against [`MAX_MEMBER_BYTES`] and
/// [`MAX_INFLATION`], before anything is inflated; `Err` names the member.
fn member_limits(n: &str, size: u64, packed: u64) -> Result<(), String> {
    let packed = packed.max(1);
    let what = if size > MAX_MEMBER_BYTES {
        format!("declares {size} bytes, more than a task-data file can be ({MAX_MEMBER_BYTES})")
    } else if size / packed > MAX_INFLATION {
        format!(
            "inflates from {packed} to {size} bytes ({}x; a real time log deflates far less than {MAX_INFLATION}x)",
            size / packed
        )
    } else {
        return Ok(());
    };
    Err(format!(
        "{n}: {what}; not read (an archive made to exhaust memory, or not task data)"
    ))
}

/// The fewest bytes a time-log record takes: time (6), latitude and longitude (8), the
/// value count (1) and one value (5).
pub(super) const MIN_RECORD_BYTES: u64 = 20;

/// The size of time log `log` (`TLG00001`) of a task-data set, as a zip archive declares it
/// (nothing inflated) or as its folder holds it; 0 when the set has no such file.
pub(super) fn log_size(file: &Path, log: &str) -> Result<u64, String> {
    let want = format!("{}.BIN", log.to_ascii_uppercase());
    let is_zip = file
        .extension()
        .is_some_and(|x| x.eq_ignore_ascii_case("zip"));
    if is_zip {
        let f = std::fs::File::open(file).map_err(|e| e.to_string())?;
        let mut z = zip::ZipArchive::new(f).map_err(|e| format!("not a zip archive ({e})"))?;
        let mut size = 0;
        for i in 0..z.len() {
            let e = z.by_index_raw(i).map_err(|e| format!("entry {i}: {e}"))?;
            let name = e.name().map_err(|e| format!("entry {i}: {e}"))?;
            let base = name.rsplit('/').next().unwrap_or("").to_ascii_uppercase();
            if base == want {
                member_limits(&name, e.size(), e.compressed_size())?;
                size = size.max(e.size());
            }
        }
        Ok(size)
    } else {
        let dir = file.parent().unwrap_or(Path::new("."));
        let found = std::fs::read_dir(if dir.as_os_str().is_empty() {
            Path::new(".")
        } else {
            dir
        })
        .map_err(|e| e.to_string())?
        .filter_map(|e| e.ok())
        .find(|e| e.file_name().to_string_lossy().to_ascii_uppercase() == want);
        Ok(found.and_then(|e| e.metadata().ok()).map_or(0, |m| m.len()))
    }
}

impl Files {
    pub(super) fn open(path: &Path) -> Result<Files, String> {
        let is_zip = path
            .extension()
            .is_some_and(|x| x.eq_ignore_ascii_case("zip"));
        let mut files = BTreeMap::new();
        if is_zip {
            let f = std::fs::File::open(path).map_err(|e| e.to_string())?;
            return Files::from_zip(f);
        } else {
            let dir = path.parent().unwrap_or(Path::new("."));
            let dir = if dir.as_os_str().is_empty() {
                Path::new(".")
            } else {
                dir
            };
            for e in std::fs::read_dir(dir).map_err(|e| e.to_string())? {
                let p = e.map_err(|e| e.to_string())?.path();
                let Some(base) = p.file_name().and_then(|b| b.to_str()) else {
                    continue;
                };
                let up = base.to_ascii_uppercase();
                if p.is_file() && (up == "TASKDATA.XML" || up.starts_with("TLG")) {
                    let size = p.metadata().map(|m| m.len()).unwrap_or(0);
                    if size > MAX_MEMBER_BYTES {
                        return Err(format!(
                            "{base}: {size} bytes, more than a task-data file can be ({MAX_MEMBER_BYTES} bytes); not read"
                        ));
                    }
                    files.insert(up, std::fs::read(&p).map_err(|e| format!("{base}: {e}"))?);
                }
            }
        }
        Ok(Files(files))
    }

    /// The files of the archive's folder that holds `TASKDATA.XML` (the shallowest).
    pub(super) fn from_zip<R: Read + std::io::Seek>(r: R) -> Result<Files, String> {
        let mut files = BTreeMap::new();
        let mut z = zip::ZipArchive::new(r).map_err(|e| format!("not a zip archive ({e})"))?;
        let mut names: Vec<String> = Vec::with_capacity(z.len());
        for i in 0..z.len() {
            let e = z.by_index(i).map_err(|e| format!("entry {i}: {e}"))?;
            names.push(e.name().map_err(|e| format!("entry {i}: {e}"))?.to_string());
        }
        let main = names
            .iter()
            .filter(|n| {
                n.rsplit('/')
                    .next()
                    .is_some_and(|b| b.eq_ignore_ascii_case("TASKDATA.XML"))
            })
            .min_by_key(|n| n.len())
            .ok_or("the archive holds no TASKDATA.XML")?
            .clone();
        let dir = &main[..main.len() - "TASKDATA.XML".len()];
        let mut total = 0u64;
        for n in &names {
            let Some(base) = n.strip_prefix(dir) else {
                continue;
            };
            if base.is_empty() || base.contains('/') {
                continue;
            }
            let e = z.by_name(n).map_err(|e| format!("{n}: {e}"))?;
            let size = e.size();
            member_limits(n, size, e.compressed_size())?;
            let refuse = |what: String| {
                Err(format!(
                    "{n}: {what}; not read (an archive made to exhaust memory, or not task data)"
                ))
            };
            total += size;
            if total > MAX_TOTAL_BYTES {
                return refuse(format!(
                    "the archive's files add up to more than {MAX_TOTAL_BYTES} bytes"
                ));
            }
            // The declared size may lie: read at most one byte past it.
            let mut bytes = Vec::with_capacity(size as usize);
            e.take(size + 1)
                .read_to_end(&mut bytes)
                .map_err(|e| format!("{n}: {e}"))?;
            if bytes.len() as u64 > size {
                return refuse(format!("inflates past the {size} bytes it declares"));
            }
            files.insert(base.to_ascii_uppercase(), bytes);
        }
        Ok(Files(files))
    }

    pub(super) fn get(&self, name: &str) -> Result<&[u8], String> {
        self.0
            .get(&name.to_ascii_uppercase())
            .map(Vec::as_slice)
            .ok_or_else(|| format!("{name} is missing"))
    }
}
