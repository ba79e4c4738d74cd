//! `plotsieve simulate`: write an invented trial's files (task data, Shapefiles and
//! GeoPackages through their writers, the rest as text), each atomically.

use crate::io;
use anyhow::{bail, Result};
use plotsieve_stages::{ingest, simulate};
use std::path::Path;

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
            for stale in ingest::layers::companions(&path) {
                let _ = std::fs::remove_file(stale);
            }
            let _ = std::fs::remove_file(&path);
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
