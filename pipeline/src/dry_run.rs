//! `plotsieve check` after the inputs parse: ingest, clean and plots run in memory, nothing
//! written, so that what `check` passes `run` does not fail on for an input reason (an
//! export whose speed or swath is all zero, moisture out of range, a field whose plots all
//! end up set aside, a field adjust could not fit).

use anyhow::Result;
use plotsieve_stages::clean::zones::Zones;
use plotsieve_stages::config::TrialConfig;
use plotsieve_stages::crop::YieldUnit;
use plotsieve_stages::progress::Progress;
use plotsieve_stages::{adjust, clean, ingest, plots};
use std::path::Path;

/// (warnings, problems) found by running the front half of the pipeline in memory.
pub fn front_half(cfg: &TrialConfig, base: &Path) -> Result<(Vec<String>, Vec<String>)> {
    let none = Progress::none();
    let crop = cfg.crop()?;
    let ing = ingest::run_with(&cfg.for_ingest(), base, &none)?;
    let zones = Zones::new(&ing.polygons, &ing.design);
    let cl = clean::run_with(&ing.points, &cfg.clean, &crop, Some(&zones), &none);
    let pl = plots::run(
        &cl.points,
        &ing.points.files,
        &ing.polygons,
        &ing.design,
        &cfg.design_name(),
        &cfg.plots,
        crop.plot_bounds(),
    );
    let mut warnings: Vec<String> = Vec::new();
    for s in [&ing.summary, &cl.summary, &pl.summary] {
        warnings.extend(
            s.warnings()
                .into_iter()
                .map(|w| format!("{}: {w}", s.stage)),
        );
    }
    let unit = YieldUnit::new(cfg.trial.output_unit, &crop);
    let s = cfg
        .adjust
        .checked(&cfg.trial.check, unit.kg_ha_per_unit(), crop.bushel_lb);
    let unfit = adjust::unfittable_fields(&pl.plots, &s);
    let mut problems: Vec<String> = adjust::rate_problems(&pl.plots, &s)
        .map(|m| format!("adjust: {m}"))
        .into_iter()
        .collect();
    for u in unfit {
        if cfg.adjust.allow_missing_fields {
            warnings.push(format!(
                "adjust: missing from the result (adjust.allow_missing_fields = true): {u}"
            ));
        } else {
            problems.push(format!("adjust: {u} (set adjust.allow_missing_fields = true to accept a result without it)"));
        }
    }
    Ok((warnings, problems))
}
