//! A season of rate trials: the rates every trial's run used (its manifest), checked to agree
//! across trials, the season file's input price, and the response curves across all the
//! trials' fields written beside the season's tables.

use anyhow::{bail, Result};
use plotsieve_stages::adjust::{FitSettings, RateSettings};
use plotsieve_stages::crop::{InputUnit, RateUnit};
use std::collections::BTreeMap;

/// The rates a trial's run used, from its manifest's settings: (rate unit, rates), empty
/// for a product trial.
pub(crate) fn rates_of_run(config: &serde_json::Value) -> (String, BTreeMap<String, f64>) {
    let a = &config["adjust"];
    let rates = a["rates"]
        .as_object()
        .map(|m| {
            m.iter()
                .filter_map(|(t, r)| r.as_f64().map(|r| (t.clone(), r)))
                .collect()
        })
        .unwrap_or_default();
    (a["rate_unit"].as_str().unwrap_or("").to_string(), rates)
}

/// Trials whose own curves placed the treatments at their as-applied means
/// (`adjust.rate_source = "applied"`): the season places them at their target rates, and
/// says so.
pub(crate) fn applied_warnings(trials: &[crate::season::TrialRead]) -> Vec<String> {
    trials
        .iter()
        .filter(|t| t.rate_source_applied)
        .map(|t| format!(
            "trial {}: its own curves place each treatment at its as-applied mean (adjust.rate_source = \"applied\"); the season's curve places every treatment at its target rate, one rate per treatment across the season",
            t.name
        ))
        .collect()
}

/// [`season_rates`] of the season's trials with its input price.
pub(crate) fn of_trials(
    trials: &[crate::season::TrialRead],
    meta: &crate::intake::SeasonMeta,
) -> Result<Option<RateSettings>> {
    let named: Vec<_> = trials
        .iter()
        .map(|t| (t.name.clone(), t.rates.0.clone(), t.rates.1.clone()))
        .collect();
    season_rates(&named, meta.input_price, meta.input_price_unit)
}

/// The season's rates: None when no trial is a rate trial; an error when only some are, or
/// when two trials give a treatment different rates or units.
pub(crate) fn season_rates(
    trials: &[(String, String, BTreeMap<String, f64>)],
    input_price: f64,
    input_price_unit: Option<InputUnit>,
) -> Result<Option<RateSettings>> {
    let with: Vec<&(String, String, BTreeMap<String, f64>)> =
        trials.iter().filter(|t| !t.2.is_empty()).collect();
    if with.is_empty() {
        if input_price > 0.0 {
            bail!("[season] input_price is set but no trial of the season is a rate trial (adjust.rates)");
        }
        return Ok(None);
    }
    if with.len() < trials.len() {
        let without: Vec<&str> = trials
            .iter()
            .filter(|t| t.2.is_empty())
            .map(|t| t.0.as_str())
            .collect();
        bail!(
            "some trials of the season are rate trials and some are not ({} give no rates): a season's response curve needs every trial's rates",
            without.join(", ")
        );
    }
    let unit_name = &with[0].1;
    let mut merged: BTreeMap<String, (f64, &str)> = BTreeMap::new();
    for (name, unit, rates) in &with {
        if unit != unit_name {
            bail!(
                "trial {name} gives its rates in {unit} but trial {} in {unit_name}: one rate unit across the season",
                with[0].0
            );
        }
        for (t, r) in rates {
            match merged.get(t) {
                Some((r0, n0)) if r0 != r => bail!(
                    "treatment {t} has rate {r} in trial {name} but {r0} in trial {n0}: a treatment has one rate across the season"
                ),
                Some(_) => {}
                None => {
                    merged.insert(t.clone(), (*r, name.as_str()));
                }
            }
        }
    }
    let unit = RateUnit::from_name(unit_name)
        .ok_or_else(|| anyhow::anyhow!("trial {}: unknown rate unit {unit_name:?}", with[0].0))?;
    let price_unit = input_price_unit.unwrap_or(InputUnit::Kg);
    let cost_per_ha = if input_price > 0.0 {
        unit.cost_per_ha(input_price, price_unit).ok_or_else(|| {
            anyhow::anyhow!(
                "[season] input_price_unit {:?} does not measure what the trials' rates ({unit_name}) do",
                price_unit.as_str()
            )
        })?
    } else {
        0.0
    };
    Ok(Some(RateSettings {
        by_treatment: merged.into_iter().map(|(t, (r, _))| (t, r)).collect(),
        unit,
        cost_per_ha,
        current: None,
        flat_top_within_per_ha: 0.0,
    }))
}

/// The season's curves, written as `response.csv` and `response_curve.csv` in `dir`, and
/// read back (in the output unit) for the season's reports.
pub(crate) fn write_curves(
    dir: &std::path::Path,
    locs: &[plotsieve_stages::season::Location],
    s: &FitSettings,
    rates: &RateSettings,
    unit: &plotsieve_stages::crop::YieldUnit,
    input_price: (f64, Option<InputUnit>),
    decimals: usize,
    area: plotsieve_stages::crop::AreaUnit,
) -> Result<plotsieve_stages::report::rates::RateReport> {
    let (rows, curve) =
        plotsieve_stages::season::fit_curves(locs, s, rates).map_err(anyhow::Error::msg)?;
    crate::io::write_table(&dir.join("response.csv"), &rows, unit)?;
    crate::io::write_table(&dir.join("response_curve.csv"), &curve, unit)?;
    let shown = unit.as_written();
    let again = "rerun plotsieve season";
    Ok(plotsieve_stages::report::rates::RateReport {
        applied: Vec::new(),
        at_applied: false,
        rows: crate::io::read_table(&dir.join("response.csv"), &shown, again)?,
        curve: crate::io::read_table(&dir.join("response_curve.csv"), &shown, again)?,
        plots: Vec::new(),
        rate_unit: rates.unit.as_str().to_string(),
        input_price: plotsieve_stages::report::rates::input_price_words(
            input_price.0,
            input_price.1.unwrap_or(InputUnit::Kg),
            rates.unit,
        ),
        decimals,
        area,
    })
}
