//! `plotsieve check`: read every input as `run` would, print every problem, write nothing.

use crate::trial::{load, Trial};
use anyhow::{bail, Result};
use plotsieve_stages::ingest;
use std::path::Path;

/// `plotsieve check`.
pub fn check(trial: &Path, set: &[String]) -> Result<()> {
    let t = load(trial, set)?;
    let a = &t.cfg.adjust;
    if !a.rates.is_empty() {
        let rates: Vec<String> = a.rates.iter().map(|(t, r)| format!("{t} {r}")).collect();
        println!(
            "read: rate trial, rates in {}: {}",
            a.rate_unit,
            rates.join(", ")
        );
        if let Some(c) = &t.cfg.columns.applied_rate {
            println!(
                "read: as-applied rates from column {} in {}; the curves place each treatment at its {}",
                c.name,
                c.unit,
                match a.rate_source {
                    plotsieve_stages::adjust::settings::RateSource::Applied => "as-applied mean",
                    plotsieve_stages::adjust::settings::RateSource::Target => "target rate",
                }
            );
        }
    }
    if !t.cfg.inputs.plot_table.is_empty() {
        return check_plot_table(trial, &t);
    }
    let found = ingest::check(&t.cfg.for_ingest(), &t.base);
    let (read_as, found): (Vec<String>, Vec<String>) =
        found.into_iter().partition(|p| p.starts_with("read: "));
    for r in &read_as {
        println!("{r}");
    }
    let (mut warnings, mut problems): (Vec<String>, Vec<String>) =
        found.into_iter().partition(|p| p.starts_with("warning: "));
    // With inputs that parse and a design that fits the plots, run the front half in
    // memory to find what would go wrong later. Plot-table entry has no front half.
    if problems.is_empty() && t.cfg.adjust.plot_table.is_empty() {
        match crate::dry_run::front_half(&t.cfg, &t.base) {
            Ok((w, p)) => {
                warnings.extend(w.into_iter().map(|w| format!("warning: {w}")));
                problems.extend(p);
            }
            Err(e) => problems.push(format!("{e:#}")),
        }
    }
    for w in &warnings {
        println!("{w}");
    }
    verdict(trial, &problems)
}

/// check's last word: every problem, and an error when there is one.
fn verdict(trial: &Path, problems: &[String]) -> Result<()> {
    if problems.is_empty() {
        println!("{}: configuration and inputs look right", trial.display());
        Ok(())
    } else {
        for p in problems {
            println!("problem: {p}");
        }
        bail!("{}: {} problem(s) found", trial.display(), problems.len())
    }
}

/// `plotsieve check` of a plot-table trial: the table read and validated as run would, and
/// the fields adjust could not fit.
fn check_plot_table(trial: &Path, t: &Trial) -> Result<()> {
    let cfg = &t.cfg;
    let name = &cfg.inputs.plot_table;
    let crop = cfg.crop()?;
    let mut problems = Vec::new();
    match ingest::plot_table::read_input(&cfg.for_ingest(), &t.base, name, &crop)
        .and_then(|t| t.usable(name))
    {
        Err(e) => problems.push(e.to_string()),
        Ok(table) => {
            println!("read: {name}: {}", table.read_as);
            for r in &table.rejections {
                println!(
                    "warning: {name}, {} {}, column {}: {} ({:?}; expected {})",
                    table.word, r.source_row, r.column, r.rule, r.value, r.limit
                );
            }
            if let Some(w) = table.bounds_warning(name, &crop) {
                println!("warning: {w}");
            }
            for w in ingest::layout_checks::design_warnings_of_plots(&table.plots) {
                println!("warning: {w}");
            }
            let unit = plotsieve_stages::crop::YieldUnit::new(cfg.trial.output_unit, &crop);
            let s = cfg
                .adjust
                .checked(&cfg.trial.check, unit.kg_ha_per_unit(), crop.bushel_lb);
            if let Some(m) = plotsieve_stages::adjust::rate_problems(&table.plots, &s) {
                problems.push(format!("adjust: {m}"));
            }
            for u in plotsieve_stages::adjust::unfittable_fields(&table.plots, &s) {
                if cfg.adjust.allow_missing_fields {
                    println!("warning: adjust: missing from the result: {u}");
                } else {
                    problems.push(format!("adjust: {u}"));
                }
            }
        }
    }
    verdict(trial, &problems)
}
