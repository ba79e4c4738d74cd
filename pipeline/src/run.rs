//! The run folder: stage order, manifest, and the glue between saved tables and stages.
//!
//! Layout: `manifest.json` and one folder per stage (`1-ingest/` ... `5-report/`), each with
//! its table(s), `rejected.csv` and `summary.json`. `run` does every stage; `stage NAME`
//! reruns one from the previous stage's saved output and marks later stages stale.

use crate::io;
use crate::stage::Stage;
use anyhow::{anyhow, bail, Context, Result};
use indicatif::{MultiProgress, ProgressBar, ProgressDrawTarget, ProgressStyle};
use plotsieve_stages::config::TrialConfig;
use plotsieve_stages::progress::{Event, Progress};
use plotsieve_stages::table::{Rejection, StageSummary};
use plotsieve_stages::{adjust, clean, ingest, plots, report, simulate};
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

fn default_out(trial: &Path) -> PathBuf {
    let stem = trial
        .file_stem()
        .and_then(|s| s.to_str())
        .unwrap_or("trial");
    PathBuf::from("runs").join(stem)
}

fn sha256_file(path: &Path) -> Result<(u64, String)> {
    let bytes = std::fs::read(path).with_context(|| format!("reading {}", path.display()))?;
    let digest = Sha256::digest(&bytes);
    Ok((
        bytes.len() as u64,
        digest.iter().map(|b| format!("{b:02x}")).collect(),
    ))
}

fn hash_inputs(t: &Trial) -> Result<Vec<InputHash>> {
    let mut paths = vec![t.path.clone()];
    paths.extend(ingest::monitor_files(&t.cfg, &t.base)?);
    if !t.cfg.inputs.plots.is_empty() {
        paths.push(t.base.join(&t.cfg.inputs.plots));
    }
    paths.push(t.base.join(&t.cfg.inputs.design));
    paths
        .iter()
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
        .collect()
}

fn read_manifest(out: &Path) -> Result<Option<Manifest>> {
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

fn read_summary(out: &Path, stage: Stage) -> Result<StageSummary> {
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

fn write_stage_tables(dir: &Path, rejections: &[Rejection], summary: &StageSummary) -> Result<()> {
    io::write_rejections(&dir.join("rejected.csv"), rejections)?;
    io::write_json(&dir.join("summary.json"), summary)
}

/// Run one stage against the run folder; returns its summary.
fn execute(stage: Stage, t: &Trial, out: &Path, progress: &Progress) -> Result<StageSummary> {
    let cfg = &t.cfg;
    let dir = out.join(stage.dir());
    let unit = cfg.trial.output_unit;
    let crop = cfg.crop()?;
    match stage {
        Stage::Ingest => {
            let o = ingest::run_with(cfg, &t.base, progress)?;
            io::write_points(&dir.join("points.parquet"), &o.points)?;
            io::write_projected_plots(&dir.join("plots.geojson"), &o.polygons, o.points.epsg)?;
            let utm = plotsieve_stages::projection::Utm::from_epsg(o.points.epsg)?;
            io::write_plots_wgs84(
                &dir.join("plots_wgs84.geojson"),
                &utm,
                o.polygons.iter().map(|p| {
                    (
                        p.plot_id.as_str(),
                        p.exterior.as_slice(),
                        serde_json::Map::new(),
                    )
                }),
            )?;
            io::write_design(&dir.join("design.csv"), &o.design)?;
            write_stage_tables(&dir, &o.rejections, &o.summary)?;
            Ok(o.summary)
        }
        Stage::Clean => {
            let epsg = read_summary(out, Stage::Ingest)?
                .details
                .get("epsg")
                .and_then(|v| v.as_u64())
                .ok_or_else(|| anyhow!("1-ingest/summary.json has no epsg; rerun stage ingest"))?
                as u32;
            let pts = io::read_points(&out.join(Stage::Ingest.dir()).join("points.parquet"), epsg)?;
            let o = clean::run_with(&pts, &cfg.clean, &crop, progress);
            let y: Vec<f64> = o
                .points
                .iter()
                .map(|p| unit.from_kg_ha(p.yield_std_kg_ha, &crop))
                .collect();
            let col = format!("yield_{}", unit.suffix());
            io::write_clean_points(
                &dir.join("points.parquet"),
                &pts.files,
                &o.points,
                Some((&col, y)),
                None,
            )?;
            write_stage_tables(&dir, &o.rejections, &o.summary)?;
            Ok(o.summary)
        }
        Stage::Plots => {
            let (files, pts) =
                io::read_clean_points(&out.join(Stage::Clean.dir()).join("points.parquet"))?;
            let ing = out.join(Stage::Ingest.dir());
            let polys = ingest::read_geojson(
                &ing.join("plots.geojson"),
                "1-ingest/plots.geojson",
                "plot_id",
            )?;
            let design = io::read_design(&ing.join("design.csv"))?;
            let o = plots::run(
                &pts,
                &files,
                &polys,
                &design,
                &cfg.inputs.design,
                &cfg.plots,
                unit,
                &crop,
            );
            let kept: Vec<_> = o.assignment.iter().map(|&(i, _)| pts[i].clone()).collect();
            let ids: Vec<&str> = o
                .assignment
                .iter()
                .map(|&(_, k)| o.plots[k].plot_id.as_str())
                .collect();
            let y: Vec<f64> = kept
                .iter()
                .map(|p| unit.from_kg_ha(p.yield_std_kg_ha, &crop))
                .collect();
            let col = format!("yield_{}", unit.suffix());
            io::write_clean_points(
                &dir.join("points.parquet"),
                &files,
                &kept,
                Some((&col, y)),
                Some(ids),
            )?;
            io::write_plots(&dir.join("plots.csv"), &o.plots, unit.suffix())?;
            let epsg = read_summary(out, Stage::Ingest)?
                .details
                .get("epsg")
                .and_then(|v| v.as_u64())
                .unwrap_or(0) as u32;
            let utm = plotsieve_stages::projection::Utm::from_epsg(epsg)?;
            io::write_plots_wgs84(
                &dir.join("plots.geojson"),
                &utm,
                o.plots.iter().filter(|p| !p.net_ring.is_empty()).map(|p| {
                    (
                        p.plot_id.as_str(),
                        p.net_ring.as_slice(),
                        io::plot_properties(p, unit.suffix()),
                    )
                }),
            )?;
            write_stage_tables(&dir, &o.rejections, &o.summary)?;
            Ok(o.summary)
        }
        Stage::Adjust => {
            let plots = if cfg.adjust.plot_table.is_empty() {
                io::read_plots(
                    &out.join(Stage::Plots.dir()).join("plots.csv"),
                    unit.suffix(),
                )?
            } else {
                io::read_plot_table(
                    &t.base.join(&cfg.adjust.plot_table),
                    &cfg.adjust.plot_table,
                    unit.suffix(),
                    cfg.adjust.row_spacing_m,
                    cfg.adjust.range_spacing_m,
                )?
            };
            let s = cfg
                .adjust
                .checked(&cfg.trial.check, unit.from_kg_ha(1000.0, &crop));
            let o = adjust::run_with(&plots, &s, progress)?;
            io::write_adjusted(&dir.join("adjusted_plots.csv"), &o.plots, unit.suffix())?;
            io::write_treatments(&dir.join("treatments.csv"), &o.treatments, unit.suffix())?;
            io::write_hyper(&dir.join("hyperparameters.csv"), &o.hyper, unit.suffix())?;
            io::write_comparison(&dir.join("comparison.csv"), &o.comparisons)?;
            // Kept plots of fields that could not be fitted are this stage's rejections.
            let fitted: std::collections::BTreeSet<&str> =
                o.hyper.iter().map(|h| h.field.as_str()).collect();
            let rejections: Vec<Rejection> = plots
                .iter()
                .filter(|p| p.status == "kept" && !fitted.contains(p.field.as_str()))
                .map(|p| Rejection {
                    source_file: "3-plots/plots.csv".into(),
                    source_row: 0,
                    id: p.plot_id.clone(),
                    rule: "field_not_fitted".into(),
                    column: "field".into(),
                    value: p.field.clone(),
                    limit: "a field with a check, two or more treatments and varying yields".into(),
                })
                .collect();
            let kept_in = plots.iter().filter(|p| p.status == "kept").count() as u64;
            let mut summary =
                StageSummary::from_rejections("adjust", "plots", kept_in, &rejections);
            summary
                .details
                .insert("warnings".into(), serde_json::json!(o.warnings));
            if o.joint_ess.is_finite() {
                summary.details.insert(
                    "joint_effective_draws".into(),
                    serde_json::json!((o.joint_ess * 10.0).round() / 10.0),
                );
            }
            write_stage_tables(&dir, &rejections, &summary)?;
            Ok(summary)
        }
        Stage::Report => {
            let summaries: Vec<StageSummary> =
                [Stage::Ingest, Stage::Clean, Stage::Plots, Stage::Adjust]
                    .iter()
                    .map(|s| read_summary(out, *s))
                    .collect::<Result<_>>()?;
            let adj = out.join(Stage::Adjust.dir());
            let treatments = io::read_treatments(&adj.join("treatments.csv"), unit.suffix())?;
            let hyper = io::read_hyper(&adj.join("hyperparameters.csv"))?;
            let warnings: Vec<String> = summaries[3]
                .details
                .get("warnings")
                .and_then(|w| serde_json::from_value(w.clone()).ok())
                .unwrap_or_default();
            let md = report::markdown(&report::ReportInput {
                trial_name: &cfg.trial.name,
                unit_label: unit.label(),
                check: &cfg.trial.check,
                decimals: cfg.report.decimals as usize,
                summaries: &summaries,
                treatments: &treatments,
                hyper: &hyper,
                warnings: &warnings,
            });
            io::write_atomic(&dir.join("report.md"), md.as_bytes())?;
            // The HTML report: maps of every record, of what each rule removed, of the plots.
            let ing = out.join(Stage::Ingest.dir());
            let epsg = summaries[0]
                .details
                .get("epsg")
                .and_then(|v| v.as_u64())
                .unwrap_or(0) as u32;
            let pts = io::read_points(&ing.join("points.parquet"), epsg)?;
            let mut removed: BTreeMap<String, String> = BTreeMap::new();
            for st in [Stage::Clean, Stage::Plots] {
                for r in io::read_rejections(&out.join(st.dir()).join("rejected.csv"))? {
                    if !r.id.is_empty() && r.source_file != cfg.inputs.design {
                        removed.entry(r.id).or_insert(r.rule);
                    }
                }
            }
            let map_points: Vec<report::html::MapPoint> = pts
                .points
                .iter()
                .map(|p| {
                    let wet = clean::wet_yield_kg_ha(p.flow_kg_s, p.speed_m_s, p.width_m);
                    let std = clean::to_standard_moisture(
                        wet,
                        p.moisture_pct.min(99.0),
                        crop.standard_moisture_pct,
                    );
                    report::html::MapPoint {
                        x: p.x_m,
                        y: p.y_m,
                        yield_unit: unit.from_kg_ha(std, &crop),
                        rule: removed.get(&p.id.to_string()).cloned().unwrap_or_default(),
                    }
                })
                .collect();
            let polygons = ingest::read_geojson(
                &ing.join("plots.geojson"),
                "1-ingest/plots.geojson",
                "plot_id",
            )?;
            let plots_tab = io::read_plots(
                &out.join(Stage::Plots.dir()).join("plots.csv"),
                unit.suffix(),
            )?;
            let adjusted = io::read_adjusted(&adj.join("adjusted_plots.csv"))?;
            let comparisons = io::read_comparison(&adj.join("comparison.csv"))?;
            let settings: Vec<(String, serde_json::Value)> = match read_manifest(out)? {
                Some(m) => m.stages.into_iter().map(|(k, v)| (k, v.settings)).collect(),
                None => Vec::new(),
            };
            let html = report::html::render(&report::html::HtmlInput {
                trial_name: &cfg.trial.name,
                unit_label: unit.label(),
                check: &cfg.trial.check,
                decimals: cfg.report.decimals as usize,
                summaries: &summaries,
                settings: &settings,
                points: &map_points,
                polygons: &polygons,
                plots: &plots_tab,
                adjusted: &adjusted,
                treatments: &treatments,
                hyper: &hyper,
                comparisons: &comparisons,
                warnings: &warnings,
            });
            io::write_atomic(&dir.join("report.html"), html.as_bytes())?;
            let summary = StageSummary {
                stage: "report".into(),
                unit: "plots".into(),
                ..Default::default()
            };
            io::write_json(&dir.join("summary.json"), &summary)?;
            Ok(summary)
        }
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

/// Run the given stages in order, updating the manifest after each.
fn run_stages(
    stages: &[Stage],
    t: &Trial,
    out: &Path,
    mut manifest: Manifest,
    quiet: bool,
) -> Result<()> {
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
        let start = Instant::now();
        let summary =
            execute(stage, t, out, &report).with_context(|| format!("stage {}", stage.name()))?;
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
    std::fs::create_dir_all(&out)
        .with_context(|| format!("creating run folder {}", out.display()))?;
    let manifest = new_manifest(&t)?;
    run_stages(&Stage::ALL, &t, &out, manifest, quiet)?;
    if !quiet {
        eprintln!("done: {}", out.display());
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
    run_stages(&[stage], &t, &out, manifest, quiet)
}

/// `plotsieve check`.
pub fn check(trial: &Path, set: &[String]) -> Result<()> {
    let t = load(trial, set)?;
    let found = ingest::check(&t.cfg, &t.base);
    let (warnings, problems): (Vec<String>, Vec<String>) =
        found.into_iter().partition(|p| p.starts_with("warning: "));
    for w in &warnings {
        println!("{w}");
    }
    if problems.is_empty() {
        println!("{}: configuration and inputs look right", trial.display());
        Ok(())
    } else {
        for p in &problems {
            println!("problem: {p}");
        }
        bail!("{}: {} problem(s) found", trial.display(), problems.len())
    }
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
    if let Some(d) = o.flow_delay_s {
        if !(0.0..=30.0).contains(&d) {
            bail!("--flow-delay must be between 0 and 30 s (got {d})");
        }
    }
    let sim = simulate::generate(o);
    for (rel, text) in &sim.files {
        io::write_atomic(&dir.join(rel), text.as_bytes())?;
    }
    println!(
        "wrote {} files ({} monitor points) to {}",
        sim.files.len(),
        sim.points,
        dir.display()
    );
    Ok(())
}
