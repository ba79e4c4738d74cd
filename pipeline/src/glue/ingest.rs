//! Ingest: exports, plot polygons and the design -> `1-ingest/` (points.parquet, plots.geojson
//! projected, plots_wgs84.geojson, design.csv).

use super::{write_stage_tables, Ctx};
use crate::io;
use anyhow::Result;
use plotsieve_stages::ingest;
use plotsieve_stages::table::StageSummary;

/// Run the stage against the run folder.
pub fn run(c: &Ctx) -> Result<StageSummary> {
    let cfg = &c.t.cfg;
    let t = c.t;
    let dir = &c.dir;
    let progress = c.progress;
    if c.table_entry() {
        return plot_table(c);
    }
    let o = ingest::run_with(&cfg.for_ingest(), &t.base, progress)?;
    let utm = plotsieve_stages::projection::Utm::from_epsg(o.points.epsg)?;
    let epsg = o.points.epsg;
    // The point table is written on a thread of its own while the next stage runs on the
    // records handed to it (the same records: see `Ctx::hand_ingested`).
    let set = c.hand_ingested(o.points);
    let path = dir.join("points.parquet");
    c.write_later(move || io::write_points(&path, &set));
    io::write_projected_plots(&dir.join("plots.geojson"), &o.polygons, epsg)?;
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
    io::write_table(&dir.join("design.csv"), &o.design, &c.unit)?;
    write_stage_tables(dir, &o.rejections, &o.summary)?;
    Ok(o.summary)
}

/// Plot-table entry: the table validated -> `1-ingest/plot_table.csv` (the usable plots),
/// `rejected.csv` (each unusable row, with its line, column and reason) and the summary.
fn plot_table(c: &Ctx) -> Result<StageSummary> {
    let cfg = &c.t.cfg;
    let name = &cfg.inputs.plot_table;
    let t = ingest::plot_table::read_input(&cfg.for_ingest(), &c.t.base, name, &c.crop)?
        .usable(name)?;
    io::write_table(&c.dir.join("plot_table.csv"), &t.plots, &c.unit)?;
    let mut summary = StageSummary::from_rejections("ingest", "plots", t.rows, &t.rejections);
    summary.details.insert(
        "read_as".into(),
        serde_json::json!({ name.clone(): t.read_as }),
    );
    let mut warnings = Vec::new();
    if !t.rejections.is_empty() {
        warnings.push(format!(
            "{name}: {} of its {} rows could not be used (see 1-ingest/rejected.csv)",
            t.rejections.len(),
            t.rows
        ));
    }
    warnings.extend(t.bounds_warning(name, &c.crop));
    warnings.extend(ingest::layout_checks::design_warnings_of_plots(&t.plots));
    summary.set_warnings(&warnings);
    write_stage_tables(&c.dir, &t.rejections, &summary)?;
    Ok(summary)
}
