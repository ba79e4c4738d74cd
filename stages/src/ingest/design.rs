//! The design table (plot id, treatment, block, field) and its agreement with the plot
//! geometry.

use super::IngestError;
use crate::ingest::settings::IngestConfig;
use crate::table::{DesignRow, PlotPolygon};
use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;

/// Read the design table: columns plot_id, treatment, block, field (any order, others
/// ignored). Every row must be complete and plot ids unique.
pub fn read_design(path: &Path, name: &str) -> Result<Vec<DesignRow>, IngestError> {
    let (mut rdr, header) = super::open_table(path, name, b',')?;
    let want = ["plot_id", "treatment", "block", "field"];
    let mut idx = [0usize; 4];
    for (k, w) in want.iter().enumerate() {
        idx[k] = header.iter().position(|h| h.trim() == *w).ok_or_else(|| {
            IngestError::MissingColumn {
                file: name.to_string(),
                column: w.to_string(),
                key: "(design table)".into(),
                found: header.iter().collect::<Vec<_>>().join(", "),
            }
        })?;
    }
    let mut out: Vec<DesignRow> = Vec::new();
    let mut seen = BTreeMap::new();
    for rec in rdr.records() {
        let rec = rec.map_err(|e| IngestError::Unusable {
            file: name.to_string(),
            message: e.to_string(),
        })?;
        let line = rec.position().map(|p| p.line()).unwrap_or(0);
        let mut vals = Vec::new();
        for (k, w) in want.iter().enumerate() {
            let v = rec.get(idx[k]).unwrap_or("").trim();
            if v.is_empty() {
                return Err(IngestError::BadRow {
                    file: name.to_string(),
                    row: line,
                    column: w.to_string(),
                    message: "empty; every design row needs plot_id, treatment, block and field"
                        .into(),
                });
            }
            vals.push(v.to_string());
        }
        if let Some(prev) = seen.insert(vals[0].clone(), line) {
            return Err(IngestError::BadRow {
                file: name.to_string(),
                row: line,
                column: "plot_id".into(),
                message: format!("duplicate plot id {} (first on line {prev})", vals[0]),
            });
        }
        out.push(DesignRow {
            plot_id: vals[0].clone(),
            treatment: vals[1].clone(),
            block: vals[2].clone(),
            field: vals[3].clone(),
            row: line,
        });
    }
    if out.is_empty() {
        return Err(IngestError::Unusable {
            file: name.to_string(),
            message: "design table has no rows".into(),
        });
    }
    Ok(out)
}

/// Check that the design and the plot geometry match: ids in one and not the other, duplicate
/// ids, a field without the check. With `plots.design_mismatch = "error"` every problem is in
/// one error; with "warn" unmatched plots and design rows are dropped and the problems come
/// back as warnings (a field without the check stays an error: nothing could be compared).
pub fn reconcile(
    cfg: &IngestConfig,
    plots_name: &str,
    polys: Vec<PlotPolygon>,
    design: Vec<DesignRow>,
) -> Result<(Vec<PlotPolygon>, Vec<DesignRow>, Vec<String>), IngestError> {
    let mut problems = Vec::new();
    let mut fatal = Vec::new();
    let mut seen = BTreeSet::new();
    let dups: BTreeSet<String> = polys
        .iter()
        .map(|p| p.plot_id.clone())
        .filter(|id| !seen.insert(id.clone()))
        .collect();
    if !dups.is_empty() {
        fatal.push(format!(
            "{plots_name}: duplicate plot ids: {}",
            dups.iter().cloned().collect::<Vec<_>>().join(", ")
        ));
    }
    let geo_ids: BTreeSet<String> = polys.iter().map(|p| p.plot_id.clone()).collect();
    let des_ids: BTreeSet<String> = design.iter().map(|d| d.plot_id.clone()).collect();
    let missing_geo: Vec<&str> = des_ids.difference(&geo_ids).map(|s| s.as_str()).collect();
    let missing_des: Vec<&str> = geo_ids.difference(&des_ids).map(|s| s.as_str()).collect();
    if !missing_geo.is_empty() {
        problems.push(format!(
            "{}: plot ids with no polygon in {plots_name}: {}",
            cfg.inputs.design,
            missing_geo.join(", ")
        ));
    }
    if !missing_des.is_empty() {
        problems.push(format!(
            "{plots_name}: plot ids with no row in {}: {}",
            cfg.inputs.design,
            missing_des.join(", ")
        ));
    }
    let mut fields: BTreeMap<&str, BTreeSet<&str>> = BTreeMap::new();
    for d in design.iter().filter(|d| geo_ids.contains(&d.plot_id)) {
        fields.entry(&d.field).or_default().insert(&d.treatment);
    }
    for (f, ts) in &fields {
        if !ts.contains(cfg.check.as_str()) {
            fatal.push(format!(
                "{}: field {f} has no plot of the check treatment {:?} (trial.check)",
                cfg.inputs.design, cfg.check
            ));
        }
    }
    let warn = cfg.design_mismatch == super::settings::DesignMismatch::Warn;
    if !fatal.is_empty() || (!problems.is_empty() && !warn) {
        problems.extend(fatal);
        return Err(IngestError::Mismatch(problems));
    }
    let polys: Vec<PlotPolygon> = polys
        .into_iter()
        .filter(|p| des_ids.contains(&p.plot_id))
        .collect();
    let design: Vec<DesignRow> = design
        .into_iter()
        .filter(|d| geo_ids.contains(&d.plot_id))
        .collect();
    Ok((polys, design, problems))
}
