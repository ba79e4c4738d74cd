//! The run folder: stage order, manifest, and the glue between saved tables and stages.
//!
//! Layout: `manifest.json` and one folder per stage (`1-ingest/` ... `5-report/`), each with
//! its table(s), `rejected.csv` and `summary.json`. `run` does every stage; `stage NAME`
//! reruns one from the previous stage's saved output and marks later stages stale.

use crate::glue;
use crate::io;
use crate::stage::Stage;
use anyhow::{bail, Context, Result};
use indicatif::{MultiProgress, ProgressBar, ProgressDrawTarget, ProgressStyle};
use plotsieve_stages::config::TrialConfig;
use plotsieve_stages::progress::{Event, Progress};
use plotsieve_stages::table::StageSummary;
use plotsieve_stages::{ingest, simulate};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::collections::BTreeMap;
use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::time::Instant;

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
    let cfg = TrialConfig::from_toml(&text, &trial.display().to_string(), set)?;
    let base = trial.parent().map(Path::to_path_buf).unwrap_or_default();
    let base = if base.as_os_str().is_empty() {
        PathBuf::from(".")
    } else {
        base
    };
    Ok(Trial {
        path: trial.to_path_buf(),
        base,
        cfg,
    })
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

/// Remove a stage's folder: its outputs no longer hold (the stage is about to run again,
/// failed, or an upstream stage changed), and a file left there would look current.
fn clear_stage(out: &Path, stage: Stage) -> Result<()> {
    let d = out.join(stage.dir());
    if d.exists() {
        std::fs::remove_dir_all(&d).with_context(|| format!("removing {}", d.display()))?;
    }
    Ok(())
}

/// Temporary files a killed write left in the run folder (`.NAME.PID.tmp`, see
/// `io::write_atomic`); stage folders go as a whole when their stage reruns.
fn remove_stale_temporaries(out: &Path) -> Result<()> {
    let Ok(entries) = std::fs::read_dir(out) else {
        return Ok(());
    };
    for e in entries.flatten() {
        let name = e.file_name().to_string_lossy().to_string();
        if name.starts_with('.') && name.ends_with(".tmp") && e.path().is_file() {
            std::fs::remove_file(e.path())
                .with_context(|| format!("removing {}", e.path().display()))?;
        }
    }
    Ok(())
}

/// A manifest record for a stage that has not finished.
fn unfinished(status: &str, error: String) -> StageRecord {
    StageRecord {
        status: status.into(),
        seconds: 0.0,
        unit: String::new(),
        count_in: 0,
        kept: 0,
        rejected: 0,
        settings: serde_json::Value::Null,
        error,
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

fn hash_inputs(t: &Trial) -> Result<Vec<InputHash>> {
    let mut paths = vec![t.path.clone()];
    if !t.cfg.inputs.plot_table.is_empty() {
        paths.push(t.base.join(&t.cfg.inputs.plot_table));
    } else {
        for p in ingest::monitor_files(&t.cfg, &t.base)? {
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
    // A Shapefile is its .shp with the files beside it.
    let sidecars: Vec<PathBuf> = paths
        .iter()
        .filter(|p| p.extension().is_some_and(|e| e.eq_ignore_ascii_case("shp")))
        .flat_map(|p| ["shx", "dbf", "prj"].map(|e| p.with_extension(e)))
        .filter(|p| p.is_file())
        .collect();
    paths.extend(sidecars);
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

fn settings_of(cfg: &TrialConfig, stage: Stage) -> serde_json::Value {
    let v = serde_json::to_value(cfg).unwrap_or_default();
    let pick = |k: &str| v.get(k).cloned().unwrap_or_default();
    match stage {
        Stage::Ingest => {
            serde_json::json!({"inputs": pick("inputs"), "columns": pick("columns"), "ingest": pick("ingest")})
        }
        Stage::Clean => serde_json::json!({"trial": pick("trial"), "clean": pick("clean")}),
        Stage::Plots => pick("plots"),
        Stage::Adjust => serde_json::json!({"check": cfg.trial.check, "adjust": pick("adjust")}),
        Stage::Report => pick("report"),
    }
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

/// The stage bar and, below it, a bar for the stage's inner work (both hidden with
/// `--quiet` or when stderr is not a terminal).
fn progress(n: u64, quiet: bool) -> (MultiProgress, ProgressBar, ProgressBar) {
    let mp = MultiProgress::with_draw_target(if quiet || !std::io::stderr().is_terminal() {
        ProgressDrawTarget::hidden()
    } else {
        ProgressDrawTarget::stderr()
    });
    let pb = mp.add(ProgressBar::new(n));
    pb.set_style(
        ProgressStyle::with_template("{spinner} stage {pos}/{len} {msg} [{elapsed}]")
            .expect("static template")
            .tick_chars("-\\|/ "),
    );
    pb.enable_steady_tick(std::time::Duration::from_millis(120));
    let inner = mp.add(ProgressBar::new(0));
    inner.set_style(
        ProgressStyle::with_template("  [{bar:30}] {pos}/{len} {msg}")
            .expect("static template")
            .progress_chars("=> "),
    );
    (mp, pb, inner)
}

/// Run the given stages in order, updating the manifest after each.
fn run_stages(
    stages: &[Stage],
    t: &Trial,
    out: &Path,
    mut manifest: Manifest,
    quiet: bool,
) -> Result<()> {
    remove_stale_temporaries(out)?;
    let (_mp, pb, inner) = progress(stages.len() as u64, quiet);
    let bar = inner.clone();
    let report = Progress::new(move |e| match e {
        Event::Start { total, what } => {
            bar.set_length(total);
            bar.set_position(0);
            bar.set_message(what);
        }
        Event::Step(n) => bar.inc(n),
    });
    for &stage in stages {
        pb.set_message(stage.name());
        inner.set_message("");
        inner.reset();
        inner.set_length(0);
        // This stage's and every later stage's outputs stop holding now: remove them and say
        // so in the manifest before anything runs, so that a failed or killed run never
        // leaves an old table or report looking current.
        for s in Stage::ALL.iter().filter(|s| **s >= stage) {
            clear_stage(out, *s)?;
            if *s > stage {
                if let Some(r) = manifest.stages.get_mut(s.name()) {
                    r.status = "stale".into();
                }
            }
        }
        manifest
            .stages
            .insert(stage.name().into(), unfinished("running", String::new()));
        io::write_json(&out.join("manifest.json"), &manifest)?;
        let start = Instant::now();
        let summary = match glue::execute(stage, t, out, &report) {
            Ok(s) => s,
            Err(e) => {
                let e = e.context(format!("stage {}", stage.name()));
                clear_stage(out, stage)?;
                manifest
                    .stages
                    .insert(stage.name().into(), unfinished("failed", format!("{e:#}")));
                io::write_json(&out.join("manifest.json"), &manifest)?;
                return Err(e);
            }
        };
        // Warnings are said on the terminal too, --quiet or not.
        for w in summary.warnings() {
            eprintln!("warning: stage {}: {w}", stage.name());
        }
        manifest.stages.insert(
            stage.name().into(),
            StageRecord {
                status: "done".into(),
                seconds: (start.elapsed().as_secs_f64() * 1000.0).round() / 1000.0,
                unit: summary.unit.clone(),
                count_in: summary.count_in,
                kept: summary.kept,
                rejected: summary.rejected,
                settings: settings_of(&t.cfg, stage),
                error: String::new(),
            },
        );
        for later in Stage::ALL.iter().filter(|s| **s > stage) {
            if let Some(r) = manifest.stages.get_mut(later.name()) {
                if !stages.contains(later) {
                    r.status = "stale".into();
                }
            }
        }
        manifest.config = serde_json::to_value(&t.cfg)?;
        io::write_json(&out.join("manifest.json"), &manifest)?;
        pb.inc(1);
    }
    inner.finish_and_clear();
    pb.finish_and_clear();
    Ok(())
}

fn new_manifest(t: &Trial) -> Result<Manifest> {
    let mut m = new_manifest_without_inputs(t)?;
    m.inputs = hash_inputs(t)?;
    Ok(m)
}

fn new_manifest_without_inputs(t: &Trial) -> Result<Manifest> {
    Ok(Manifest {
        tool: "plotsieve".into(),
        version: env!("CARGO_PKG_VERSION").into(),
        trial_file: t.path.display().to_string(),
        config: serde_json::to_value(&t.cfg)?,
        inputs: Vec::new(),
        stages: BTreeMap::new(),
    })
}

/// `plotsieve run`.
pub fn run_all(trial: &Path, out: Option<PathBuf>, set: &[String], quiet: bool) -> Result<()> {
    let t = load(trial, set)?;
    let out = out.unwrap_or_else(|| default_out(trial));
    let _lock = crate::lock::FolderLock::acquire(&out, "run folder")?;
    std::fs::create_dir_all(&out)
        .with_context(|| format!("creating run folder {}", out.display()))?;
    let manifest = new_manifest(&t)?;
    run_stages(&Stage::ALL, &t, &out, manifest, quiet)?;
    if !quiet {
        let report = out.join(Stage::Report.dir());
        eprintln!(
            "done: {}; the reports are {} and {}",
            out.display(),
            report.join("report.html").display(),
            report.join("report.md").display()
        );
    }
    Ok(())
}

/// `plotsieve stage NAME`.
pub fn run_one(
    stage: Stage,
    trial: &Path,
    out: Option<PathBuf>,
    set: &[String],
    quiet: bool,
) -> Result<()> {
    let t = load(trial, set)?;
    let out = out.unwrap_or_else(|| default_out(trial));
    let _lock = crate::lock::FolderLock::acquire(&out, "run folder")?;
    let table_entry = stage == Stage::Adjust && !t.cfg.adjust.plot_table.is_empty();
    let mut manifest = match (read_manifest(&out)?, stage) {
        (Some(m), _) => m,
        (None, Stage::Ingest) => new_manifest(&t)?,
        (None, Stage::Adjust) if table_entry => {
            // Plot-table entry: the trial file and the table are the inputs.
            let mut m = new_manifest_without_inputs(&t)?;
            for p in [t.path.clone(), t.base.join(&t.cfg.adjust.plot_table)] {
                let (bytes, sha256) = sha256_file(&p)?;
                m.inputs.push(InputHash { path: p.display().to_string(), bytes, sha256 });
            }
            m
        }
        (None, _) => bail!(
            "{} has no manifest.json: run stage ingest first (plotsieve stage ingest {} --out {}), or plotsieve run",
            out.display(),
            trial.display(),
            out.display()
        ),
    };
    if stage != Stage::Ingest && !table_entry {
        same_trial(&manifest, &t, &out)?;
        unchanged_inputs(&manifest, &t)?;
    }
    if let Some(prev) = stage.previous().filter(|_| !table_entry) {
        let status = manifest.stages.get(prev.name()).map(|r| r.status.as_str());
        match status {
            Some("done") => {}
            Some(s) => bail!(
                "stage {} needs stage {}, which is {s}: rerun stage {} first",
                stage.name(),
                prev.name(),
                prev.name()
            ),
            None => bail!(
                "stage {} needs the output of stage {} in {}: run stage {} first",
                stage.name(),
                prev.name(),
                out.join(prev.dir()).display(),
                prev.name()
            ),
        }
    }
    if stage == Stage::Ingest {
        manifest.inputs = hash_inputs(&t)?;
    }
    std::fs::create_dir_all(&out)?;
    run_stages(&[stage], &t, &out, manifest, quiet)?;
    if !quiet {
        eprintln!("done: stage {} in {}", stage.name(), out.display());
        if stage == Stage::Report {
            let report = out.join(Stage::Report.dir());
            eprintln!(
                "the reports are {} and {}",
                report.join("report.html").display(),
                report.join("report.md").display()
            );
        }
    }
    Ok(())
}

/// The run folder must hold a run of this trial: the same trial file (where both can be
/// found) and the same trial name.
fn same_trial(m: &Manifest, t: &Trial, out: &Path) -> Result<()> {
    let same_file = match (
        std::fs::canonicalize(&m.trial_file),
        std::fs::canonicalize(&t.path),
    ) {
        (Ok(a), Ok(b)) => a == b,
        _ => true,
    };
    let name = m.config["trial"]["name"].as_str().unwrap_or_default();
    if !same_file || name != t.cfg.trial.name {
        bail!(
            "{} holds a run of trial file {} ({name:?}), not of {} ({:?}): give this trial its own --out, or use plotsieve run to start this folder over",
            out.display(),
            m.trial_file,
            t.path.display(),
            t.cfg.trial.name
        );
    }
    Ok(())
}

/// The input files (exports, plots, design) must be those ingest read: a stage rerun on
/// outputs made from other inputs would mix two versions of the data.
fn unchanged_inputs(m: &Manifest, t: &Trial) -> Result<()> {
    let now = hash_inputs(t)?;
    let trial_file = now.first().map(|h| h.path.clone()).unwrap_or_default();
    let before: BTreeMap<&str, &str> = m
        .inputs
        .iter()
        .skip(1)
        .map(|h| (h.path.as_str(), h.sha256.as_str()))
        .collect();
    let after: BTreeMap<&str, &str> = now
        .iter()
        .filter(|h| h.path != trial_file)
        .map(|h| (h.path.as_str(), h.sha256.as_str()))
        .collect();
    let mut changed = Vec::new();
    for (p, h) in &after {
        match before.get(p) {
            Some(b) if b == h => {}
            Some(_) => changed.push(format!("{p} (changed)")),
            None => changed.push(format!("{p} (new)")),
        }
    }
    for p in before.keys().filter(|p| !after.contains_key(*p)) {
        changed.push(format!("{p} (gone)"));
    }
    if !changed.is_empty() {
        bail!(
            "the inputs differ from those stage ingest read: {}; rerun from stage ingest (plotsieve run) to use them",
            changed.join(", ")
        );
    }
    Ok(())
}

/// `plotsieve check`.
pub fn check(trial: &Path, set: &[String]) -> Result<()> {
    let t = load(trial, set)?;
    if !t.cfg.inputs.plot_table.is_empty() {
        return check_plot_table(trial, &t);
    }
    let found = ingest::check(&t.cfg, &t.base);
    let (read_as, found): (Vec<String>, Vec<String>) =
        found.into_iter().partition(|p| p.starts_with("read: "));
    for r in &read_as {
        println!("{r}");
    }
    let (mut warnings, mut problems): (Vec<String>, Vec<String>) =
        found.into_iter().partition(|p| p.starts_with("warning: "));
    // With inputs that parse and a design that fits the plots, run the front half in
    // memory to find what would go wrong later. Plot-table entry has no front half.
    if problems.is_empty() && t.cfg.adjust.plot_table.is_empty() {
        match crate::dry_run::front_half(&t.cfg, &t.base) {
            Ok((w, p)) => {
                warnings.extend(w.into_iter().map(|w| format!("warning: {w}")));
                problems.extend(p);
            }
            Err(e) => problems.push(format!("{e:#}")),
        }
    }
    for w in &warnings {
        println!("{w}");
    }
    verdict(trial, &problems)
}

/// check's last word: every problem, and an error when there is one.
fn verdict(trial: &Path, problems: &[String]) -> Result<()> {
    if problems.is_empty() {
        println!("{}: configuration and inputs look right", trial.display());
        Ok(())
    } else {
        for p in problems {
            println!("problem: {p}");
        }
        bail!("{}: {} problem(s) found", trial.display(), problems.len())
    }
}

/// `plotsieve check` of a plot-table trial: the table read and validated as run would, and
/// the fields adjust could not fit.
fn check_plot_table(trial: &Path, t: &Trial) -> Result<()> {
    let cfg = &t.cfg;
    let name = &cfg.inputs.plot_table;
    let crop = cfg.crop()?;
    let mut problems = Vec::new();
    match ingest::plot_table::read_input(cfg, &t.base, name, &crop).and_then(|t| t.usable(name)) {
        Err(e) => problems.push(e.to_string()),
        Ok(table) => {
            println!("read: {name}: {}", table.read_as);
            for r in &table.rejections {
                println!(
                    "warning: {name}, {} {}, column {}: {} ({:?}; expected {})",
                    table.word, r.source_row, r.column, r.rule, r.value, r.limit
                );
            }
            if let Some(w) = table.bounds_warning(name, &crop) {
                println!("warning: {w}");
            }
            for w in ingest::layout_checks::design_warnings_of_plots(&table.plots) {
                println!("warning: {w}");
            }
            let unit = plotsieve_stages::crop::YieldUnit::new(cfg.trial.output_unit, &crop);
            let s = cfg
                .adjust
                .checked(&cfg.trial.check, unit.kg_ha_per_unit(), crop.bushel_lb);
            for u in plotsieve_stages::adjust::unfittable_fields(&table.plots, &s) {
                if cfg.adjust.allow_missing_fields {
                    println!("warning: adjust: missing from the result: {u}");
                } else {
                    problems.push(format!("adjust: {u}"));
                }
            }
        }
    }
    verdict(trial, &problems)
}

/// `plotsieve simulate`.
pub fn simulate(dir: &Path, o: &simulate::SimOptions) -> Result<()> {
    if o.fields == 0 || o.blocks < 2 {
        bail!(
            "simulate needs at least one field and two blocks (got --fields {} --blocks {})",
            o.fields,
            o.blocks
        );
    }
    if !(1..=5).contains(&o.interval_s) {
        bail!("--interval-s must be 1 to 5 seconds (got {})", o.interval_s);
    }
    if !(o.point_noise_kg_ha >= 0.0 && o.point_noise_kg_ha.is_finite()) {
        bail!(
            "--point-noise must be a number >= 0 (got {})",
            o.point_noise_kg_ha
        );
    }
    if let Some(d) = o.flow_delay_s {
        if !(0.0..=30.0).contains(&d) {
            bail!("--flow-delay must be between 0 and 30 s (got {d})");
        }
    }
    let sim = simulate::generate(o);
    // Task data: every field's records as one task-data set, written into a temporary
    // folder and renamed.
    let logs: Vec<(String, String)> = sim
        .files
        .iter()
        .filter(|(rel, _)| rel.ends_with(".taskdata"))
        .map(|(rel, text)| {
            let field = rel
                .trim_start_matches("monitor/")
                .trim_end_matches(".taskdata");
            (format!("harvest {field}"), text.clone())
        })
        .collect();
    if !logs.is_empty() {
        let to = dir.join("monitor/TASKDATA");
        let tmp = dir.join(format!("monitor/.TASKDATA.{}.tmp", std::process::id()));
        let _ = std::fs::remove_dir_all(&tmp);
        ingest::formats::taskdata::write_set(&tmp, &logs)
            .map_err(|e| anyhow::anyhow!("writing {}: {e}", to.display()))?;
        if to.exists() {
            std::fs::remove_dir_all(&to)?;
        }
        std::fs::rename(&tmp, &to)?;
    }
    for (rel, text) in &sim.files {
        let path = dir.join(rel);
        if rel.ends_with(".taskdata") {
            continue;
        } else if rel.ends_with(".shp") {
            // The .shp, .shx, .dbf and .prj are written together, then the stale ones of an
            // earlier run are gone.
            std::fs::create_dir_all(path.parent().unwrap_or(dir))?;
            for ext in ["shp", "shx", "dbf", "prj"] {
                let _ = std::fs::remove_file(path.with_extension(ext));
            }
            ingest::layers::write_point_shapefile(&path, text)
                .map_err(|e| anyhow::anyhow!("writing {}: {e}", path.display()))?;
        } else if rel.ends_with(".gpkg") {
            // A GeoPackage is written whole into a temporary file, then renamed.
            let parent = path.parent().unwrap_or(dir);
            std::fs::create_dir_all(parent)?;
            let tmp = parent.join(format!(
                ".{}.{}.tmp",
                rel.replace('/', "_"),
                std::process::id()
            ));
            let _ = std::fs::remove_file(&tmp);
            ingest::geopackage::write_points(&tmp, text)
                .map_err(|e| anyhow::anyhow!("writing {}: {e}", path.display()))?;
            std::fs::rename(&tmp, &path)?;
        } else {
            io::write_atomic(&path, text.as_bytes())?;
        }
    }
    println!(
        "wrote {} files ({} monitor points) to {}",
        sim.files.len(),
        sim.points,
        dir.display()
    );
    Ok(())
}
