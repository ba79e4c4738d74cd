//! `plotsieve season SEASON.toml`: the season across trials. Reads every listed trial's
//! stage-one contrasts (`4-adjust/contrasts.json` in its run folder), fits the products
//! across all the trials' fields (`plotsieve_stages::season`, a two-stage analysis) and
//! writes its own folder (`[season] out`, default `season-run` beside the season file):
//!
//! - `products.csv`: per product the season mean uplift and the uplift in a new field
//!   (the treatments.csv columns; field = `all`);
//! - `locations.csv`: per field and product, the stage-one estimate and the effect there
//!   shrunk toward the product mean, with the field's position;
//! - `product_x_field_sd.csv`: the product x field SD's nodes, prior mass and posterior;
//! - `summary.json`: the trials read (contrasts file hashes), settings, warnings;
//! - `report.html`, `report.md`.
//!
//! The folder is written whole into a temporary sibling and swapped in, so a failed fit
//! never leaves a folder that looks current; a rerun gives the same bytes.

use crate::intake::read_season;
use crate::io;
use anyhow::{anyhow, bail, Context, Result};
use plotsieve_stages::adjust::{FitSettings, TreatmentRow};
use plotsieve_stages::crop::{AreaUnit, PriceUnit, YieldUnit};
use plotsieve_stages::report::season as report;
use plotsieve_stages::season::{self, ContrastsFile, Location, LocationRow, TauNode};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// Fields with fewer kept plots than this get a warning: their stage-one normal
/// approximation is rougher (measured on simulated seasons of six fields: the season means
/// moved up to 0.23 posterior SD from a one-stage joint fit on 25-plot fields, 0.046 on
/// 40-plot and 0.004 on 80-plot fields).
const SMALL_FIELD_PLOTS: u64 = 30;

const FORMAT: &str = "plotsieve-season-1";

pub(crate) struct TrialRead {
    pub(crate) name: String,
    file: String,
    run_folder: String,
    sha256: String,
    contrasts: ContrastsFile,
    decimals: usize,
    unit: plotsieve_stages::crop::OutputUnit,
    crop: plotsieve_stages::crop::Crop,
    /// The trial's adjust warnings about fields missing from its result.
    missing: Vec<String>,
    /// The rate unit and rates its run used (empty for a product trial).
    pub(crate) rates: (String, BTreeMap<String, f64>),
    /// Its run placed the treatments at their as-applied means (`adjust.rate_source`).
    pub(crate) rate_source_applied: bool,
}

fn read_trial(season_dir: &Path, t: &crate::intake::SeasonTrial) -> Result<TrialRead> {
    let file = season_dir.join(&t.file);
    let key = t.file.to_string_lossy().replace('\\', "/");
    let loaded = crate::trial::load(&file, &[])?;
    let out = season_dir.join(&t.out);
    let run_folder = t.out.to_string_lossy().replace('\\', "/");
    let manifest = crate::trial::read_manifest(&out)?.ok_or_else(|| {
        anyhow!(
            "trial {key}: run folder {} has no manifest.json; run `plotsieve run {} --out {}` first",
            out.display(),
            file.display(),
            out.display()
        )
    })?;
    match manifest.stages.get("adjust").map(|r| r.status.as_str()) {
        Some("done") => {}
        other => bail!(
            "trial {key}: its adjust stage in {} is {}; run the trial (or its adjust stage) again first",
            out.join("manifest.json").display(),
            other.unwrap_or("missing")
        ),
    }
    let path = out.join("4-adjust").join("contrasts.json");
    let text = std::fs::read_to_string(&path).with_context(|| {
        format!(
            "trial {key}: {} is missing (a run folder from before the season fit; rerun its adjust stage: `plotsieve stage adjust {}`)",
            path.display(),
            file.display()
        )
    })?;
    let contrasts =
        ContrastsFile::parse(&text, &path.display().to_string()).map_err(anyhow::Error::msg)?;
    if contrasts.fields.is_empty() {
        bail!("trial {key}: {} holds no fitted field", path.display());
    }
    let (_, sha256) = crate::trial::sha256_file(&path)?;
    let summary = crate::trial::read_summary(&out, crate::stage::Stage::Adjust)?;
    let missing = summary
        .warnings()
        .into_iter()
        .filter(|w| w.starts_with("missing from the pooled rows"))
        .collect();
    let crop = loaded.cfg.crop()?;
    Ok(TrialRead {
        name: contrasts.trial.clone(),
        file: key,
        run_folder,
        sha256,
        decimals: loaded.cfg.report.decimals as usize,
        unit: loaded.cfg.trial.output_unit,
        crop,
        contrasts,
        missing,
        rates: crate::season_rates::rates_of_run(&manifest.config),
        rate_source_applied: manifest.config["adjust"]["rate_source"] == "applied",
    })
}

/// The trials to fit, and warnings for those left out: a trial whose run did not finish is
/// left out with `allow_failed_trials` (an error when none remains), else kept (read_trial
/// then refuses it).
fn finished_trials<'a>(
    season_file: &Path,
    season: &'a crate::intake::Season,
    season_dir: &Path,
) -> Result<(Vec<&'a crate::intake::SeasonTrial>, Vec<String>)> {
    let mut left_out: Vec<String> = Vec::new();
    let mut listed = Vec::new();
    for t in &season.trial {
        match unfinished_run(season_dir, t) {
            Some(why) if season.season.allow_failed_trials => left_out.push(format!(
                "trial {} left out of the season (allow_failed_trials = true): {why}",
                t.file.display()
            )),
            _ => listed.push(t),
        }
    }
    if listed.is_empty() {
        bail!(
            "{}: no trial of the season finished its run:\n  {}",
            season_file.display(),
            left_out.join("\n  ")
        );
    }
    Ok((listed, left_out))
}

/// Why a trial's run did not finish, naming the stage and its error from the run's
/// manifest; None when its adjust stage is done.
fn unfinished_run(season_dir: &Path, t: &crate::intake::SeasonTrial) -> Option<String> {
    let out = season_dir.join(&t.out);
    let manifest = match crate::trial::read_manifest(&out) {
        Ok(Some(m)) => m,
        Ok(None) => return Some(format!("run folder {} has no manifest.json", out.display())),
        Err(e) => return Some(format!("{e:#}")),
    };
    if manifest
        .stages
        .get("adjust")
        .is_some_and(|r| r.status == "done")
    {
        return None;
    }
    let failed = crate::stage::Stage::ALL.iter().find_map(|s| {
        manifest
            .stages
            .get(s.name())
            .filter(|r| r.status == "failed")
            .map(|r| (s, r))
    });
    Some(match failed {
        Some((s, r)) => format!("its run failed at stage {}: {}", s.name(), r.error),
        None => format!(
            "its adjust stage in {} is {}",
            out.join("manifest.json").display(),
            manifest
                .stages
                .get("adjust")
                .map_or("missing", |r| r.status.as_str())
        ),
    })
}

/// Replace `out` by the folder `tmp` (a sibling). Refuses to replace a folder that is not a
/// season folder.
fn swap_in(tmp: &Path, out: &Path) -> Result<()> {
    if out.exists() {
        let ours = is_season_folder(out);
        let empty = std::fs::read_dir(out)
            .map(|mut d| d.next().is_none())
            .unwrap_or(false);
        if !ours && !empty {
            bail!(
                "{} exists and is not a season folder (no summary.json of format {FORMAT}); choose another [season] out",
                out.display()
            );
        }
        let old = out.with_file_name(format!(
            ".{}.old-{}",
            out.file_name().and_then(|n| n.to_str()).unwrap_or("season"),
            std::process::id()
        ));
        std::fs::rename(out, &old)
            .with_context(|| format!("moving the previous {} aside", out.display()))?;
        std::fs::rename(tmp, out)
            .with_context(|| format!("renaming {} to {}", tmp.display(), out.display()))?;
        std::fs::remove_dir_all(&old).with_context(|| format!("removing {}", old.display()))?;
    } else {
        std::fs::rename(tmp, out)
            .with_context(|| format!("renaming {} to {}", tmp.display(), out.display()))?;
    }
    Ok(())
}

/// Whether `out` holds a season folder this command wrote.
fn is_season_folder(out: &Path) -> bool {
    std::fs::read_to_string(out.join("summary.json"))
        .ok()
        .and_then(|t| serde_json::from_str::<serde_json::Value>(&t).ok())
        .is_some_and(|v| v.get("format").and_then(|f| f.as_str()) == Some(FORMAT))
}

/// The season's folder: `[season] out`, relative to the season file [default: season-run].
fn season_out(season: &crate::intake::Season, season_dir: &Path) -> PathBuf {
    season_dir.join(
        season
            .season
            .out
            .clone()
            .unwrap_or_else(|| PathBuf::from("season-run")),
    )
}

/// `plotsieve season SEASON.toml --withdraw`: remove the season folder, saying so; a folder
/// that is not a season folder is refused, a missing one is no error.
pub fn withdraw(season_file: &Path) -> Result<()> {
    let (season, season_dir) = read_season(season_file)?;
    let out = season_out(&season, &season_dir);
    let _lock = crate::lock::FolderLock::acquire(&out, "season folder")?;
    if !out.exists() {
        eprintln!("no season folder {} to withdraw", out.display());
        return Ok(());
    }
    if !is_season_folder(&out) {
        bail!(
            "{} is not a season folder (no summary.json of format {FORMAT}); left as it is",
            out.display()
        );
    }
    std::fs::remove_dir_all(&out).with_context(|| format!("removing {}", out.display()))?;
    eprintln!(
        "withdrew the season folder {} so that it cannot be taken for a current result; fit the season again once its trials have run",
        out.display()
    );
    Ok(())
}

/// `plotsieve season SEASON.toml`. On failure an earlier season folder is removed, so that
/// it cannot be taken for the result of the trials as they are now.
pub fn season(season_file: &Path, quiet: bool) -> Result<()> {
    let (season, season_dir) = read_season(season_file)?;
    let out = season_out(&season, &season_dir);
    let _lock = crate::lock::FolderLock::acquire(&out, "season folder")?;
    match fit_and_write(season_file, &season, &season_dir, &out, quiet) {
        Ok(()) => Ok(()),
        Err(e) if is_season_folder(&out) => {
            std::fs::remove_dir_all(&out)
                .with_context(|| format!("{e:#}; and removing the earlier {}", out.display()))?;
            Err(e.context(format!(
                "the earlier season folder {} was removed so that it cannot be taken for a current result",
                out.display()
            )))
        }
        Err(e) => Err(e),
    }
}

fn fit_and_write(
    season_file: &Path,
    season: &crate::intake::Season,
    season_dir: &Path,
    out: &Path,
    quiet: bool,
) -> Result<()> {
    let meta = &season.season;
    if season.trial.is_empty() {
        bail!("{}: lists no [[trial]]", season_file.display());
    }
    let (listed, left_out) = finished_trials(season_file, season, season_dir)?;
    let trials: Vec<TrialRead> = listed
        .into_iter()
        .map(|t| read_trial(season_dir, t))
        .collect::<Result<_>>()?;
    let first = &trials[0];
    let (crop, check) = (&first.contrasts.crop, &first.contrasts.check);
    check_trials(&trials)?;
    let unit = YieldUnit::new(meta.output_unit.unwrap_or(first.unit), &first.crop);
    let k = unit.kg_ha_per_unit();
    let mut warnings: Vec<String> = left_out;
    let s = season_settings(season_file, meta, check, first, k)?;
    let locs = locations(&trials, &mut warnings);
    let fit = season::fit(&locs, &s).map_err(|e| anyhow!("{}: {e}", season_file.display()))?;
    let rates = crate::season_rates::of_trials(&trials, meta)?;
    if rates.is_some() {
        warnings.extend(crate::season_rates::applied_warnings(&trials));
    }
    product_warnings(&fit, meta, &mut warnings);
    let parent = out
        .parent()
        .map(Path::to_path_buf)
        .unwrap_or_else(|| PathBuf::from("."));
    std::fs::create_dir_all(&parent).with_context(|| format!("creating {}", parent.display()))?;
    let tmp = parent.join(format!(
        ".{}.partial-{}",
        out.file_name().and_then(|n| n.to_str()).unwrap_or("season"),
        std::process::id()
    ));
    if tmp.exists() {
        std::fs::remove_dir_all(&tmp)?;
    }
    std::fs::create_dir_all(&tmp).with_context(|| format!("creating {}", tmp.display()))?;
    let written = (|| -> Result<()> {
        io::write_table(&tmp.join("products.csv"), &fit.products, &unit)?;
        io::write_table(&tmp.join("locations.csv"), &fit.locations, &unit)?;
        io::write_table(&tmp.join("product_x_field_sd.csv"), &fit.nodes, &unit)?;
        let rate_report = match &rates {
            Some(r) => Some(crate::season_rates::write_curves(
                &tmp,
                &locs,
                &s,
                r,
                &unit,
                (meta.input_price, meta.input_price_unit),
                first.decimals,
                s.money.product_cost_unit,
            )?),
            None => None,
        };
        let shown = unit.as_written();
        let products: Vec<TreatmentRow> =
            io::read_table(&tmp.join("products.csv"), &shown, "rerun plotsieve season")?;
        let locations: Vec<LocationRow> =
            io::read_table(&tmp.join("locations.csv"), &shown, "rerun plotsieve season")?;
        let _: Vec<TauNode> = io::read_table(
            &tmp.join("product_x_field_sd.csv"),
            &shown,
            "rerun plotsieve season",
        )?;
        let isd = fit.interaction_sd;
        let interaction_sd = plotsieve_stages::adjust::Summary {
            mean: unit.to_unit(isd.mean),
            lo95: unit.to_unit(isd.lo95),
            hi95: unit.to_unit(isd.hi95),
        };
        let listed: Vec<report::SeasonTrial> = trials
            .iter()
            .map(|t| report::SeasonTrial {
                trial: t.name.clone(),
                run_folder: t.run_folder.clone(),
                fields: t.contrasts.fields.len(),
                contrasts_sha256: t.sha256.clone(),
            })
            .collect();
        let name = if meta.name.is_empty() {
            "Season"
        } else {
            meta.name.as_str()
        };
        let input = report::SeasonInput {
            name,
            unit_label: unit.label(),
            check,
            crop,
            decimals: first.decimals,
            products: &products,
            locations: &locations,
            interaction_sd,
            trials: &listed,
            warnings: &warnings,
            money: Some(&s.money),
            rates: rate_report.as_ref(),
        };
        io::write_atomic(&tmp.join("report.html"), report::render(&input).as_bytes())?;
        io::write_atomic(&tmp.join("report.md"), report::markdown(&input).as_bytes())?;
        let summary = summary_json(
            meta,
            &trials,
            (crop, check, unit.label()),
            locs.len(),
            &fit,
            interaction_sd,
            &warnings,
        );
        io::write_json(&tmp.join("summary.json"), &summary)?;
        Ok(())
    })();
    if let Err(e) = written {
        let _ = std::fs::remove_dir_all(&tmp);
        return Err(e);
    }
    swap_in(&tmp, out)?;
    for w in &warnings {
        eprintln!("warning: {w}");
    }
    if !quiet {
        println!(
            "season {}: {} trials, {} fields, {} products -> {}",
            if meta.name.is_empty() {
                "(unnamed)"
            } else {
                &meta.name
            },
            trials.len(),
            locs.len(),
            fit.products.len(),
            out.join("report.html").display()
        );
    }
    Ok(())
}

/// The season folder's summary.json.
fn summary_json(
    meta: &crate::intake::SeasonMeta,
    trials: &[TrialRead],
    (crop, check, unit_label): (&str, &str, &str),
    fields: usize,
    fit: &season::SeasonFit,
    interaction_sd: plotsieve_stages::adjust::Summary,
    warnings: &[String],
) -> serde_json::Value {
    let round = |x: f64| (x * 1e6).round() / 1e6;
    serde_json::json!({
        "format": FORMAT,
        "season": meta.name,
        "method": "two-stage: each trial's stage-one contrasts and covariance (4-adjust/contrasts.json), then products x fields with a product x field SD (Piepho et al. 2012)",
        "crop": crop,
        "check": check,
        "unit": unit_label,
        "trials": trials.iter().map(|t| serde_json::json!({
            "trial": t.name, "file": t.file, "run_folder": t.run_folder,
            "contrasts_sha256": t.sha256,
            "fields": t.contrasts.fields.iter().map(|f| f.field.clone()).collect::<Vec<_>>(),
        })).collect::<Vec<_>>(),
        "fields": fields,
        "products": fit.products.iter().map(|r| r.treatment.clone()).collect::<Vec<_>>(),
        "product_x_field_sd": {
            "mean": round(interaction_sd.mean), "lo95": round(interaction_sd.lo95),
            "hi95": round(interaction_sd.hi95),
        },
        "settings": {
            "grain_price": meta.grain_price,
            "grain_price_unit": meta.grain_price_unit.unwrap_or(PriceUnit::Tonne),
            "product_cost": meta.product_cost,
            "product_cost_unit": meta.product_cost_unit.unwrap_or(AreaUnit::Hectare),
            "interaction_sd_u": meta.interaction_sd_u,
        },
        "warnings": warnings,
    })
}

/// One crop and one check across the season's trials, and a name for each trial.
fn check_trials(trials: &[TrialRead]) -> Result<()> {
    let first = &trials[0];
    let (crop, check) = (&first.contrasts.crop, &first.contrasts.check);
    let mut names: BTreeMap<&str, &str> = BTreeMap::new();
    for t in trials {
        if &t.contrasts.crop != crop || &t.contrasts.check != check {
            bail!(
                "trial {}: crop {:?} and check {:?}, but trial {} has crop {crop:?} and check {check:?}; a season compares products against one check in one crop",
                t.file, t.contrasts.crop, t.contrasts.check, first.file
            );
        }
        if let Some(other) = names.insert(&t.name, &t.file) {
            bail!(
                "trials {other} and {} are both named {:?}; give each trial its own trial.name",
                t.file,
                t.name
            );
        }
    }
    Ok(())
}

/// The fit's settings from the season file's `[season]` (prices and the product x field
/// prior), each value checked.
fn season_settings(
    season_file: &Path,
    meta: &crate::intake::SeasonMeta,
    check: &str,
    first: &TrialRead,
    k: f64,
) -> Result<FitSettings> {
    for (old, there) in [
        ("grain_price_per_t", meta.grain_price_per_t.is_some()),
        ("product_cost_per_ha", meta.product_cost_per_ha.is_some()),
    ] {
        if there {
            let hint = plotsieve_stages::config::renamed(&format!("adjust.{old}"))
                .unwrap_or_default()
                .replace("adjust.", "season.");
            bail!("{}: {hint}", season_file.display());
        }
    }
    for p in [
        ("grain_price", meta.grain_price),
        ("interaction_sd_u", meta.interaction_sd_u),
    ] {
        if !(p.1 >= 0.0 && p.1.is_finite()) {
            bail!(
                "{}: season.{} must be a finite number >= 0 (got {})",
                season_file.display(),
                p.0,
                p.1
            );
        }
    }
    for (name, c) in &meta.product_cost {
        if !(*c >= 0.0 && c.is_finite()) {
            bail!(
                "{}: season.product_cost.{name} must be a finite number >= 0 (got {c})",
                season_file.display()
            );
        }
    }
    let mut s = FitSettings::new(check);
    s.kg_ha_per_unit = k;
    s.interaction_sd_u = meta.interaction_sd_u * k;
    let money = plotsieve_stages::adjust::settings::Money {
        grain_price: meta.grain_price,
        grain_price_unit: meta.grain_price_unit.unwrap_or(PriceUnit::Tonne),
        product_cost_unit: meta.product_cost_unit.unwrap_or(AreaUnit::Hectare),
    };
    s.grain_price_per_t =
        money.grain_price * 1000.0 / money.grain_price_unit.kg(first.crop.bushel_lb);
    s.product_cost_per_ha = meta
        .product_cost
        .iter()
        .map(|(p, c)| (p.clone(), c / money.product_cost_unit.ha()))
        .collect();
    s.money = money;
    Ok(s)
}

/// Every field of every trial as a location, with warnings for missing fields and small
/// ones.
fn locations(trials: &[TrialRead], warnings: &mut Vec<String>) -> Vec<Location> {
    let mut locs = Vec::new();
    let mut small = Vec::new();
    for t in trials {
        for m in &t.missing {
            warnings.push(format!("trial {}: {m}", t.name));
        }
        for f in &t.contrasts.fields {
            if f.plots < SMALL_FIELD_PLOTS {
                small.push(format!("{} · {} ({} plots)", t.name, f.field, f.plots));
            }
            locs.push(Location {
                trial: t.name.clone(),
                one: f.clone(),
            });
        }
    }
    if !small.is_empty() {
        warnings.push(format!(
            "{} of {} fields have fewer than {SMALL_FIELD_PLOTS} kept plots; a small field's stage-one summary is rougher, so the season estimates may differ from a joint fit of the same fields by up to about a quarter of a posterior SD and new-field intervals cover a little less than they say (README, season checks): {}",
            small.len(),
            locs.len(),
            small.join(", ")
        ));
    }
    locs
}

/// Warnings on the fit's products: priced products no trial holds, products in one field.
fn product_warnings(
    fit: &season::SeasonFit,
    meta: &crate::intake::SeasonMeta,
    warnings: &mut Vec<String>,
) {
    let known: Vec<&String> = meta.product_cost.keys().collect();
    for p in known {
        if !fit.products.iter().any(|r| &r.treatment == p) {
            warnings.push(format!(
                "season.product_cost names {p}, which no trial's fields hold"
            ));
        }
    }
    for r in &fit.products {
        let n = fit
            .locations
            .iter()
            .filter(|l| l.product == r.treatment)
            .count();
        if n == 1 {
            warnings.push(format!(
                "product {} is in one field only; its season estimate is that field's, and its new-field odds rest on the other products' spread between fields",
                r.treatment
            ));
        }
    }
}
