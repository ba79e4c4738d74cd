//! Field preparation: plots of one field to the design (yields, centroids, plot-grid axes,
//! mean-model columns) and the product-effect priors shared by the fields.

use super::*;

/// A field ready to fit, with its plots.
pub struct Prepared<'a> {
    pub model: FieldModel,
    pub plots: Vec<&'a PlotStats>,
    pub counts: Vec<u64>,
}

/// Plot yields whose SD is below this fraction of their mean are treated as identical
/// (common practice, no source: a real field's coefficient of variation is 5-15 %, so
/// 0.01 % is only rounding noise).
pub const MIN_CV: f64 = 1e-4;

/// Builds a field's design and priors, or says why it cannot be fitted.
pub fn prepare<'a>(
    field: &str,
    plots: Vec<&'a PlotStats>,
    s: &FitSettings,
) -> Result<Prepared<'a>, String> {
    let treatments: Vec<String> = {
        let set: BTreeSet<&str> = plots.iter().map(|p| p.treatment.as_str()).collect();
        let mut v: Vec<String> = set.into_iter().map(String::from).collect();
        v.sort_by_key(|t| (t != &s.check, t.clone()));
        v
    };
    if !treatments.contains(&s.check) {
        return Err(format!(
            "field {field}: no kept plot of the check {:?}; contrasts cannot be formed",
            s.check
        ));
    }
    if treatments.len() < 2 {
        return Err(format!(
            "field {field}: only one treatment ({}); nothing to compare",
            treatments[0]
        ));
    }
    let blocks: Vec<String> = if s.blocks {
        plots
            .iter()
            .map(|p| p.block.clone())
            .collect::<BTreeSet<_>>()
            .into_iter()
            .collect()
    } else {
        Vec::new()
    };
    let nt = treatments.len();
    let p = nt + blocks.len().saturating_sub(1);
    let n = plots.len();
    if n < p + 2 {
        return Err(format!(
            "field {field}: {n} kept plots for {p} mean parameters; at least {} needed",
            p + 2
        ));
    }
    let y: Vec<f64> = plots.iter().map(|p| p.yield_mean).collect();
    let sy = sd(&y);
    let my = y.iter().sum::<f64>() / y.len() as f64;
    // Plot yields that differ only by rounding noise carry no information about the
    // products; fitted, they give contrasts of a few grams with near-certain probabilities.
    // A coefficient of variation under MIN_CV (real fields: 5-15 %) counts as none.
    if !(sy > MIN_CV * my.abs()) || !(sy > 0.0) {
        return Err(format!(
            "field {field}: all plot yields are equal (SD {sy:.3e} around a mean of {my:.6}, under {MIN_CV} of it); no variation to model"
        ));
    }
    // Columns: intercept (the check), one contrast per product, sum-to-zero blocks.
    let x = fixed_columns(&plots, &treatments, &blocks, p);
    // Kernel axes: the plot grid's own (along, across) when they matter and are known
    // (anisotropy; the reduced-rank basis's box), else projected x/y (distances are equal).
    let grid = (s.anisotropic || n > s.exact_max_plots)
        && plots
            .iter()
            .all(|p| p.along_m.is_finite() && p.across_m.is_finite());
    let coords: Vec<(f64, f64)> = plots
        .iter()
        .map(|p| {
            if grid {
                (p.along_m, p.across_m)
            } else {
                (p.centroid_x_m, p.centroid_y_m)
            }
        })
        .collect();
    let (dmin, dmax, amin) = super::spacing::spacing(&coords);
    if !dmin.is_finite() {
        return Err(format!("field {field}: all plots share one position"));
    }
    let lo = |r0: f64| {
        if s.min_range_m > 0.0 {
            s.min_range_m
        } else {
            0.5 * r0
        }
    };
    let hi = if s.max_range_m > 0.0 {
        s.max_range_m
    } else {
        10.0 * dmax
    };
    let rho0 = if s.anisotropic {
        (
            if amin[0].is_finite() { amin[0] } else { dmin },
            if amin[1].is_finite() { amin[1] } else { dmin },
        )
    } else {
        (dmin, dmin)
    };
    let bounds = [
        (lo(rho0.0).ln(), hi.ln().max(lo(rho0.0).ln() + 0.1)),
        (lo(rho0.1).ln(), hi.ln().max(lo(rho0.1).ln() + 0.1)),
    ];
    // Random design effects: indicator columns after the fixed ones.
    let (x, p_all, groups) = random_columns(field, &plots, x, p, dmin, &s.random)?;
    let method = if n <= s.exact_max_plots {
        Method::Exact
    } else {
        Method::Hsgp {
            max_basis: s.hsgp_max_basis,
            min_boundary: s.hsgp_boundary,
        }
    };
    let counts = treatments
        .iter()
        .map(|t| plots.iter().filter(|p| &p.treatment == t).count() as u64)
        .collect();
    Ok(Prepared {
        model: FieldModel {
            name: field.into(),
            design: Design {
                y,
                x,
                p: p_all,
                coords,
                kernel: s.kernel,
                groups,
                basis_cache: Default::default(),
            },
            treatments,
            sy,
            dmin,
            anisotropic: s.anisotropic,
            bounds,
            rho0,
            method,
            nodes: BTreeMap::new(),
        },
        plots,
        counts,
    })
}

/// The fixed-effect columns, row by row: intercept (the check), one contrast per product,
/// sum-to-zero blocks.
fn fixed_columns(
    plots: &[&PlotStats],
    treatments: &[String],
    blocks: &[String],
    p: usize,
) -> Vec<f64> {
    let (n, nt) = (plots.len(), treatments.len());
    let mut x = vec![0.0; n * p];
    for (i, pl) in plots.iter().enumerate() {
        let row = &mut x[i * p..(i + 1) * p];
        row[0] = 1.0;
        let t = treatments
            .iter()
            .position(|t| *t == pl.treatment)
            .unwrap_or(0);
        if t > 0 {
            row[t] = 1.0;
        }
        if blocks.len() > 1 {
            let b = blocks.iter().position(|b| *b == pl.block).unwrap_or(0);
            for j in 1..blocks.len() {
                row[nt + j - 1] = if b == j {
                    1.0
                } else if b == 0 {
                    -1.0
                } else {
                    0.0
                };
            }
        }
    }
    x
}

/// The level of each plot in a design factor: its block, or its row or column of the plot
/// grid. Without a grid (a plot table), rows are the distinct x positions and columns the
/// distinct y positions (positions closer than a quarter of the smallest plot spacing are
/// one), as a table's row x row spacing and range x range spacing give them.
fn levels(plots: &[&PlotStats], e: RandomEffect, dmin: f64) -> Vec<usize> {
    let grid = plots.iter().all(|p| p.grid_row > 0 && p.grid_range > 0);
    let by_key = |keys: Vec<String>| -> Vec<usize> {
        let set: Vec<&String> = keys.iter().collect::<BTreeSet<_>>().into_iter().collect();
        keys.iter()
            .map(|k| set.iter().position(|x| *x == k).unwrap_or(0))
            .collect()
    };
    let by_position = |v: Vec<f64>| -> Vec<usize> {
        let mut sorted = v.clone();
        sorted.sort_by(f64::total_cmp);
        let mut starts = vec![sorted[0]];
        for w in sorted.windows(2) {
            if w[1] - w[0] > 0.25 * dmin {
                starts.push(w[1]);
            }
        }
        v.iter()
            .map(|x| starts.iter().rposition(|s| *s <= *x).unwrap_or(0))
            .collect()
    };
    match (e, grid) {
        (RandomEffect::Block, _) => by_key(plots.iter().map(|p| p.block.clone()).collect()),
        (RandomEffect::Row, true) => plots.iter().map(|p| p.grid_row as usize).collect(),
        (RandomEffect::Column, true) => plots.iter().map(|p| p.grid_range as usize).collect(),
        (RandomEffect::Row, false) => by_position(plots.iter().map(|p| p.centroid_x_m).collect()),
        (RandomEffect::Column, false) => {
            by_position(plots.iter().map(|p| p.centroid_y_m).collect())
        }
    }
}

/// Appends one indicator column per level of each random design factor to the n x p
/// matrix `x`: the new matrix, its width and the groups (first column, levels). A factor
/// with a single level in the field is an error (it cannot be told from the field mean).
#[allow(clippy::type_complexity)]
fn random_columns(
    field: &str,
    plots: &[&PlotStats],
    x: Vec<f64>,
    p: usize,
    dmin: f64,
    random: &[RandomEffect],
) -> Result<(Vec<f64>, usize, Vec<(usize, usize)>), String> {
    if random.is_empty() {
        return Ok((x, p, Vec::new()));
    }
    let n = plots.len();
    let mut groups = Vec::new();
    let mut idx: Vec<Vec<usize>> = Vec::new();
    let mut width = p;
    for &e in random {
        let lv = levels(plots, e, dmin);
        // Dense level numbers in order of first value.
        let set: BTreeSet<usize> = lv.iter().copied().collect();
        if set.len() < 2 {
            return Err(format!(
                "field {field}: adjust.random_effects has {e}, but all its plots are in one {e}; a {e} effect cannot be told from the field mean"
            ));
        }
        let dense: Vec<usize> = lv
            .iter()
            .map(|v| set.iter().position(|s| s == v).unwrap_or(0))
            .collect();
        groups.push((width, set.len()));
        width += set.len();
        idx.push(dense);
    }
    let mut out = vec![0.0; n * width];
    for i in 0..n {
        out[i * width..i * width + p].copy_from_slice(&x[i * p..(i + 1) * p]);
        for (g, &(start, _)) in groups.iter().enumerate() {
            out[i * width + start + idx[g][i]] = 1.0;
        }
    }
    Ok((out, width, groups))
}

/// SD of the weak default prior on product effects (and on a rate curve's coefficients):
/// `adjust.weak_prior_sd`, or ten times `mean_sy`, the mean SD of the fields' plot yields.
pub(crate) fn weak_prior_sd(s: &FitSettings, mean_sy: f64) -> f64 {
    if s.weak_prior_sd > 0.0 {
        s.weak_prior_sd
    } else {
        10.0 * mean_sy
    }
}

/// The prior on product effects in the global product order, and each field's map into it.
pub(crate) fn effect_priors(
    preps: &[Prepared],
    s: &FitSettings,
) -> (Vec<String>, EffectPrior, Vec<FieldMap>) {
    let products: Vec<String> = preps
        .iter()
        .flat_map(|p| p.model.treatments[1..].iter().cloned())
        .collect::<BTreeSet<_>>()
        .into_iter()
        .collect();
    let mean_sy = preps.iter().map(|p| p.model.sy).sum::<f64>() / preps.len().max(1) as f64;
    let weak = weak_prior_sd(s, mean_sy);
    let (mean, var) = products
        .iter()
        .map(|t| match s.product_prior.get(t) {
            Some(&(m, sd)) => (m, sd * sd),
            None => (0.0, weak * weak),
        })
        .unzip();
    let maps = preps
        .iter()
        .map(|p| FieldMap {
            index: p.model.treatments[1..]
                .iter()
                .map(|t| products.iter().position(|x| x == t).unwrap_or(0))
                .collect(),
        })
        .collect();
    (products, EffectPrior { mean, var }, maps)
}

/// A field's prior and map restricted to its own products (for its single-field fit).
pub(crate) fn local_prior(global: &EffectPrior, map: &FieldMap) -> (EffectPrior, FieldMap) {
    (
        EffectPrior {
            mean: map.index.iter().map(|&k| global.mean[k]).collect(),
            var: map.index.iter().map(|&k| global.var[k]).collect(),
        },
        FieldMap {
            index: (0..map.index.len()).collect(),
        },
    )
}
