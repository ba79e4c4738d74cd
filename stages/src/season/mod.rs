//! The season across trials: stage two of a two-stage analysis of a series of trials.
//!
//! Method: the stage-wise analysis of Piepho, Möhring, Schulz-Streeck & Ogutu (2012), "A
//! stage-wise approach for the analysis of multi-environment trials", Biometrical Journal
//! 54:844-860, in its fully efficient form, where stage two takes each location's estimates
//! with their full variance-covariance matrix from stage one (see also Smith, Cullis &
//! Gilmour 2001, Australian & New Zealand Journal of Statistics 43:129-145).
//!
//! Stage one (the adjust stage of each trial, `adjust::StageOne`): each field fitted alone
//! with its spatial model gives its products' contrasts with the check, c_j, and their
//! covariance S_j, from its posterior with flat priors on the contrasts. A location is one
//! field of one trial.
//!
//! Stage two (here), for location j holding products P_j:
//!
//!   c_j ~ N(delta_j, S_j),  delta_j = beta[P_j] + u_j,  u_j ~ N(0, tau^2 I),
//!
//! with the products' effects beta under the same priors as a trial's joint fit (weak normal,
//! or the given ones) and tau, the product x location SD, under the same penalised-complexity
//! prior (on a finer ladder of values, `adjust::interaction_ladder`). Given tau everything is Gaussian and
//! exact (`adjust::joint::combine`, the joint fit's treatment-level equations); tau is
//! integrated over its nodes. Outputs: each product's mean effect, the uplift in a new
//! location (beta plus a new u draw), and each location's effect shrunk toward the product
//! mean (the posterior of delta_j), all mixtures over tau.
//!
//! Against a one-stage joint fit of the same fields the only approximation is stage one's: a
//! field's contrasts enter as one normal (moment-matched over its hyperparameters) instead
//! of a mixture; `tests` measures the difference.

use crate::adjust::field::log_sum_exp;
use crate::adjust::joint::{combine, Component, EffectPrior, FieldMap, Mixture, Moments};
use crate::adjust::response::PostPoint;
use crate::adjust::spectral::Inner;
use crate::adjust::{
    pooled_row, treatment_row, FitSettings, ResponseCurveRow, ResponseRow, StageOne, Summary,
    TreatmentRow,
};
use std::collections::BTreeSet;

/// Rungs of the product x field SD's ladder (0.01 U to 4 U): fine, as each costs one small
/// solve; the joint fit's 14 rungs are 1.59 apart, which leaves the predictive variance
/// (the mean of s^2 over a cell) a little short.
const TAU_RUNGS: usize = 120;

/// One location: a field of one trial with its stage-one contrasts.
#[derive(Clone, Debug)]
pub struct Location {
    pub trial: String,
    pub one: StageOne,
}

/// A product at one location: its stage-one contrast and its effect there shrunk toward the
/// product mean (kg/ha).
#[derive(Clone, Debug, Default, PartialEq)]
pub struct LocationRow {
    pub trial: String,
    pub field: String,
    pub product: String,
    pub plots: u64,
    pub stage_one_uplift: f64,
    pub stage_one_sd: f64,
    pub uplift: f64,
    pub uplift_sd: f64,
    pub uplift_lo95: f64,
    pub uplift_hi95: f64,
    pub p_uplift_gt0: f64,
    pub lon: f64,
    pub lat: f64,
}

/// One node of the product x location SD: its value, prior mass and posterior weight.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct TauNode {
    pub sd: f64,
    pub prior: f64,
    pub posterior: f64,
}

/// The season fit.
#[derive(Clone, Debug)]
pub struct SeasonFit {
    /// One row per product (field = "all"): mean effect and new-location predictive.
    pub products: Vec<TreatmentRow>,
    pub locations: Vec<LocationRow>,
    /// The product x location SD, kg/ha.
    pub interaction_sd: Summary,
    pub nodes: Vec<TauNode>,
}

/// Stage one's contrasts as the GLS input of the treatment-level equations: an intercept
/// (unused, variance 1, uncorrelated) and the contrasts.
fn as_inner(one: &StageOne) -> Inner {
    let d = one.products.len();
    let p = d + 1;
    let mut b = vec![0.0; p];
    b[1..].copy_from_slice(&one.uplift_kg_ha);
    let mut cov = vec![0.0; p * p];
    cov[0] = 1.0;
    for a in 0..d {
        for c in 0..d {
            cov[(a + 1) * p + c + 1] = one.cov_kg_ha2[a][c];
        }
    }
    Inner { reml: 0.0, b, cov }
}

/// Checks of one location's stage-one record: sizes agree, numbers finite, variances
/// positive and the covariance symmetric.
fn check_location(l: &Location) -> Result<(), String> {
    let o = &l.one;
    let d = o.products.len();
    let at = format!("trial {}, field {}", l.trial, o.field);
    if d == 0 {
        return Err(format!("{at}: no product besides the check"));
    }
    if o.uplift_kg_ha.len() != d
        || o.product_plots.len() != d
        || o.cov_kg_ha2.len() != d
        || o.cov_kg_ha2.iter().any(|r| r.len() != d)
    {
        return Err(format!(
            "{at}: {d} products but uplifts, plot counts or covariance of another size"
        ));
    }
    for a in 0..d {
        if !o.uplift_kg_ha[a].is_finite() || !(o.cov_kg_ha2[a][a] > 0.0) {
            return Err(format!(
                "{at}, product {}: expected a finite uplift and a positive variance, found {} and {}",
                o.products[a], o.uplift_kg_ha[a], o.cov_kg_ha2[a][a]
            ));
        }
        for c in 0..d {
            let (x, y) = (o.cov_kg_ha2[a][c], o.cov_kg_ha2[c][a]);
            if !x.is_finite() || (x - y).abs() > 1e-6 * (x.abs() + y.abs() + 1.0) {
                return Err(format!(
                    "{at}: the covariance is not a finite symmetric matrix"
                ));
            }
        }
    }
    Ok(())
}

/// Stage two over `locs` with the priors and economics of `s` (kg/ha; `s.check` names the
/// check). Needs two or more locations.
/// Stage two's pieces: the products (global order), their prior, each location's map and
/// stage-one fit, and per product x location SD node (log weight, log prior, SD, component).
struct StageTwo {
    products: Vec<String>,
    prior: EffectPrior,
    maps: Vec<FieldMap>,
    inners: Vec<Inner>,
    comps: Vec<(f64, f64, f64, Component)>,
    /// The weak prior SD of the product effects.
    weak: f64,
}

fn stage_two(locs: &[Location], s: &FitSettings) -> Result<StageTwo, String> {
    if locs.len() < 2 {
        return Err(format!(
            "a season fit needs two or more fields; found {}",
            locs.len()
        ));
    }
    for l in locs {
        check_location(l)?;
    }
    let products: Vec<String> = locs
        .iter()
        .flat_map(|l| l.one.products.iter().cloned())
        .collect::<BTreeSet<_>>()
        .into_iter()
        .collect();
    let mean_sy = locs.iter().map(|l| l.one.yield_sd_kg_ha).sum::<f64>() / locs.len() as f64;
    let weak = crate::adjust::weak_prior_sd(s, mean_sy);
    let (mean, var): (Vec<f64>, Vec<f64>) = products
        .iter()
        .map(|t| match s.product_prior.get(t) {
            Some(&(m, sd)) => (m, sd * sd),
            None => (0.0, weak * weak),
        })
        .unzip();
    let prior = EffectPrior { mean, var };
    let maps: Vec<FieldMap> = locs
        .iter()
        .map(|l| FieldMap {
            index: l
                .one
                .products
                .iter()
                .map(|t| products.binary_search(t).unwrap_or(0))
                .collect(),
        })
        .collect();
    let inners: Vec<Inner> = locs.iter().map(|l| as_inner(&l.one)).collect();
    let fits: Vec<&Inner> = inners.iter().collect();
    let u = if s.interaction_sd_u > 0.0 {
        s.interaction_sd_u
    } else {
        mean_sy
    };
    let snodes = if s.interaction {
        crate::adjust::interaction_ladder(u, TAU_RUNGS)
    } else {
        vec![(0.0, 0.0)]
    };
    let comps: Vec<(f64, f64, f64, Component)> = snodes
        .iter()
        .filter_map(|&(sv, lp)| {
            combine(&fits, &maps, &prior, sv, Moments::Rows).map(|c| (lp + c.log_c, lp, sv, c))
        })
        .collect();
    if comps.is_empty() {
        return Err("the season's stage-one covariances are not positive definite".into());
    }
    Ok(StageTwo {
        products,
        prior,
        maps,
        inners,
        comps,
        weak,
    })
}

pub fn fit(locs: &[Location], s: &FitSettings) -> Result<SeasonFit, String> {
    let StageTwo {
        products,
        prior,
        maps: _,
        inners: _,
        comps,
        weak: _,
    } = stage_two(locs, s)?;
    let z = log_sum_exp(comps.iter().map(|c| c.0));
    let w: Vec<f64> = comps.iter().map(|c| (c.0 - z).exp()).collect();
    let nodes = comps
        .iter()
        .zip(&w)
        .map(|((_, lp, sv, _), w)| TauNode {
            sd: *sv,
            prior: lp.exp(),
            posterior: *w,
        })
        .collect();
    let interaction_sd =
        Summary::from_weighted(comps.iter().zip(&w).map(|(c, w)| (c.2, *w)).collect());
    let mut rows = Vec::new();
    for (g, name) in products.iter().enumerate() {
        let count = locs
            .iter()
            .filter_map(|l| {
                let k = l.one.products.iter().position(|t| t == name)?;
                Some(l.one.product_plots[k])
            })
            .sum();
        let parts: Vec<(f64, f64, f64, f64)> = comps
            .iter()
            .zip(&w)
            .map(|((_, _, sv, c), w)| (*w, c.beta_mean[g], c.beta_var[g], *sv))
            .collect();
        rows.push(pooled_row(
            s,
            name,
            count,
            &parts,
            (prior.mean[g], prior.var[g].sqrt()),
        ));
    }
    let mut locations = Vec::new();
    for (j, l) in locs.iter().enumerate() {
        for (a, name) in l.one.products.iter().enumerate() {
            let m = Mixture::new(
                comps
                    .iter()
                    .zip(&w)
                    .map(|((.., c), w)| (*w, c.delta[j][a].0, c.delta[j][a].1))
                    .collect(),
            );
            let r = treatment_row(
                s,
                &l.one.field,
                name,
                l.one.product_plots[a],
                None,
                Some(&m),
                None,
            );
            locations.push(LocationRow {
                trial: l.trial.clone(),
                field: l.one.field.clone(),
                product: name.clone(),
                plots: l.one.product_plots[a],
                stage_one_uplift: l.one.uplift_kg_ha[a],
                stage_one_sd: l.one.cov_kg_ha2[a][a].sqrt(),
                uplift: r.uplift,
                uplift_sd: r.uplift_sd,
                uplift_lo95: r.uplift_lo95,
                uplift_hi95: r.uplift_hi95,
                p_uplift_gt0: r.p_uplift_gt0,
                lon: l.one.lon.unwrap_or(f64::NAN),
                lat: l.one.lat.unwrap_or(f64::NAN),
            });
        }
    }
    Ok(SeasonFit {
        products: rows,
        locations,
        interaction_sd,
        nodes,
    })
}

/// A season of rate trials: the response curves across every trial's fields (stage two with
/// the products' effects a curve of their rates, see `adjust::response`), pooled rows and the
/// averaged curve, with the optimum in a new field.
pub fn fit_curves(
    locs: &[Location],
    s: &FitSettings,
    rates: &crate::adjust::RateSettings,
) -> Result<(Vec<ResponseRow>, Vec<ResponseCurveRow>), String> {
    let two = stage_two(locs, s)?;
    let z = log_sum_exp(two.comps.iter().map(|c| c.0));
    let points: Vec<PostPoint> = two
        .comps
        .iter()
        .map(|(lw, _, sv, c)| PostPoint {
            w: (lw - z).exp(),
            fits: two.inners.iter().collect(),
            s: *sv,
            log_c: c.log_c,
        })
        .collect();
    crate::adjust::pooled_response(
        &points,
        &two.maps,
        &two.products,
        s,
        rates,
        two.weak,
        &locs
            .iter()
            .map(|l| l.one.yield_mean_kg_ha)
            .collect::<Vec<_>>(),
    )
}

/// The stage-one file every adjust run writes (`4-adjust/contrasts.json`): each fitted
/// field's contrasts and covariance in kg/ha, with the trial's crop and check.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ContrastsFile {
    pub format: String,
    pub trial: String,
    pub crop: String,
    pub check: String,
    pub fields: Vec<StageOne>,
}

/// The contrasts file's format tag.
pub const CONTRASTS_FORMAT: &str = "plotsieve-contrasts-1";

impl ContrastsFile {
    /// Parse a contrasts file; `name` is used in errors.
    pub fn parse(text: &str, name: &str) -> Result<ContrastsFile, String> {
        let f: ContrastsFile = serde_json::from_str(text)
            .map_err(|e| format!("{name}: not a contrasts file ({e})"))?;
        if f.format != CONTRASTS_FORMAT {
            return Err(format!(
                "{name}: format {:?}, expected {CONTRASTS_FORMAT:?}",
                f.format
            ));
        }
        Ok(f)
    }
}

#[cfg(test)]
mod tests;
