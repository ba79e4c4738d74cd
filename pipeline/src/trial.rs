//! A trial as the binary loads it, and the run folder's manifest: what `run`, `stage`,
//! `season`, `intake` and the stage glue all read.

use crate::stage::Stage;
use anyhow::{Context, Result};
use plotsieve_stages::config::TrialConfig;
use plotsieve_stages::ingest;
use plotsieve_stages::table::StageSummary;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// SHA-256 of one input file.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct InputHash {
    pub path: String,
    pub bytes: u64,
    pub sha256: String,
}

/// One stage's record in the manifest.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct StageRecord {
    /// `done` or `stale` (an upstream stage was rerun after this one).
    pub status: String,
    pub seconds: f64,
    pub unit: String,
    pub count_in: u64,
    pub kept: u64,
    pub rejected: u64,
    /// The settings section this stage ran with.
    pub settings: serde_json::Value,
    /// Why the stage failed (status `failed`).
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub error: String,
}

/// `manifest.json`.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct Manifest {
    pub tool: String,
    pub version: String,
    pub trial_file: String,
    /// The configuration after defaults and overrides, as last used.
    pub config: serde_json::Value,
    pub inputs: Vec<InputHash>,
    pub stages: BTreeMap<String, StageRecord>,
}

/// A loaded trial.
pub struct Trial {
    pub path: PathBuf,
    pub base: PathBuf,
    pub cfg: TrialConfig,
}

/// Load a trial file with overrides.
pub fn load(trial: &Path, set: &[String]) -> Result<Trial> {
    let text = std::fs::read_to_string(trial)
        .with_context(|| format!("reading trial file {}", trial.display()))?;
    let mut cfg = TrialConfig::from_toml(&text, &trial.display().to_string(), set)?;
    let base = trial.parent().map(Path::to_path_buf).unwrap_or_default();
    let base = if base.as_os_str().is_empty() {
        PathBuf::from(".")
    } else {
        base
    };
    table_rates(&mut cfg, &base)?;
    if let Some(p) = cfg.adjust.price_without_rates() {
        anyhow::bail!("invalid settings:\n  {p}");
    }
    if let Some(p) = cfg
        .adjust
        .applied_problems(cfg.columns.applied_rate.as_ref())
    {
        anyhow::bail!("invalid settings:\n  {p}");
    }
    Ok(Trial {
        path: trial.to_path_buf(),
        base,
        cfg,
    })
}

/// A rate trial's rates from a `rate_<unit>` column of the design table or of a CSV plot
/// table, into `adjust.rates` and `adjust.rate_unit` (so the manifest records them). A table
/// that cannot be read is left to ingest to report.
fn table_rates(cfg: &mut TrialConfig, base: &Path) -> Result<()> {
    let tables = [&cfg.inputs.design, &cfg.inputs.plot_table];
    for name in tables.into_iter().filter(|n| !n.is_empty()) {
        let lower = name.to_ascii_lowercase();
        if !(lower.ends_with(".csv") || lower.ends_with(".txt")) {
            continue;
        }
        // Only a regular file: a pipe or device is read once, by ingest.
        let path = base.join(name);
        if !std::fs::metadata(&path).is_ok_and(|m| m.is_file()) {
            continue;
        }
        let Ok(text) = std::fs::read_to_string(&path) else {
            continue;
        };
        let Some((unit, rates)) =
            ingest::rate_column::rates_of_table(&text, name).map_err(anyhow::Error::msg)?
        else {
            continue;
        };
        if !cfg.adjust.rates.is_empty() {
            anyhow::bail!(
                "rates are given twice: in adjust.rates and in column rate_{unit} of {name}; keep one"
            );
        }
        cfg.adjust.rates = rates;
        cfg.adjust.rate_unit = unit;
        let mut problems = Vec::new();
        cfg.adjust.problems(&mut problems);
        if !problems.is_empty() {
            anyhow::bail!("{name}, column rate_{unit}: {}", problems.join("; "));
        }
        return Ok(());
    }
    Ok(())
}

/// `runs/<folder of the trial file>-<trial file name>`, so that trial files of the same name
/// in different folders (every `trial.toml`) get their own run folders.
pub fn default_out(trial: &Path) -> PathBuf {
    let stem = trial
        .file_stem()
        .and_then(|s| s.to_str())
        .unwrap_or("trial");
    let folder = std::fs::canonicalize(trial)
        .ok()
        .and_then(|p| {
            p.parent()
                .and_then(|d| d.file_name())
                .map(|n| n.to_string_lossy().to_string())
        })
        .filter(|n| !n.is_empty());
    match folder {
        Some(f) => PathBuf::from("runs").join(format!("{f}-{stem}")),
        None => PathBuf::from("runs").join(stem),
    }
}

pub(crate) fn sha256_file(path: &Path) -> Result<(u64, String)> {
    let bytes = std::fs::read(path).with_context(|| format!("reading {}", path.display()))?;
    let digest = Sha256::digest(&bytes);
    Ok((
        bytes.len() as u64,
        digest.iter().map(|b| format!("{b:02x}")).collect(),
    ))
}

pub(crate) fn hash_inputs(t: &Trial) -> Result<Vec<InputHash>> {
    let paths = input_paths(t)?;
    // Files hashed in parallel (a harvest's exports are hundreds of MB), listed in order.
    let hashed: Vec<Result<InputHash>> = paths
        .par_iter()
        .map(|p| {
            let (bytes, sha256) = sha256_file(p)?;
            let shown = p
                .strip_prefix(&t.base)
                .unwrap_or(p)
                .to_string_lossy()
                .replace('\\', "/");
            Ok(InputHash {
                path: shown,
                bytes,
                sha256,
            })
        })
        .collect();
    hashed.into_iter().collect()
}

/// Every file a run of the trial reads, the trial file first (as the manifest lists them;
/// `plotsieve inputs` prints them for a workflow engine).
pub(crate) fn input_paths(t: &Trial) -> Result<Vec<PathBuf>> {
    let mut paths = vec![t.path.clone()];
    if !t.cfg.inputs.plot_table.is_empty() {
        paths.push(t.base.join(&t.cfg.inputs.plot_table));
    } else {
        for p in ingest::monitor_files(&t.cfg.for_ingest(), &t.base)? {
            // A task-data time log: the set's file, and in a folder the log's header and
            // records beside it.
            let (file, log) = ingest::formats::taskdata::split(&p);
            if let (Some(log), Some(dir)) = (log, file.parent()) {
                for ext in ["XML", "BIN", "xml", "bin"] {
                    let f = dir.join(format!("{log}.{ext}"));
                    if f.is_file() && !paths.contains(&f) {
                        paths.push(f);
                    }
                }
            }
            if !paths.contains(&file) {
                paths.push(file);
            }
        }
        if !t.cfg.inputs.plots.is_empty() {
            paths.push(t.base.join(&t.cfg.inputs.plots));
        }
        if !t.cfg.inputs.design.is_empty() {
            paths.push(t.base.join(&t.cfg.inputs.design));
        }
        if !t.cfg.inputs.prescription.is_empty() {
            paths.push(t.base.join(&t.cfg.inputs.prescription));
        }
    }
    if !t.cfg.adjust.priors_from.is_empty() {
        paths.push(t.base.join(&t.cfg.adjust.priors_from));
    }
    // A layer file with the files that belong to it (a Shapefile's .shx, .dbf and .prj).
    let sidecars: Vec<PathBuf> = paths
        .iter()
        .flat_map(|p| ingest::layers::companions(p))
        .collect();
    paths.extend(sidecars);
    Ok(paths)
}

pub(crate) fn read_manifest(out: &Path) -> Result<Option<Manifest>> {
    let p = out.join("manifest.json");
    if !p.exists() {
        return Ok(None);
    }
    let text = std::fs::read_to_string(&p).with_context(|| format!("reading {}", p.display()))?;
    Ok(Some(serde_json::from_str(&text).with_context(|| {
        format!("{}: not a plotsieve manifest", p.display())
    })?))
}

pub(crate) fn read_summary(out: &Path, stage: Stage) -> Result<StageSummary> {
    let p = out.join(stage.dir()).join("summary.json");
    let text = std::fs::read_to_string(&p).with_context(|| {
        format!(
            "{} is missing: run stage {} first",
            p.display(),
            stage.name()
        )
    })?;
    Ok(serde_json::from_str(&text).with_context(|| format!("reading {}", p.display()))?)
}
