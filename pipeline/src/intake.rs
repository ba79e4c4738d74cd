//! `plotsieve intake`: field operations drop a harvest's exports in one folder; each export
//! is matched to the trials whose plots its points fall near, copied into each such trial's
//! monitor folder, and only the trials that received something new are rerun.
//!
//! - Matching: an export goes to every trial with at least `MIN_POINTS` of its records within
//!   the trial's `plots.far_m` of the trial's plot extent (lon/lat bounding box). An export
//!   may go to several trials (each trial's plots stage then rejects the other trial's records
//!   as `far_from_trial`), or to none: then it is reported and left where it is.
//! - An export already seen (same SHA-256, under any name) is skipped and not counted again;
//!   a partial export (last line cut short, or a mapped column missing) is reported with the
//!   reason and left in place; it is taken when a complete version (new SHA-256) arrives.
//! - Nothing in the inbox is modified, moved or deleted. Exports are copied; a name already
//!   used by a different file in a trial's folder gets the first 8 hex digits of the SHA-256.
//! - `intake-manifest.json` beside the season file records every export seen (SHA-256, name,
//!   status, trials it went to and the file name it was copied as).

use crate::io;
use crate::run;
use anyhow::{bail, Context, Result};
use plotsieve_stages::config::TrialConfig;
use plotsieve_stages::ingest;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// Records an export needs inside a trial's extent to be taken for it.
const MIN_POINTS: usize = 10;

/// A season file: `[season]` and the trials (`[[trial]]`); read by intake and by the
/// season fit.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct Season {
    #[serde(default)]
    pub(crate) season: SeasonMeta,
    pub(crate) trial: Vec<SeasonTrial>,
}

/// `[season]`: its name, and what `plotsieve season` needs beyond the trials.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct SeasonMeta {
    #[serde(default)]
    pub(crate) name: String,
    /// The season fit's folder, relative to the season file [default: season-run].
    #[serde(default)]
    pub(crate) out: Option<PathBuf>,
    /// Output unit [default: the first trial's].
    #[serde(default)]
    pub(crate) output_unit: Option<plotsieve_stages::crop::OutputUnit>,
    /// Grain price at standard moisture per `grain_price_unit` (0 = no economics).
    #[serde(default)]
    pub(crate) grain_price: f64,
    /// "t", "q", "kg" or "bu" [default: "t"].
    #[serde(default)]
    pub(crate) grain_price_unit: Option<plotsieve_stages::crop::PriceUnit>,
    /// Product cost per `product_cost_unit`, by product.
    #[serde(default)]
    pub(crate) product_cost: BTreeMap<String, f64>,
    /// "ha" or "ac" [default: "ha"].
    #[serde(default)]
    pub(crate) product_cost_unit: Option<plotsieve_stages::crop::AreaUnit>,
    /// Renamed keys, read only to refuse them with the new spelling.
    #[serde(default)]
    pub(crate) grain_price_per_t: Option<toml::Value>,
    #[serde(default)]
    pub(crate) product_cost_per_ha: Option<toml::Value>,
    /// P(product x field SD > this) = 0.05, in the output unit; 0 = the mean SD of the
    /// fields' plot yields (as in a trial's joint fit).
    #[serde(default)]
    pub(crate) interaction_sd_u: f64,
    /// A season of rate trials: the input's price per `input_price_unit` (0 = none).
    #[serde(default)]
    pub(crate) input_price: f64,
    /// "kg", "lb", "l" or "1000_seeds" [default: "kg"].
    #[serde(default)]
    pub(crate) input_price_unit: Option<plotsieve_stages::crop::InputUnit>,
    /// Fit the season without trials whose run did not finish (no run folder, or a stage
    /// failed or stale), each left out with a warning naming it and the stage; otherwise
    /// such a trial is an error.
    #[serde(default)]
    pub(crate) allow_failed_trials: bool,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct SeasonTrial {
    /// Trial file, relative to the season file.
    pub(crate) file: PathBuf,
    /// Run folder, relative to the season file.
    pub(crate) out: PathBuf,
}

/// Read a season file; returns it and the folder its paths are relative to.
pub(crate) fn read_season(season_file: &Path) -> Result<(Season, PathBuf)> {
    let text = std::fs::read_to_string(season_file)
        .with_context(|| format!("reading season file {}", season_file.display()))?;
    let season: Season = toml::from_str(&text)
        .with_context(|| format!("{}: not a season file", season_file.display()))?;
    let dir = season_file
        .parent()
        .map(Path::to_path_buf)
        .unwrap_or_default();
    let dir = if dir.as_os_str().is_empty() {
        PathBuf::from(".")
    } else {
        dir
    };
    Ok((season, dir))
}

/// One export in `intake-manifest.json`.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct ExportRecord {
    pub name: String,
    /// `taken`, `no_trial` or `partial`.
    pub status: String,
    pub reason: String,
    /// Trial file -> name the export was copied as in that trial's monitor folder.
    pub trials: BTreeMap<String, String>,
}

/// `intake-manifest.json`: every export seen, by SHA-256.
#[derive(Clone, Debug, Default, Serialize, Deserialize)]
pub struct IntakeManifest {
    pub exports: BTreeMap<String, ExportRecord>,
}

struct TrialInfo {
    key: String,
    file: PathBuf,
    out: PathBuf,
    cfg: TrialConfig,
    monitor_dir: PathBuf,
    /// lon/lat box: min lon, min lat, max lon, max lat (with the far_m margin).
    bbox: (f64, f64, f64, f64),
}

fn sha256(bytes: &[u8]) -> String {
    Sha256::digest(bytes)
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect()
}

fn trial_info(season_dir: &Path, t: &SeasonTrial) -> Result<TrialInfo> {
    let file = season_dir.join(&t.file);
    let loaded = crate::trial::load(&file, &[])?;
    let cfg = loaded.cfg;
    let base = loaded.base;
    let mon = cfg.inputs.monitor.first().cloned().unwrap_or_default();
    let monitor_dir = base.join(&mon);
    if ingest::formats::is_export(&monitor_dir) {
        bail!(
            "{}: inputs.monitor must name a folder for intake to copy exports into (got {mon:?})",
            file.display()
        );
    }
    let mut pts: Vec<(f64, f64)> = Vec::new();
    if cfg.plots_from_labels() {
        bail!(
            "{}: its plots are built from the treatment labels on its records (columns.treatment or inputs.prescription), so it has no plot extent to match exports to; copy its exports into {mon} by hand",
            file.display()
        );
    }
    if cfg.layout.is_empty() {
        for p in ingest::geojson::read_plot_input(
            &base.join(&cfg.inputs.plots),
            &cfg.inputs.plots,
            &cfg.inputs.plot_id_property,
            &cfg.inputs.crs,
            &cfg.inputs.layer,
        )? {
            pts.extend(p.exterior);
        }
    } else {
        for l in &cfg.layout {
            let utm = plotsieve_stages::projection::Utm::new(
                plotsieve_stages::projection::zone_of(l.origin_lon) as i64,
                l.origin_lat < 0.0,
            )?;
            let (ox, oy) = utm.forward(l.origin_lon, l.origin_lat)?;
            for p in l.polygons(ox, oy) {
                for (x, y) in p.exterior {
                    pts.push(utm.inverse(x, y)?);
                }
            }
        }
    }
    let (mut a, mut b, mut c, mut d) = (f64::MAX, f64::MAX, f64::MIN, f64::MIN);
    for (lon, lat) in &pts {
        a = a.min(*lon);
        b = b.min(*lat);
        c = c.max(*lon);
        d = d.max(*lat);
    }
    let dlat = cfg.plots.far_m / 111_195.0;
    let dlon = dlat / (0.5 * (b + d)).to_radians().cos().max(0.01);
    Ok(TrialInfo {
        key: t.file.to_string_lossy().replace('\\', "/"),
        file,
        out: season_dir.join(&t.out),
        cfg,
        monitor_dir,
        bbox: (a - dlon, b - dlat, c + dlon, d + dlat),
    })
}

/// How many records of the export fall in each trial's box, or why it cannot be read.
fn match_export(path: &Path, bytes: &[u8], trials: &[TrialInfo]) -> Result<Vec<usize>, String> {
    let format = ingest::formats::for_bytes(path, bytes);
    // A text export cut short has no line end; other formats say so themselves.
    if format.name() == "mapped_text" && !bytes.ends_with(b"\n") {
        let lines = bytes.iter().filter(|&&c| c == b'\n').count() + 1;
        return Err(format!(
            "partial: the last line (line {lines}) is cut short (no line end)"
        ));
    }
    let mut counts = vec![0usize; trials.len()];
    let mut any_mapping = false;
    for (k, t) in trials.iter().enumerate() {
        let Some(positions) = format.positions(&t.cfg.for_ingest(), bytes)? else {
            continue;
        };
        any_mapping = true;
        let b = t.bbox;
        counts[k] = positions
            .iter()
            .filter(|(lon, lat)| *lon >= b.0 && *lon <= b.2 && *lat >= b.1 && *lat <= b.3)
            .count();
    }
    if !any_mapping {
        return Err(
            "unreadable: no trial's [columns] longitude and latitude are in its header".into(),
        );
    }
    Ok(counts)
}

/// `plotsieve intake INBOX SEASON.toml`.
pub fn intake(inbox: &Path, season_file: &Path, quiet: bool) -> Result<()> {
    let (season, season_dir) = read_season(season_file)?;
    let trials: Vec<TrialInfo> = season
        .trial
        .iter()
        .map(|t| trial_info(&season_dir, t))
        .collect::<Result<_>>()?;
    let manifest_path = season_dir.join("intake-manifest.json");
    let _lock = crate::lock::FolderLock::acquire(&manifest_path, "season intake")?;
    let mut manifest: IntakeManifest = match std::fs::read_to_string(&manifest_path) {
        Ok(t) => serde_json::from_str(&t)
            .with_context(|| format!("{}: not an intake manifest", manifest_path.display()))?,
        Err(_) => IntakeManifest::default(),
    };
    let mut files: Vec<PathBuf> = std::fs::read_dir(inbox)
        .with_context(|| format!("reading inbox {}", inbox.display()))?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.is_file() && ingest::formats::is_export(p))
        .collect();
    files.sort();
    let mut touched: Vec<usize> = Vec::new();
    let mut lines = Vec::new();
    let mut new_count = 0;
    let share = ingest::settings::IngestSettings::default_share();
    for path in &files {
        let name = path
            .file_name()
            .map(|n| n.to_string_lossy().to_string())
            .unwrap_or_default();
        // An export too large for this machine (or no export at all) is not read whole.
        if let Err(e) = ingest::memory::check(
            std::slice::from_ref(path),
            std::slice::from_ref(&name),
            share,
            ingest::memory::machine_bytes(),
        ) {
            lines.push(format!("left in the inbox: {e}"));
            continue;
        }
        let bytes = std::fs::read(path).with_context(|| format!("reading {}", path.display()))?;
        let sha = sha256(&bytes);
        if let Some(prev) = manifest.exports.get(&sha) {
            if prev.name != name || prev.status != "taken" {
                lines.push(format!(
                    "already seen: {name} (same content as {}, {})",
                    prev.name, prev.status
                ));
            }
            continue;
        }
        new_count += 1;
        let mut record = ExportRecord {
            name: name.clone(),
            status: String::new(),
            reason: String::new(),
            trials: BTreeMap::new(),
        };
        match match_export(path, &bytes, &trials) {
            Err(reason) => {
                record.status = "partial".into();
                lines.push(format!("left in the inbox: {name}: {reason}"));
                record.reason = reason;
            }
            Ok(counts) => {
                let hits: Vec<usize> = (0..trials.len())
                    .filter(|&k| counts[k] >= MIN_POINTS)
                    .collect();
                if hits.is_empty() {
                    record.status = "no_trial".into();
                    record.reason =
                        format!("fewer than {MIN_POINTS} records near any trial's plots");
                    lines.push(format!(
                        "left in the inbox: {name}: matches no trial ({})",
                        record.reason
                    ));
                }
                for k in hits {
                    let t = &trials[k];
                    std::fs::create_dir_all(&t.monitor_dir)
                        .with_context(|| format!("creating {}", t.monitor_dir.display()))?;
                    let mut target = t.monitor_dir.join(&name);
                    if target.exists() && sha256(&std::fs::read(&target)?) != sha {
                        let file = Path::new(&name);
                        let part = |s: Option<&std::ffi::OsStr>| {
                            s.map(|s| s.to_string_lossy().to_string())
                                .unwrap_or_default()
                        };
                        let (stem, ext) = (part(file.file_stem()), part(file.extension()));
                        target = t.monitor_dir.join(format!("{stem}-{}.{ext}", &sha[..8]));
                    }
                    io::write_atomic(&target, &bytes)?;
                    let copied = target
                        .file_name()
                        .map(|n| n.to_string_lossy().to_string())
                        .unwrap_or_default();
                    lines.push(format!(
                        "taken: {name} -> {} ({} records near its plots), as {copied}",
                        t.key, counts[k]
                    ));
                    record.trials.insert(t.key.clone(), copied);
                    if !touched.contains(&k) {
                        touched.push(k);
                    }
                }
                if !record.trials.is_empty() {
                    record.status = "taken".into();
                }
            }
        }
        manifest.exports.insert(sha, record);
    }
    io::write_json(&manifest_path, &manifest)?;
    touched.sort();
    for &k in &touched {
        let t = &trials[k];
        // Mid-harvest, a field whose exports have not arrived yet has no data: the rerun is
        // a provisional result without it (each such field a warning), not an error.
        let provisional = ["adjust.allow_missing_fields=true".to_string()];
        run::run_all(&t.file, Some(t.out.clone()), &provisional, true)
            .with_context(|| format!("rerunning {}", t.key))?;
        lines.push(format!("reran {} into {}", t.key, t.out.display()));
    }
    if new_count == 0 {
        lines.push(format!(
            "nothing new in {}: no trial rerun",
            inbox.display()
        ));
    }
    let _ = quiet;
    let title = if season.season.name.is_empty() {
        String::new()
    } else {
        format!("{}: ", season.season.name)
    };
    println!(
        "{title}{} exports in the inbox, {new_count} new",
        files.len()
    );
    for l in lines {
        println!("{l}");
    }
    Ok(())
}
