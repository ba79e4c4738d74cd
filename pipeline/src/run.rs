//! `plotsieve run` and `plotsieve stage`: the run folder's stages in order, with the
//! manifest ([`crate::trial`]) kept current and progress shown.
//!
//! Layout: `manifest.json` and one folder per stage (`1-ingest/` ... `5-report/`), each with
//! its table(s), `rejected.csv` and `summary.json`. `run` does every stage; `stage NAME`
//! reruns one from the previous stage's saved output and marks later stages stale.

use crate::glue;
use crate::io;
use crate::stage::Stage;
use crate::trial::{
    default_out, hash_inputs, load, read_manifest, sha256_file, InputHash, Manifest, StageRecord,
    Trial,
};
use anyhow::{bail, Context, Result};
use indicatif::{MultiProgress, ProgressBar, ProgressDrawTarget, ProgressStyle};
use plotsieve_stages::config::TrialConfig;
use plotsieve_stages::progress::{Event, Progress};
use plotsieve_stages::table::StageSummary;
use std::collections::BTreeMap;
use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::time::Instant;

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

/// A stage done computing whose files may still be being written.
struct Finishing {
    stage: Stage,
    summary: StageSummary,
    /// Seconds from its start to the end of its computing.
    seconds: f64,
    later: glue::Later,
}

/// A stage that did not finish: the files it left to be written are waited for (their
/// errors are not the first cause), then its folder is removed and the manifest says why.
fn abandon(
    out: &Path,
    manifest: &mut Manifest,
    stage: Stage,
    later: &glue::Later,
    status: &str,
    why: String,
) -> Result<()> {
    later.finish().ok();
    clear_stage(out, stage)?;
    manifest
        .stages
        .insert(stage.name().into(), unfinished(status, why));
    io::write_json(&out.join("manifest.json"), manifest)
}

/// Waits for the stage's files, then records it done in the manifest (its seconds count the
/// wait); a failed write records it failed, clears its folder and returns the error.
fn finish(
    w: Finishing,
    t: &Trial,
    out: &Path,
    stages: &[Stage],
    manifest: &mut Manifest,
) -> Result<()> {
    let start = Instant::now();
    let Finishing {
        stage,
        summary,
        seconds,
        later,
    } = w;
    if let Err(e) = later.finish() {
        let e = e.context(format!("stage {}", stage.name()));
        abandon(out, manifest, stage, &later, "failed", format!("{e:#}"))?;
        return Err(e);
    }
    let seconds = seconds + start.elapsed().as_secs_f64();
    manifest.stages.insert(
        stage.name().into(),
        StageRecord {
            status: "done".into(),
            seconds: (seconds * 1000.0).round() / 1000.0,
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
    io::write_json(&out.join("manifest.json"), manifest)
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
    // Point tables handed from one stage to the next (each stage still writes its files).
    let handoff = std::sync::Mutex::new(glue::Handoff::default());
    // The stage before, done computing, whose files may still be being written while this
    // one runs: recorded done once they are (see `glue::Later`).
    let mut writing: Option<Finishing> = None;
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
        let later = glue::Later::default();
        let result = glue::execute(stage, t, out, &report, &handoff, &later);
        let seconds = start.elapsed().as_secs_f64();
        // The stage before is recorded done once its files are written (or failed).
        if let Some(w) = writing.take() {
            if let Err(e) = finish(w, t, out, stages, &mut manifest) {
                let why = "the stage before it failed".to_string();
                abandon(out, &mut manifest, stage, &later, "stale", why)?;
                return Err(e);
            }
        }
        let summary = match result {
            Ok(s) => s,
            Err(e) => {
                let e = e.context(format!("stage {}", stage.name()));
                abandon(
                    out,
                    &mut manifest,
                    stage,
                    &later,
                    "failed",
                    format!("{e:#}"),
                )?;
                return Err(e);
            }
        };
        // Warnings are said on the terminal too, --quiet or not.
        for w in summary.warnings() {
            eprintln!("warning: stage {}: {w}", stage.name());
        }
        let done = Finishing {
            stage,
            summary,
            seconds,
            later,
        };
        // A stage with every file written is recorded done now (the report reads the
        // manifest's record of the stage before it).
        if done.later.is_empty() {
            finish(done, t, out, stages, &mut manifest)?;
        } else {
            writing = Some(done);
        }
        pb.inc(1);
    }
    if let Some(w) = writing.take() {
        finish(w, t, out, stages, &mut manifest)?;
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
