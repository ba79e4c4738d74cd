//! Clean: `1-ingest/points.parquet` -> `2-clean/points.parquet` (with the yield in the output
//! unit).

use super::{write_stage_tables, Ctx};
use crate::io;
use crate::stage::Stage;
use anyhow::Result;
use plotsieve_stages::table::StageSummary;
use plotsieve_stages::{clean, ingest};

/// Run the stage against the run folder.
pub fn run(c: &Ctx) -> Result<StageSummary> {
    let cfg = &c.t.cfg;
    if c.table_entry() {
        // Plot yields come weighed: there are no records to clean.
        let mut summary = StageSummary::from_rejections("clean", "points", 0, &[]);
        summary.details.insert(
            "skipped".into(),
            serde_json::json!(
                "plot-table entry: the table gives plot yields, there are no monitor records"
            ),
        );
        write_stage_tables(&c.dir, &[], &summary)?;
        return Ok(summary);
    }
    let out = c.out;
    let dir = &c.dir;
    let unit = c.unit;
    let crop = &c.crop;
    let progress = c.progress;
    let ing = out.join(Stage::Ingest.dir());
    let pts = match c.take_ingested() {
        Some(p) => p,
        None => std::sync::Arc::new(io::read_points(&ing.join("points.parquet"), c.epsg()?)?),
    };
    // The plots by treatment, so that rules comparing a record with its neighbours never
    // compare across treatments.
    let polygons = ingest::read_geojson(
        &ing.join("plots.geojson"),
        "1-ingest/plots.geojson",
        "plot_id",
    )?;
    let design = io::read_table(&ing.join("design.csv"), &unit, "run stage ingest first")?;
    let zones = clean::zones::Zones::new(&polygons, &design);
    let o = clean::run_with(&pts, &cfg.clean, crop, Some(&zones), progress);
    // The kept points carry their records: the records read back are no longer needed.
    let files = pts.files.clone();
    drop(pts);
    let y: Vec<f64> = o
        .points
        .iter()
        .map(|p| unit.to_unit(p.yield_std_kg_ha))
        .collect();
    let col = format!("yield_{}", unit.suffix());
    // The point table and the rejection log are written on threads of their own while the
    // next stage runs on the points handed to it (the same points: see `Ctx::hand_cleaned`).
    let points = c.hand_cleaned(&files, o.points);
    let path = dir.join("points.parquet");
    c.write_later(move || io::write_clean_points(&path, &files, &points, Some((&col, y)), None));
    let (dir, rejections) = (dir.clone(), o.rejections);
    let summary = o.summary.clone();
    c.write_later(move || write_stage_tables(&dir, &rejections, &summary));
    Ok(o.summary)
}
