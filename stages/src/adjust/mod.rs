//! Adjust: Bayesian Gaussian-process spatial adjustment of plot yields, treatment contrasts
//! pooled over fields, and decision probabilities.
//!
//! Model, per field f (Rasmussen & Williams 2006, "Gaussian Processes for Machine Learning",
//! section 2.7, explicit basis functions):
//!
//!   y_f = X_f b_f + g_f + e_f,  g_f ~ GP(0, s_f^2 k_l),  e_f ~ N(0, s_n^2 I),
//!
//! with y the plot mean yields, X an intercept (the check), one column per product (its
//! contrast with the check) and sum-to-zero block columns when `adjust.blocks`, and k a Matern
//! 1/2, 3/2, 5/2 or squared-exponential kernel on plot distances in metres, optionally with
//! separate length scales along and across the plot grid. Field means and blocks have flat
//! priors; the product effects are Gaussian (a weak default prior, or an informative one per
//! product from the config), so given the hyperparameters their posterior and the marginal
//! likelihood are exact. Fields share the product effects and may differ by a treatment x
//! field interaction with its own SD; they are joined through the treatment-level equations
//! only (see `joint`).
//!
//! The hyperparameters (length scale(s), spatial SD, noise SD per field; interaction SD) have
//! penalised-complexity priors (Fuglstad et al. 2019) and are integrated numerically (see
//! `field`): each field on a lattice in log space, and the fields together by importance
//! sampling from their own lattices (seeded, so reruns give the same bytes). Every estimate,
//! SD, interval and probability is a mixture over hyperparameters, not a plug-in.
//!
//! Row-column and incomplete-block designs add random design factors (`adjust.random_effects`)
//! with their own SDs beside the spatial field (see `random`).
//!
//! Fields of up to `adjust.exact_max_plots` plots use the exact kernel; larger ones the
//! reduced-rank Hilbert-space form (see `spectral`).
//!
//! Beside it the same mean model is fitted without the spatial field (the usual RCBD analysis
//! when `adjust.blocks`), with both REML log marginal likelihoods at the posterior mode, the
//! efficiency (ratio of contrast variances), the agreement of the two rankings of the
//! products (Spearman's rank correlation, the share of the top quarter both put there), and
//! the residual Moran's I of both. With a grain price and product costs, each product also gets its
//! break-even uplift (cost / price), P(uplift > break-even) and expected net return.
//!
//! Per-plot spatial effects are mixtures over the same posterior; in a joint fit each field's
//! hyperparameter points carry their joint weights and the joint moments of its mean
//! parameters (see `joint_plots`). The comparison with the no-spatial-field model and its
//! Moran's I use each field's own fit at its mode.
//!
//! Errors: [`AdjustError`] when no field can be fitted; a field that cannot be fitted (one
//! treatment, no kept check plot, fewer plots than parameters + 2, all yields equal) is
//! skipped with a warning that names it.
//!
//! Layout: `settings` ([adjust] and the checked fit settings), `kernel/` (one file per
//! covariance function, registered in `kernel::KERNELS`), `prepare` (plots -> a field's
//! design, effect priors), `spectral` (the kernel in spectral form, likelihood in
//! O(r p^2)), `field` (one field's hyperparameter lattice), `lattice` (length-scale scans,
//! shared scans, interaction nodes), `random` (random design factors: their lattice and
//! the model without the spatial field), `single` (a field fitted alone), `joint` (the
//! treatment-level equations) and `joint_fit` (the joint fit by importance sampling),
//! `compare` (the model without the spatial field, Moran's I), `output` (rows and their
//! assembly), `optimise` (Nelder-Mead), `linalg` (small dense matrices). Test-only: `oracle`
//! (brute-force quadrature, slice sampler) and `reference` (dense Cholesky evaluations),
//! and `tests`.

pub mod applied;
mod assemble;
mod compare;
pub mod field;
pub mod joint;
mod joint_fit;
pub mod kernel;
mod lattice;
pub mod linalg;
mod optimise;
#[cfg(test)]
pub mod oracle;
pub mod output;
mod prepare;
pub mod priors;
mod random;
mod rate_fit;
#[cfg(test)]
pub mod reference;
pub mod response;
mod response_draws;
pub mod settings;
mod single;
mod spacing;
pub mod spectral;

pub use compare::*;
use joint_fit::*;
pub use kernel::*;
pub use lattice::*;
pub use optimise::*;
pub use output::*;
pub use prepare::*;
pub use rate_fit::{pooled_response, rate_problems, ResponseCurveRow, ResponseRow};
#[cfg(test)]
pub use reference::*;
pub use settings::{AdjustSettings, FitSettings, Pooling, RandomEffect, RateSettings};
use single::*;

use crate::plots::PlotStats;
use crate::util::{sd, Rng};
use field::{log_sum_exp, range_lattice, FieldModel, Node, PC_ALPHA_LN};
use joint::{combine, Component, EffectPrior, FieldMap, Mixture, Moments};
use rayon::prelude::*;
use spectral::{Design, Method};
use std::collections::{BTreeMap, BTreeSet};

/// No field could be fitted.
#[derive(Debug, thiserror::Error)]
pub enum AdjustError {
    #[error("no field could be adjusted:\n  {}", .0.join("\n  "))]
    NothingToFit(Vec<String>),
    /// A rate trial whose rates do not match its treatments.
    #[error("rate trial: {0}")]
    Rates(String),
}

/// "field F: no kept plot (...)" for each field of `plots` that has none.
fn no_kept_plot(plots: &[PlotStats], kept: &BTreeMap<&str, Vec<&PlotStats>>) -> Vec<String> {
    let mut set_aside: BTreeMap<&str, BTreeMap<&str, u64>> = BTreeMap::new();
    for p in plots
        .iter()
        .filter(|p| !kept.contains_key(p.field.as_str()))
    {
        let why = if p.status == "kept" {
            "no yield"
        } else {
            p.reason.as_str()
        };
        *set_aside
            .entry(p.field.as_str())
            .or_default()
            .entry(why)
            .or_default() += 1;
    }
    set_aside
        .into_iter()
        .map(|(f, why)| {
            let n: u64 = why.values().sum();
            let why: Vec<String> = why.iter().map(|(r, k)| format!("{r}: {k}")).collect();
            format!(
                "field {f}: no kept plot (all {n} set aside in the plots stage; {})",
                why.join(", ")
            )
        })
        .collect()
}

/// Fields of `plots` that are not among the fitted ones, each with the warning that says
/// why (or a plain note when there is none).
fn missing_fields(plots: &[PlotStats], out: &AdjustOutput) -> Vec<String> {
    let fitted: BTreeSet<&str> = out.hyper.iter().map(|h| h.field.as_str()).collect();
    let all: BTreeSet<&str> = plots.iter().map(|p| p.field.as_str()).collect();
    all.into_iter()
        .filter(|f| !fitted.contains(f))
        .map(|f| {
            let head = format!("field {f}:");
            out.warnings
                .iter()
                .rev()
                .find(|w| w.starts_with(&head))
                .cloned()
                .unwrap_or_else(|| format!("field {f}: not fitted"))
        })
        .collect()
}

/// The fields of `plots` that adjust could not fit, each with why, found without fitting
/// (no kept plot; no check, one treatment, too few plots or no variation): what
/// `plotsieve check` reports before a run.
pub fn unfittable_fields(plots: &[PlotStats], s: &FitSettings) -> Vec<String> {
    let mut by_field: BTreeMap<&str, Vec<&PlotStats>> = BTreeMap::new();
    for p in plots
        .iter()
        .filter(|p| p.status == "kept" && p.yield_mean.is_finite())
    {
        by_field.entry(&p.field).or_default().push(p);
    }
    let mut out = no_kept_plot(plots, &by_field);
    for (f, ps) in by_field {
        if let Err(w) = prepare(f, ps, s) {
            out.push(w);
        }
    }
    out
}

/// Run adjust on the kept plots.
pub fn run(plots: &[PlotStats], s: &FitSettings) -> Result<AdjustOutput, AdjustError> {
    run_with(plots, s, &crate::progress::Progress::none())
}

/// [`run`], reporting to `progress` as each field's length scales are scanned and its fit
/// is done, and when the joint fit is done.
pub fn run_with(
    plots: &[PlotStats],
    s: &FitSettings,
    progress: &crate::progress::Progress,
) -> Result<AdjustOutput, AdjustError> {
    // Fields, length scales and lattice points already run in parallel: faer's own
    // threads inside them only add coordination.
    faer::set_global_parallelism(faer::Par::Seq);
    let mut by_field: BTreeMap<&str, Vec<&PlotStats>> = BTreeMap::new();
    for p in plots
        .iter()
        .filter(|p| p.status == "kept" && p.yield_mean.is_finite())
    {
        by_field.entry(&p.field).or_default().push(p);
    }
    // Fields with no kept plot never reach a fit; say so rather than let them vanish.
    let mut warnings: Vec<String> = no_kept_plot(plots, &by_field);
    let mut preps: Vec<Prepared> = Vec::new();
    for (f, ps) in by_field {
        match prepare(f, ps, s) {
            Ok(p) => preps.push(p),
            Err(w) => warnings.push(w),
        }
    }
    if preps.is_empty() {
        return Err(AdjustError::NothingToFit(warnings));
    }
    // A product on a single plot of a field: its contrast there rests on one plot.
    for p in &preps {
        for (t, n) in p.model.treatments.iter().zip(&p.counts) {
            if *n == 1 {
                warnings.push(format!(
                    "field {}: treatment {t} has a single kept plot; its uplift there rests on that one plot (a typo in the design table?)",
                    p.model.name
                ));
            }
        }
    }
    let joint = s.pooling == Pooling::Joint && preps.len() > 1;
    let shared = joint && s.shared_range;
    progress.start(
        2 * preps.len() as u64 + u64::from(joint),
        "field scans and fits",
    );
    // Fewer fields than threads: a field's walk over the length scales evaluates both
    // neighbours of a node side by side (with more, the fields keep the threads busy and the
    // walk saves the node it can).
    let eager = preps.len() < rayon::current_num_threads();
    let lats: Vec<Lattice> = if shared {
        let mut models: Vec<FieldModel> = preps
            .iter_mut()
            .map(|p| std::mem::replace(&mut p.model, placeholder()))
            .collect();
        let lat = scan_shared(&mut models, s, eager);
        for (p, m) in preps.iter_mut().zip(models) {
            p.model = m;
            progress.step();
        }
        vec![lat; preps.len()]
    } else {
        preps
            .par_iter_mut()
            .map(|p| {
                let lat = scan_own(&mut p.model, s, eager);
                progress.step();
                lat
            })
            .collect()
    };
    let (products, global, maps) = effect_priors(&preps, s);
    let fits: Vec<Result<FieldFit, String>> = preps
        .par_iter()
        .zip(lats.par_iter())
        .zip(maps.par_iter())
        .map(|((p, lat), map)| {
            let f = fit_own(p, lat, &global, map, s, !joint);
            progress.step();
            f
        })
        .collect();
    let mut out = AdjustOutput {
        comparisons: Vec::new(),
        plots: Vec::new(),
        treatments: Vec::new(),
        hyper: Vec::new(),
        warnings,
        missing_fields: Vec::new(),
        joint_ess: f64::NAN,
        stage_one: Vec::new(),
        response: Vec::new(),
        response_curve: Vec::new(),
    };
    // Fields that failed their own fit leave the joint fit too.
    let mut keep = Vec::new();
    let mut own = Vec::new();
    for (i, f) in fits.into_iter().enumerate() {
        match f {
            Ok(f) => {
                keep.push(i);
                own.push(f);
            }
            Err(w) => out.warnings.push(w),
        }
    }
    if own.is_empty() {
        return Err(AdjustError::NothingToFit(out.warnings));
    }
    let jf = if joint && keep.len() == preps.len() {
        let j = fit_joint(&preps, &lats, shared, &global, &maps, s);
        progress.step();
        j
    } else {
        if joint {
            out.warnings
                .push("the joint fit needs every field; fields were fitted separately".into());
        }
        None
    };
    let c = assemble::Fitted {
        preps: &preps,
        maps: &maps,
        global: &global,
        products: &products,
        s,
    };
    if let Some(r) = &s.rates {
        rate_fit::response_rows(&c, &own, &keep, jf.as_ref(), r, &mut out)
            .map_err(AdjustError::Rates)?;
    }
    match jf {
        Some(jf) => assemble::joint_rows(&c, &mut out, own, &jf, shared),
        None => assemble::separate_rows(&c, &mut out, own, &keep),
    }
    out.missing_fields = missing_fields(plots, &out);
    Ok(out)
}

pub(crate) fn push_fit(out: &mut AdjustOutput, f: FieldFit) {
    out.stage_one.push(f.stage_one);
    out.plots.extend(
        f.plots
            .expect("a field's plot effects are made before its fit is written"),
    );
    out.comparisons.push(f.comparison);
    out.treatments.extend(f.rows);
    if !f.hyper.warning.is_empty() {
        out.warnings
            .push(format!("field {}: {}", f.hyper.field, f.hyper.warning));
    }
    out.hyper.push(f.hyper);
}

/// An empty model to stand in while the real ones are scanned together.
pub(crate) fn placeholder() -> FieldModel {
    FieldModel {
        name: String::new(),
        design: Design {
            y: Vec::new(),
            x: Vec::new(),
            p: 0,
            coords: Vec::new(),
            kernel: Kernel::Matern52,
            groups: Vec::new(),
            basis_cache: Default::default(),
        },
        treatments: Vec::new(),
        sy: 1.0,
        dmin: 1.0,
        anisotropic: false,
        bounds: [(0.0, 1.0); 2],
        rho0: (1.0, 1.0),
        method: Method::Exact,
        nodes: BTreeMap::new(),
    }
}

#[cfg(test)]
mod random_tests;
#[cfg(test)]
mod response_tests;
#[cfg(test)]
pub(crate) mod season_tests;
#[cfg(test)]
mod tests;
