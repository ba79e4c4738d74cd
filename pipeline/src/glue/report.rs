//! Report: every stage's summary and tables -> `5-report/` (report.md, report.html).

use super::{read_plots, Ctx, ADJUST_FIRST};
use crate::io;
use crate::stage::Stage;
use crate::trial::{read_manifest, read_summary};
use anyhow::Result;
use plotsieve_stages::table::{Rejection, StageSummary};
use plotsieve_stages::{clean, ingest, report};
use std::sync::Arc;

/// Run the stage against the run folder.
pub fn run(c: &Ctx) -> Result<StageSummary> {
    let cfg = &c.t.cfg;
    let out = c.out;
    let dir = &c.dir;
    let unit = c.unit;
    // The report presents the tables as they were written, in the output unit.
    let shown = unit.as_written();
    let summaries: Vec<StageSummary> = [Stage::Ingest, Stage::Clean, Stage::Plots, Stage::Adjust]
        .iter()
        .map(|s| read_summary(out, *s))
        .collect::<Result<_>>()?;
    let adj = out.join(Stage::Adjust.dir());
    let treatments = io::read_table(&adj.join("treatments.csv"), &shown, ADJUST_FIRST)?;
    let hyper = io::read_table(&adj.join("hyperparameters.csv"), &shown, ADJUST_FIRST)?;
    // Every stage's warnings, at the top of both reports.
    let warnings = all_warnings(&summaries);
    let money = cfg.adjust.money();
    let adjusted: Vec<plotsieve_stages::adjust::AdjustedPlot> =
        io::read_table(&adj.join("adjusted_plots.csv"), &shown, ADJUST_FIRST)?;
    let rate_report = rate_report(c, &adjusted)?;
    let md = report::markdown::render(&report::ReportInput {
        trial_name: &cfg.trial.name,
        unit_label: unit.label(),
        check: &cfg.trial.check,
        decimals: cfg.report.decimals as usize,
        summaries: &summaries,
        treatments: &treatments,
        hyper: &hyper,
        warnings: &warnings,
        money: Some(&money),
        rates: rate_report.as_ref(),
    });
    io::write_atomic(&dir.join("report.md"), md.as_bytes())?;
    // The HTML report: maps of every record, of what each rule removed, of the plots (none
    // for plot-table entry: no records, no polygons).
    let (map_points, polygons) = map_inputs(c, &shown)?;
    let plots_tab = read_plots(out, &shown)?;
    let comparisons = io::read_table(&adj.join("comparison.csv"), &shown, ADJUST_FIRST)?;
    let settings: Vec<(String, serde_json::Value)> = match read_manifest(out)? {
        Some(m) => m.stages.into_iter().map(|(k, v)| (k, v.settings)).collect(),
        None => Vec::new(),
    };
    let html = report::html::render(&report::html::HtmlInput {
        trial_name: &cfg.trial.name,
        unit_label: unit.label(),
        check: &cfg.trial.check,
        decimals: cfg.report.decimals as usize,
        summaries: &summaries,
        settings: &settings,
        points: &map_points,
        polygons: &polygons,
        plots: &plots_tab,
        adjusted: &adjusted,
        treatments: &treatments,
        hyper: &hyper,
        comparisons: &comparisons,
        warnings: &warnings,
        money: Some(&money),
        rates: rate_report.as_ref(),
    });
    io::write_atomic(&dir.join("report.html"), html.as_bytes())?;
    // The report removes nothing: its counts are the plots it reports on (those the adjust
    // stage kept), and its details say what it wrote and which warnings it carries.
    let reported = summaries[3].kept;
    let mut summary = StageSummary {
        stage: "report".into(),
        unit: "plots".into(),
        count_in: reported,
        kept: reported,
        ..Default::default()
    };
    summary.details.insert(
        "files".into(),
        serde_json::json!(["report.md", "report.html"]),
    );
    summary
        .details
        .insert("warnings_shown".into(), serde_json::json!(warnings.len()));
    io::write_json(&dir.join("summary.json"), &summary)?;
    Ok(summary)
}

/// The records as the HTML report's maps draw them (position, yield in the output unit, the
/// first rule that removed each) and the plot layer: none for plot-table entry.
fn map_inputs(
    c: &Ctx,
    shown: &plotsieve_stages::crop::YieldUnit,
) -> Result<(
    Vec<report::html::MapPoint>,
    Vec<plotsieve_stages::table::PlotPolygon>,
)> {
    let (cfg, out, unit, crop) = (&c.t.cfg, c.out, c.unit, &c.crop);
    let ing = out.join(Stage::Ingest.dir());
    // The records, the two rejection logs and the plot layer are read side by side. Of the
    // rejection logs only the columns the maps take, and only the rows naming a record.
    let design = cfg.design_name();
    let read_rejections = |st: Stage| -> Result<Vec<(u64, Arc<str>)>> {
        let mut rules: Vec<Arc<str>> = Vec::new();
        let mut named = Vec::new();
        io::for_each_row::<Rejection>(
            &out.join(st.dir()).join("rejected.csv"),
            shown,
            "rerun its stage",
            Some(&["source_file", "id", "rule"]),
            |r| {
                if *r.source_file != *design {
                    if let Some(id) = point_id(&r.id) {
                        // One copy of each rule's name.
                        let rule = match rules.iter().find(|x| **x == r.rule) {
                            Some(x) => x.clone(),
                            None => {
                                rules.push(r.rule.clone());
                                r.rule
                            }
                        };
                        named.push((id, rule));
                    }
                }
                Ok(())
            },
        )?;
        Ok(named)
    };
    let ((pts, polygons), (clean_rej, plots_rej)) = rayon::join(
        || {
            rayon::join(
                || -> Result<Vec<io::MapRecord>> {
                    if c.table_entry() {
                        Ok(Vec::new())
                    } else {
                        io::read_map_points(&ing.join("points.parquet"), |p| {
                            clean::record_yield_kg_ha(p, crop)
                        })
                    }
                },
                || -> Result<Vec<plotsieve_stages::table::PlotPolygon>> {
                    if c.table_entry() {
                        Ok(Vec::new())
                    } else {
                        Ok(ingest::read_geojson(
                            &ing.join("plots.geojson"),
                            "1-ingest/plots.geojson",
                            "plot_id",
                        )?)
                    }
                },
            )
        },
        || {
            rayon::join(
                || read_rejections(Stage::Clean),
                || read_rejections(Stage::Plots),
            )
        },
    );
    let (pts, polygons) = (pts?, polygons?);
    // The first rule (clean before plots) that removed each record, by point id: a log's id
    // names a record when it is the id's decimal text. Point ids are ingest's record
    // numbers, so the rules go in a table by id (an id beyond every record's names none).
    let ids = pts.iter().map(|p| p.id as usize + 1).max().unwrap_or(0);
    let mut removed: Vec<Option<Arc<str>>> = vec![None; ids];
    for (id, rule) in clean_rej?.into_iter().chain(plots_rej?) {
        if let Some(slot) = removed.get_mut(id as usize) {
            slot.get_or_insert(rule);
        }
    }
    let kept_rule: Arc<str> = Arc::from("");
    let map_points: Vec<report::html::MapPoint> = pts
        .iter()
        .map(|p| report::html::MapPoint {
            x: p.x_m,
            y: p.y_m,
            yield_unit: unit.to_unit(p.yield_kg_ha),
            rule: removed[p.id as usize]
                .as_ref()
                .unwrap_or(&kept_rule)
                .clone(),
        })
        .collect();
    drop(removed);
    Ok((map_points, polygons))
}

/// The record a rejection's id names: the id is a point id's decimal text (digits, no sign,
/// no leading zero) and not a plot's id.
fn point_id(id: &str) -> Option<u64> {
    let canonical = !id.is_empty()
        && id.bytes().all(|b| b.is_ascii_digit())
        && (id.len() == 1 || !id.starts_with('0'));
    canonical.then(|| id.parse::<u64>().ok()).flatten()
}

/// Every stage's warnings, each led by its stage.
fn all_warnings(summaries: &[StageSummary]) -> Vec<String> {
    summaries
        .iter()
        .flat_map(|x| {
            let stage = x.stage.clone();
            x.warnings()
                .into_iter()
                .map(move |w| format!("{stage}: {w}"))
        })
        .collect()
}

/// A rate trial's section of the reports (None for products).
fn rate_report(
    c: &Ctx,
    adjusted: &[plotsieve_stages::adjust::AdjustedPlot],
) -> Result<Option<report::rates::RateReport>> {
    let a = &c.t.cfg.adjust;
    if a.rates.is_empty() {
        return Ok(None);
    }
    let shown = c.unit.as_written();
    let adj = c.out.join(Stage::Adjust.dir());
    // As-applied rates against the targets, where adjust set them so.
    let applied_path = adj.join("applied_rates.csv");
    let applied: Vec<plotsieve_stages::adjust::applied::AppliedRow> = if applied_path.exists() {
        io::read_table::<plotsieve_stages::adjust::applied::AppliedRow>(
            &applied_path,
            &shown,
            ADJUST_FIRST,
        )?
        .into_iter()
        .filter(|r| r.field == "all")
        .collect()
    } else {
        Vec::new()
    };
    let at_applied = a.rate_source == plotsieve_stages::adjust::settings::RateSource::Applied
        && !applied.is_empty();
    // The plots sit at the rates the curves were fitted at.
    let rates = if at_applied {
        plotsieve_stages::adjust::applied::applied_means(&applied).map_err(anyhow::Error::msg)?
    } else {
        a.rates.clone()
    };
    Ok(Some(report::rates::RateReport {
        rows: io::read_table(&adj.join("response.csv"), &shown, ADJUST_FIRST)?,
        curve: io::read_table(&adj.join("response_curve.csv"), &shown, ADJUST_FIRST)?,
        plots: rate_dots(adjusted, &rates),
        applied,
        at_applied,
        rate_unit: a.rate_unit.as_str().to_string(),
        input_price: report::rates::input_price_words(
            a.input_price,
            a.input_price_unit,
            a.rate_unit,
        ),
        decimals: c.t.cfg.report.decimals as usize,
        area: a.product_cost_unit,
    }))
}

/// Each adjusted plot of a rate trial as (field, rate, adjusted yield less the mean adjusted
/// yield of its field's lowest-rate plots), for the response chart.
fn rate_dots(
    adjusted: &[plotsieve_stages::adjust::AdjustedPlot],
    rates: &std::collections::BTreeMap<String, f64>,
) -> Vec<(String, f64, f64)> {
    let lowest = rates.values().copied().fold(f64::INFINITY, f64::min);
    let mut base: std::collections::BTreeMap<&str, (f64, f64)> = Default::default();
    for a in adjusted {
        if rates.get(&a.treatment) == Some(&lowest) && a.adjusted.is_finite() {
            let e = base.entry(a.field.as_str()).or_default();
            e.0 += a.adjusted;
            e.1 += 1.0;
        }
    }
    adjusted
        .iter()
        .filter_map(|a| {
            let r = *rates.get(&a.treatment)?;
            let (sum, n) = *base.get(a.field.as_str())?;
            (a.adjusted.is_finite() && n > 0.0).then(|| (a.field.clone(), r, a.adjusted - sum / n))
        })
        .collect()
}

#[cfg(test)]
mod tests {
    #[test]
    fn a_rejection_names_a_record_by_its_ids_decimal_text_only() {
        // The same as parsing and comparing the number's text, without the text.
        for id in [
            "0",
            "7",
            "120",
            "007",
            "+5",
            "-1",
            "",
            "1e3",
            "P-12",
            "18446744073709551615",
            "18446744073709551616",
            " 4",
            "٣",
        ] {
            let reference = id.parse::<u64>().ok().filter(|n| n.to_string() == id);
            assert_eq!(super::point_id(id), reference, "{id:?}");
        }
    }
}
