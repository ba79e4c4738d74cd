//! Plots: clean points, plot polygons and design -> `3-plots/` (plots.csv, plots.geojson,
//! points.parquet with plot ids).

use super::{write_stage_tables, Ctx};
use crate::io;
use crate::stage::Stage;
use anyhow::Result;
use plotsieve_stages::table::StageSummary;
use plotsieve_stages::{ingest, plots};

/// Run the stage against the run folder.
pub fn run(c: &Ctx) -> Result<StageSummary> {
    let cfg = &c.t.cfg;
    if c.table_entry() {
        // The validated plot table is the plots table.
        let plots: Vec<plotsieve_stages::plots::PlotStats> = io::read_table(
            &c.out.join(Stage::Ingest.dir()).join("plot_table.csv"),
            &c.unit,
            "run stage ingest first",
        )?;
        io::write_table(&c.dir.join("plots.csv"), &plots, &c.unit)?;
        let summary = StageSummary::from_rejections("plots", "plots", plots.len() as u64, &[]);
        write_stage_tables(&c.dir, &[], &summary)?;
        return Ok(summary);
    }
    let out = c.out;
    let dir = &c.dir;
    let unit = c.unit;
    let (files, pts) = match c.take_cleaned() {
        Some(handed) => handed,
        None => {
            let (files, pts) =
                io::read_clean_points(&out.join(Stage::Clean.dir()).join("points.parquet"))?;
            (files, std::sync::Arc::new(pts))
        }
    };
    let ing = out.join(Stage::Ingest.dir());
    let polys = ingest::read_geojson(
        &ing.join("plots.geojson"),
        "1-ingest/plots.geojson",
        "plot_id",
    )?;
    let design = io::read_table(&ing.join("design.csv"), &unit, "run stage ingest first")?;
    let o = plots::run(
        &pts,
        &files,
        &polys,
        &design,
        &cfg.design_name(),
        &cfg.plots,
        c.crop.plot_bounds(),
    );
    let kept: Vec<_> = o.assignment.iter().map(|&(i, _)| pts[i].clone()).collect();
    // The points kept in plots are copied out: the rest are no longer needed.
    drop(pts);
    let plot_of: Vec<usize> = o.assignment.iter().map(|&(_, k)| k).collect();
    let y: Vec<f64> = kept
        .iter()
        .map(|p| unit.to_unit(p.yield_std_kg_ha))
        .collect();
    let col = format!("yield_{}", unit.suffix());
    let epsg = c.epsg()?;
    let utm = plotsieve_stages::projection::Utm::from_epsg(epsg)?;
    // The plot table the next stage reads is written now; the point table, the net plot
    // layer, the rejection log and the summary on threads of their own while the next
    // stage runs (only the report reads them).
    io::write_table(&dir.join("plots.csv"), &o.plots, &unit)?;
    // As-applied rates, where the exports log them.
    if let Some(a) = &cfg.columns.applied_rate {
        if o.plots.iter().any(|p| p.applied.is_some()) {
            io::write_plot_rates(&dir.join("applied_rates.csv"), &o.plots, a.unit)?;
        }
    }
    // The plots are shared by the two writers that read them.
    let plots = std::sync::Arc::new(o.plots);
    let path = dir.join("points.parquet");
    let by_id = plots.clone();
    c.write_later(move || {
        let ids: Vec<&str> = plot_of.iter().map(|&k| by_id[k].plot_id.as_str()).collect();
        io::write_clean_points(&path, &files, &kept, Some((&col, y)), Some(ids))
    });
    let path = dir.join("plots.geojson");
    c.write_later(move || {
        io::write_plots_wgs84(
            &path,
            &utm,
            plots.iter().filter(|p| !p.net_ring.is_empty()).map(|p| {
                (
                    p.plot_id.as_str(),
                    p.net_ring.as_slice(),
                    io::plot_properties(p, &unit),
                )
            }),
        )
    });
    let (dir, rejections, summary) = (dir.clone(), o.rejections, o.summary.clone());
    c.write_later(move || write_stage_tables(&dir, &rejections, &summary));
    Ok(o.summary)
}
