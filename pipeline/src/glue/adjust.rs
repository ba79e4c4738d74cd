//! Adjust: `3-plots/plots.csv` (or the analyst's plot table) -> `4-adjust/` (adjusted plots,
//! treatments, hyperparameters, comparison).

use super::{read_plots, write_stage_tables, Ctx};
use crate::io;
use crate::stage::Stage;
use anyhow::{bail, Result};
use plotsieve_stages::adjust;
use plotsieve_stages::adjust::priors::PriorsFile;
use plotsieve_stages::adjust::settings::RateSource;
use plotsieve_stages::table::{PlotStats, Rejection, StageSummary};

/// Run the stage against the run folder.
pub fn run(c: &Ctx) -> Result<StageSummary> {
    let cfg = &c.t.cfg;
    let t = c.t;
    let out = c.out;
    let dir = &c.dir;
    let unit = c.unit;
    let crop = &c.crop;
    let progress = c.progress;
    let mut plots = if cfg.adjust.plot_table.is_empty() {
        read_plots(out, &unit)?
    } else {
        // The analyst's own table fitted directly: every row must be usable.
        let table = plotsieve_stages::ingest::plot_table::read_input(
            &cfg.for_ingest(),
            &t.base,
            &cfg.adjust.plot_table,
            crop,
        )?;
        if let Some(r) = table.rejections.first() {
            bail!(
                "{}, {} {}, column {}: expected {}, found {:?} ({})",
                r.source_file,
                table.word,
                r.source_row,
                r.column,
                r.limit,
                r.value,
                r.rule
            );
        }
        table.plots
    };
    let applied = applied_rates(c, &mut plots)?;
    let mut s = match &applied {
        Some((_, _, Some(means))) => {
            let mut a = cfg.adjust.clone();
            a.rates = means.clone();
            a.checked(&cfg.trial.check, unit.kg_ha_per_unit(), crop.bushel_lb)
        }
        _ => cfg
            .adjust
            .checked(&cfg.trial.check, unit.kg_ha_per_unit(), crop.bushel_lb),
    };
    let carried = carry_priors(t, &mut s)?;
    let mut o = adjust::run_with(&plots, &s, progress)?;
    if let Some((rows, warnings, _)) = &applied {
        o.warnings.extend(warnings.iter().cloned());
        io::write_table(&dir.join("applied_rates.csv"), rows, &unit)?;
    }
    if !o.missing_fields.is_empty() {
        if !cfg.adjust.allow_missing_fields {
            bail!(
                "{} of the trial's fields cannot be in the result, so the pooled rows would come from the other fields only:\n  {}\nfix those fields' inputs, or set adjust.allow_missing_fields = true to accept a result without them",
                o.missing_fields.len(),
                o.missing_fields.join("\n  ")
            );
        }
        for m in &o.missing_fields {
            o.warnings.push(format!(
                "missing from the pooled rows (adjust.allow_missing_fields = true): {m}"
            ));
        }
    }
    io::write_table(&dir.join("adjusted_plots.csv"), &o.plots, &unit)?;
    io::write_table(&dir.join("treatments.csv"), &o.treatments, &unit)?;
    io::write_table(&dir.join("hyperparameters.csv"), &o.hyper, &unit)?;
    io::write_table(&dir.join("comparison.csv"), &o.comparisons, &unit)?;
    if !cfg.adjust.rates.is_empty() {
        io::write_table(&dir.join("response.csv"), &o.response, &unit)?;
        io::write_table(&dir.join("response_curve.csv"), &o.response_curve, &unit)?;
    }
    // What this trial learned, for a later trial's adjust.priors_from.
    io::write_json(
        &dir.join("priors.json"),
        &PriorsFile::from_fit(
            &cfg.trial.name,
            &cfg.trial.crop,
            &cfg.trial.check,
            &o.treatments,
            &o.hyper,
        ),
    )?;
    write_contrasts(c, &o, &plots)?;
    // Kept plots of fields that could not be fitted are this stage's rejections.
    let fitted: std::collections::BTreeSet<&str> =
        o.hyper.iter().map(|h| h.field.as_str()).collect();
    let rejections: Vec<Rejection> = plots
        .iter()
        .filter(|p| p.status == "kept" && !fitted.contains(p.field.as_str()))
        .map(|p| Rejection {
            source_file: "3-plots/plots.csv".into(),
            source_row: 0,
            id: p.plot_id.clone(),
            rule: "field_not_fitted".into(),
            column: "field".into(),
            value: p.field.clone(),
            limit: "a field with a check, two or more treatments and varying yields".into(),
        })
        .collect();
    let kept_in = plots.iter().filter(|p| p.status == "kept").count() as u64;
    let mut summary = StageSummary::from_rejections("adjust", "plots", kept_in, &rejections);
    summary.set_warnings(&o.warnings);
    if let Some(c) = carried {
        summary.details.insert("priors_from".into(), c);
    }
    if o.joint_ess.is_finite() {
        summary.details.insert(
            "joint_effective_draws".into(),
            serde_json::json!((o.joint_ess * 10.0).round() / 10.0),
        );
    }
    if let Some(r) = o
        .response
        .iter()
        .find(|r| r.field == "all" && r.model == "averaged")
    {
        let p = |m: &str| {
            o.response
                .iter()
                .find(|x| x.field == "all" && x.model == m)
                .map_or(f64::NAN, |x| (x.probability * 1e4).round() / 1e4)
        };
        summary.details.insert(
            "rate_trial".into(),
            serde_json::json!({
                "rate_unit": r.rate_unit,
                "rates": s.rates.as_ref().map(|r| r.by_treatment.clone()).unwrap_or_default(),
                "rate_source": cfg.adjust.rate_source,
                "optimum_rate": (r.optimum_rate * 1e3).round() / 1e3,
                "optimum_90": [(r.optimum_lo90 * 1e3).round() / 1e3, (r.optimum_hi90 * 1e3).round() / 1e3],
                "curve_probabilities": {
                    "quadratic": p("quadratic"),
                    "quadratic_plateau": p("quadratic_plateau"),
                    "linear_plateau": p("linear_plateau"),
                },
            }),
        );
    }
    write_stage_tables(&dir, &rejections, &summary)?;
    Ok(summary)
}

/// `adjust.priors_from`: the earlier trial's priors taken into `s`, and what was taken (for
/// the summary); None without the setting.
fn carry_priors(
    t: &crate::trial::Trial,
    s: &mut adjust::FitSettings,
) -> Result<Option<serde_json::Value>> {
    let cfg = &t.cfg;
    if cfg.adjust.priors_from.is_empty() {
        return Ok(None);
    }
    let name = &cfg.adjust.priors_from;
    let path = t.base.join(name);
    let text = std::fs::read_to_string(&path)
        .map_err(|e| anyhow::anyhow!("{name} (adjust.priors_from): {e}"))?;
    let file = PriorsFile::parse(&text, name).map_err(anyhow::Error::msg)?;
    let (priors, said) = file
        .priors_for(
            name,
            &cfg.trial.crop,
            &cfg.trial.check,
            cfg.adjust.priors_widen,
            cfg.adjust.priors_sd,
            &s.product_prior,
        )
        .map_err(anyhow::Error::msg)?;
    s.product_prior = priors;
    let (_, sha256) = crate::trial::sha256_file(&path)?;
    Ok(Some(serde_json::json!({
        "file": name, "sha256": sha256, "widen": cfg.adjust.priors_widen,
        "sd": cfg.adjust.priors_sd.as_str(), "taken": said,
    })))
}

/// Stage one of a season fit: each field's contrasts, with the field's centre in WGS 84
/// where the run knows its projection.
fn write_contrasts(c: &Ctx, o: &adjust::AdjustOutput, plots: &[PlotStats]) -> Result<()> {
    let (cfg, dir) = (&c.t.cfg, &c.dir);
    let utm = c
        .epsg()
        .ok()
        .and_then(|e| plotsieve_stages::projection::Utm::from_epsg(e).ok());
    let mut fields = o.stage_one.clone();
    for f in &mut fields {
        let xy: Vec<(f64, f64)> = plots
            .iter()
            .filter(|p| p.field == f.field && p.status == "kept")
            .map(|p| (p.centroid_x_m, p.centroid_y_m))
            .filter(|p| p.0.is_finite() && p.1.is_finite())
            .collect();
        if let (Some(u), false) = (&utm, xy.is_empty()) {
            let n = xy.len() as f64;
            let (x, y) = xy
                .iter()
                .fold((0.0, 0.0), |a, p| (a.0 + p.0 / n, a.1 + p.1 / n));
            if let Ok((lon, lat)) = u.inverse(x, y) {
                // A metre is about 1e-5 degrees: six decimals keep the file's bytes stable.
                f.lon = Some((lon * 1e6).round() / 1e6);
                f.lat = Some((lat * 1e6).round() / 1e6);
            }
        }
    }
    io::write_json(
        &dir.join("contrasts.json"),
        &plotsieve_stages::season::ContrastsFile {
            format: plotsieve_stages::season::CONTRASTS_FORMAT.into(),
            trial: cfg.trial.name.clone(),
            crop: cfg.trial.crop.clone(),
            check: cfg.trial.check.clone(),
            fields,
        },
    )?;
    Ok(())
}

/// A rate trial's as-applied rates (`columns.applied_rate`): each plot's rate from
/// `3-plots/applied_rates.csv`, the treatments' rows against their targets, the warnings, and
/// with `adjust.rate_source = "applied"` the treatments' as-applied means. None for a trial
/// without the column (or without rates).
type Applied = (
    Vec<adjust::applied::AppliedRow>,
    Vec<String>,
    Option<std::collections::BTreeMap<String, f64>>,
);

fn applied_rates(c: &Ctx, plots: &mut [PlotStats]) -> Result<Option<Applied>> {
    let cfg = &c.t.cfg;
    let a = &cfg.adjust;
    let Some(col) = cfg.columns.applied_rate.as_ref() else {
        return Ok(None);
    };
    if a.rates.is_empty() || !a.plot_table.is_empty() {
        return Ok(None);
    }
    let path = c.out.join(Stage::Plots.dir()).join("applied_rates.csv");
    let mut warnings = Vec::new();
    if path.exists() {
        io::read_plot_rates(&path, plots, col.unit)?;
    } else if a.rate_source == RateSource::Applied {
        bail!(
            "adjust.rate_source = \"applied\", but no record kept by clean has an as-applied rate in column {} (3-plots/applied_rates.csv was not written)",
            col.name
        );
    } else {
        warnings.push(format!(
            "as-applied rates: columns.applied_rate maps column {}, but no record kept by clean has a rate in it; the curve uses the target rates",
            col.name
        ));
    }
    let rows = adjust::applied::applied_rows(plots, &a.rates, a.rate_unit);
    let use_applied = a.rate_source == RateSource::Applied;
    warnings.extend(adjust::applied::applied_warnings(
        &rows,
        a.applied_rate_tolerance_pct,
        use_applied,
    ));
    let means = if use_applied {
        Some(adjust::applied::applied_means(&rows).map_err(anyhow::Error::msg)?)
    } else {
        None
    };
    Ok(Some((rows, warnings, means)))
}
