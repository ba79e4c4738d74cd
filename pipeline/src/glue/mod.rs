//! The glue between the run folder and the stages, one file per stage: each reads the
//! previous stage's saved tables, calls the stage and writes the stage's tables,
//! `rejected.csv` and `summary.json` (all through [`crate::io`]).
//!
//! To add a stage: a variant in `crate::stage::Stage`, a module in `plotsieve-stages`, a
//! file here with `pub fn run(c: &Ctx) -> Result<StageSummary>`, and its arm in [`execute`].

mod adjust;
mod clean;
mod ingest;
mod plots;
mod report;

use crate::io;
use crate::stage::Stage;
use crate::trial::{read_summary, Trial};
use anyhow::{anyhow, bail, Result};
use plotsieve_stages::crop::{Crop, YieldUnit};
use plotsieve_stages::plots::PlotStats;
use plotsieve_stages::progress::Progress;
use plotsieve_stages::table::{Rejection, StageSummary};
use std::path::{Path, PathBuf};

/// What a missing adjust table says to do.
pub(crate) const ADJUST_FIRST: &str = "run stage adjust first";

/// What every stage's glue reads once: the trial, the run folder, the stage's own folder,
/// the output unit and the crop.
pub struct Ctx<'a> {
    pub t: &'a Trial,
    pub out: &'a Path,
    pub dir: PathBuf,
    /// The output unit (tables hold yields in it; stages work in kg/ha).
    pub unit: YieldUnit,
    pub crop: Crop,
    pub progress: &'a Progress,
}

impl<'a> Ctx<'a> {
    /// Plot-table entry: the trial's input is a table of plot yields (`inputs.plot_table`).
    pub fn table_entry(&self) -> bool {
        !self.t.cfg.inputs.plot_table.is_empty()
    }

    /// The EPSG code of the projected coordinates, from ingest's summary.
    pub fn epsg(&self) -> Result<u32> {
        read_summary(self.out, Stage::Ingest)?
            .details
            .get("epsg")
            .and_then(|v| v.as_u64())
            .map(|v| v as u32)
            .ok_or_else(|| anyhow!("1-ingest/summary.json has no epsg; rerun stage ingest"))
    }
}

/// Run one stage against the run folder; returns its summary.
pub fn execute(stage: Stage, t: &Trial, out: &Path, progress: &Progress) -> Result<StageSummary> {
    let crop = t.cfg.crop()?;
    let c = Ctx {
        t,
        out,
        dir: out.join(stage.dir()),
        unit: YieldUnit::new(t.cfg.trial.output_unit, &crop),
        crop,
        progress,
    };
    match stage {
        Stage::Ingest => ingest::run(&c),
        Stage::Clean => clean::run(&c),
        Stage::Plots => plots::run(&c),
        Stage::Adjust => adjust::run(&c),
        Stage::Report => report::run(&c),
    }
}

/// A stage's `rejected.csv` and `summary.json`.
fn write_stage_tables(dir: &Path, rejections: &[Rejection], summary: &StageSummary) -> Result<()> {
    io::write_table(&dir.join("rejected.csv"), rejections, &YieldUnit::NONE)?;
    io::write_json(&dir.join("summary.json"), summary)
}

/// `3-plots/plots.csv` (at least one plot).
fn read_plots(out: &Path, u: &YieldUnit) -> Result<Vec<PlotStats>> {
    let path = out.join(Stage::Plots.dir()).join("plots.csv");
    let plots: Vec<PlotStats> = io::read_table(&path, u, "run stage plots first")?;
    if plots.is_empty() {
        bail!("{}: no plots", path.display());
    }
    Ok(plots)
}
