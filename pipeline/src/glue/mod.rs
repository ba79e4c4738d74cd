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
use plotsieve_stages::table::{CleanPoint, PointSet, Rejection, StageSummary};
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use std::thread::JoinHandle;

/// What a missing adjust table says to do.
pub(crate) const ADJUST_FIRST: &str = "run stage adjust first";

/// The point tables a stage hands to the next one inside one `run`, so that the next stage
/// need not read back what was just written. The files are written all the same, and a stage
/// rerun alone reads them: it sees the same values (the Parquet columns hold the f64 values as
/// they are in memory, and [`io::as_read_back`] gives the file list and given yields as
/// reading back rebuilds them; tested in `io`).
#[derive(Default)]
pub struct Handoff {
    /// Ingest's records, as `1-ingest/points.parquet` holds them.
    ingested: Option<Arc<PointSet>>,
    /// Clean's kept points and their source files, as `2-clean/points.parquet` holds them.
    cleaned: Option<(Vec<String>, Arc<Vec<CleanPoint>>)>,
}

impl Handoff {
    /// What of the tables handed on the stage `next` may use: those of the stage before it.
    fn for_stage(self, next: Stage) -> Handoff {
        match next {
            Stage::Clean => Handoff {
                ingested: self.ingested,
                cleaned: None,
            },
            Stage::Plots => Handoff {
                ingested: None,
                cleaned: self.cleaned,
            },
            _ => Handoff::default(),
        }
    }
}

/// The handed tables (a stage that panicked while holding them left nothing inconsistent:
/// each is whole or absent).
fn lock(h: &Mutex<Handoff>) -> std::sync::MutexGuard<'_, Handoff> {
    h.lock().unwrap_or_else(|e| e.into_inner())
}

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
    /// Tables from the stage before, when it ran in this same process.
    handoff: &'a Mutex<Handoff>,
    later: &'a Later,
}

impl<'a> Ctx<'a> {
    /// Plot-table entry: the trial's input is a table of plot yields (`inputs.plot_table`).
    pub fn table_entry(&self) -> bool {
        !self.t.cfg.inputs.plot_table.is_empty()
    }

    /// Ingest's records handed on in memory (see [`Handoff`]), if ingest ran just before.
    pub fn take_ingested(&self) -> Option<Arc<PointSet>> {
        lock(self.handoff).ingested.take()
    }

    /// Clean's points handed on in memory, if clean ran just before.
    pub fn take_cleaned(&self) -> Option<(Vec<String>, Arc<Vec<CleanPoint>>)> {
        lock(self.handoff).cleaned.take()
    }

    /// Ingest's records as reading them back would give them, handed to the next stage
    /// (shared with the writer of the point table, whose bytes are the same either way:
    /// see [`io::as_read_back`]).
    pub fn hand_ingested(&self, mut set: PointSet) -> Arc<PointSet> {
        set.files = io::as_read_back(&set.files, &mut set.points, |p| p);
        let set = Arc::new(set);
        lock(self.handoff).ingested = Some(set.clone());
        set
    }

    /// Clean's points as reading them back would give them, handed to the next stage (and
    /// shared with the writer of the point table, as for ingest).
    pub fn hand_cleaned(
        &self,
        files: &[String],
        mut points: Vec<CleanPoint>,
    ) -> Arc<Vec<CleanPoint>> {
        let files = io::as_read_back(files, &mut points, |c| &mut c.base);
        let points = Arc::new(points);
        lock(self.handoff).cleaned = Some((files, points.clone()));
        points
    }

    /// Writes a file of the stage on a thread of its own, so that the next stage of a `run`
    /// computes meanwhile (see [`Later`]). Only for files no later stage of a `run` reads
    /// before the stage is recorded done: the point tables (handed on in memory) and what
    /// only the report reads.
    pub fn write_later(&self, write: impl FnOnce() -> Result<()> + Send + 'static) {
        let handle = std::thread::spawn(write);
        self.later
            .0
            .lock()
            .unwrap_or_else(|e| e.into_inner())
            .push(handle);
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

/// Run one stage against the run folder; returns its summary. `handoff` carries tables from
/// one stage to the next in a `run` (see [`Handoff`]); a stage with nothing handed reads the
/// run folder.
pub fn execute(
    stage: Stage,
    t: &Trial,
    out: &Path,
    progress: &Progress,
    handoff: &Mutex<Handoff>,
    later: &Later,
) -> Result<StageSummary> {
    let crop = t.cfg.crop()?;
    let c = Ctx {
        t,
        out,
        dir: out.join(stage.dir()),
        unit: YieldUnit::new(t.cfg.trial.output_unit, &crop),
        crop,
        progress,
        handoff,
        later,
    };
    // A table is handed to the stage right after the one that made it, or to none.
    let handed = std::mem::take(&mut *lock(handoff));
    *lock(handoff) = handed.for_stage(stage);
    match stage {
        Stage::Ingest => ingest::run(&c),
        Stage::Clean => clean::run(&c),
        Stage::Plots => plots::run(&c),
        Stage::Adjust => adjust::run(&c),
        Stage::Report => report::run(&c),
    }
}

/// The files a stage left to be written on threads of their own ([`Ctx::write_later`]): the
/// run records the stage done only after [`Later::finish`], and waits for them before it
/// clears the stage's folder after a failure.
#[derive(Default)]
pub struct Later(Mutex<Vec<JoinHandle<Result<()>>>>);

impl Later {
    /// Whether the stage left no file to be written.
    pub fn is_empty(&self) -> bool {
        self.0.lock().unwrap_or_else(|e| e.into_inner()).is_empty()
    }

    /// Waits for every file left to be written; the first error (a writer that panicked is
    /// an error too).
    pub fn finish(&self) -> Result<()> {
        let handles = std::mem::take(&mut *self.0.lock().unwrap_or_else(|e| e.into_inner()));
        let mut result = Ok(());
        for h in handles {
            let r = h
                .join()
                .unwrap_or_else(|_| Err(anyhow!("writing a file of the stage panicked")));
            if result.is_ok() {
                result = r;
            }
        }
        result
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn files_written_later_are_all_waited_for_and_the_first_failure_is_said() {
        let later = Later::default();
        assert!(later.is_empty());
        assert!(later.finish().is_ok());
        let done = Arc::new(std::sync::atomic::AtomicUsize::new(0));
        let push = |f: Box<dyn FnOnce() -> Result<()> + Send>| {
            later.0.lock().unwrap().push(std::thread::spawn(f));
        };
        let d = done.clone();
        push(Box::new(move || {
            std::thread::sleep(std::time::Duration::from_millis(50));
            d.fetch_add(1, std::sync::atomic::Ordering::SeqCst);
            Ok(())
        }));
        push(Box::new(|| bail!("disk full writing points.parquet")));
        push(Box::new(|| panic!("a writer panicked")));
        let d = done.clone();
        push(Box::new(move || {
            d.fetch_add(1, std::sync::atomic::Ordering::SeqCst);
            bail!("second failure")
        }));
        assert!(!later.is_empty());
        let e = later.finish().unwrap_err().to_string();
        assert_eq!(e, "disk full writing points.parquet");
        // Every writer ran to its end before finish returned, and none is left.
        assert_eq!(done.load(std::sync::atomic::Ordering::SeqCst), 2);
        assert!(later.is_empty());
        // A panic alone is an error too.
        push(Box::new(|| panic!("a writer panicked")));
        let e = later.finish().unwrap_err().to_string();
        assert!(e.contains("panicked"), "{e}");
    }
}
