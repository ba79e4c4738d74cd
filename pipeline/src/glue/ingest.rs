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
    io::write_table(&dir.join("design.csv"), &o.design, &c.unit)?;
    write_stage_tables(&dir, &o.rejections, &o.summary)?;
    Ok(o.summary)
}
