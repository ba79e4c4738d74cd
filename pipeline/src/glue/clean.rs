//! Clean: `1-ingest/points.parquet` -> `2-clean/points.parquet` (with the yield in the output
//! unit).

use super::{write_stage_tables, Ctx};
use crate::io;
use crate::stage::Stage;
use anyhow::Result;
use plotsieve_stages::clean;
use plotsieve_stages::table::StageSummary;

/// Run the stage against the run folder.
pub fn run(c: &Ctx) -> Result<StageSummary> {
    let cfg = &c.t.cfg;
    let out = c.out;
    let dir = &c.dir;
    let unit = c.unit;
    let crop = &c.crop;
    let progress = c.progress;
    let epsg = c.epsg()?;
    let pts = io::read_points(&out.join(Stage::Ingest.dir()).join("points.parquet"), epsg)?;
    let o = clean::run_with(&pts, &cfg.clean, crop, progress);
    let y: Vec<f64> = o
        .points
        .iter()
        .map(|p| unit.to_unit(p.yield_std_kg_ha))
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
