//! `3-plots/applied_rates.csv`: each plot's as-applied rate from the records it keeps, in
//! the unit of the exports' as-applied column (`columns.applied_rate.unit`); written by
//! plots only when the exports log a rate, read back by adjust into the plots.

use super::write_atomic;
use anyhow::{bail, Context, Result};
use plotsieve_stages::crop::RateUnit;
use plotsieve_stages::table::{AppliedRate, PlotStats};
use plotsieve_stages::util::fmt;
use std::collections::HashMap;
use std::path::Path;

/// Write the table (every plot, in plot order).
pub fn write_plot_rates(path: &Path, plots: &[PlotStats], unit: RateUnit) -> Result<()> {
    let mut w = csv::Writer::from_writer(Vec::new());
    w.write_record([
        "plot_id",
        "field",
        "treatment",
        "block",
        "status",
        "rate_points",
        &format!("applied_mean_{unit}"),
        &format!("applied_sd_{unit}"),
    ])?;
    let f = unit.per_ha();
    for p in plots {
        let a = p.applied.clone().unwrap_or(AppliedRate {
            points: 0,
            mean: f64::NAN,
            sd: f64::NAN,
        });
        w.write_record([
            p.plot_id.as_str(),
            &p.field,
            &p.treatment,
            &p.block,
            &p.status,
            &a.points.to_string(),
            &fmt(a.mean / f, 4),
            &fmt(a.sd / f, 4),
        ])?;
    }
    write_atomic(path, &w.into_inner()?)
}

/// Read the table back into `plots` (by plot id; every plot must have a row).
pub fn read_plot_rates(path: &Path, plots: &mut [PlotStats], unit: RateUnit) -> Result<()> {
    let mut r = csv::Reader::from_path(path)
        .with_context(|| format!("{} is missing: run stage plots again", path.display()))?;
    let header = r.headers()?.clone();
    let want = [
        "plot_id".to_string(),
        "rate_points".into(),
        format!("applied_mean_{unit}"),
        format!("applied_sd_{unit}"),
    ];
    let mut idx = [0usize; 4];
    for (k, name) in want.iter().enumerate() {
        idx[k] = match header.iter().position(|h| h == name) {
            Some(i) => i,
            None => bail!(
                "{}: no column {name} (columns.applied_rate.unit is {unit}; run stage plots again after changing it)",
                path.display()
            ),
        };
    }
    let number = |text: &str, line: u64, col: &str| -> Result<f64> {
        if text.is_empty() {
            return Ok(f64::NAN);
        }
        text.parse::<f64>().with_context(|| {
            format!(
                "{}, line {line}, column {col}: expected a number, found {text:?}",
                path.display()
            )
        })
    };
    let f = unit.per_ha();
    let mut by_id: HashMap<String, AppliedRate> = HashMap::new();
    for rec in r.records() {
        let rec = rec.with_context(|| format!("reading {}", path.display()))?;
        let line = rec.position().map(|p| p.line()).unwrap_or(0);
        by_id.insert(
            rec[idx[0]].to_string(),
            AppliedRate {
                points: number(&rec[idx[1]], line, &want[1])? as u64,
                mean: number(&rec[idx[2]], line, &want[2])? * f,
                sd: number(&rec[idx[3]], line, &want[3])? * f,
            },
        );
    }
    for p in plots.iter_mut() {
        match by_id.remove(&p.plot_id) {
            Some(a) => p.applied = Some(a),
            None => bail!(
                "{}: no row for plot {} of 3-plots/plots.csv: run stage plots again",
                path.display(),
                p.plot_id
            ),
        }
    }
    Ok(())
}
