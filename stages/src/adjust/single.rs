//! One field fitted on its own: the hyperparameter lattice, the mixture over it, and the
//! field's rows.

use super::*;

/// Fit result of one field on its own.
pub(crate) struct FieldFit {
    /// None from `fit_own` when a joint fit is planned: its plot effects replace the
    /// field's own, which [`own_plots`] makes only if the joint fit falls back.
    pub(crate) plots: Option<Vec<AdjustedPlot>>,
    /// The points of the field's own posterior its plot effects are averaged over (the
    /// highest-weight points holding 99.9 % of the mass, at most 64).
    pub(crate) spatial_pts: Vec<Weighted>,
    /// The first of them with a spectral form and its spatial effect (mean, variance).
    pub(crate) mode_spatial: Option<(usize, (Vec<f64>, Vec<f64>))>,
    /// Empty from `fit_own` (see [`own_rows`]).
    pub(crate) rows: Vec<TreatmentRow>,
    pub(crate) comparison: Comparison,
    pub(crate) hyper: FieldHyper,
    /// (treatment, uplift mean, variance) for inverse-variance pooling.
    pub(crate) uplifts: Vec<(String, f64, f64)>,
    /// The field's own posterior: weighted components (see [`own_rows`]).
    pub(crate) comps: Vec<(f64, Component)>,
    /// Each component's lattice point (node key, index), in the order of `comps`.
    pub(crate) comp_keys: Vec<((i64, i64), usize)>,
    pub(crate) stage_one: StageOne,
}

/// The field's contrasts under flat priors on them: the GLS estimates mixed over the
/// hyperparameter posterior without the product prior (REML likelihood x hyperparameter
/// priors), moment-matched to one mean vector and covariance.
fn stage_one(prep: &Prepared, lat: &Lattice) -> StageOne {
    let m = &prep.model;
    let d = m.treatments.len() - 1;
    let mut all: Vec<Weighted> = Vec::new();
    for &k in &lat.keys {
        let node = &m.nodes[&k];
        let lpr = m.log_prior_range(node.l, lat.rho0) + lat.lvol;
        for (i, pt) in node.points.iter().enumerate() {
            all.push((lpr + pt.lw, k, i));
        }
    }
    let mut mean = vec![0.0; d];
    let mut second = vec![vec![0.0; d]; d];
    for (w, k, i) in top_weights(all, 3000) {
        let fit = &m.nodes[&k].points[i].fit;
        let p = (fit.cov.len() as f64).sqrt().round() as usize;
        for a in 0..d {
            mean[a] += w * fit.b[1 + a];
            for b in 0..d {
                second[a][b] += w * (fit.cov[(1 + a) * p + 1 + b] + fit.b[1 + a] * fit.b[1 + b]);
            }
        }
    }
    let cov = (0..d)
        .map(|a| (0..d).map(|b| second[a][b] - mean[a] * mean[b]).collect())
        .collect();
    StageOne {
        field: m.name.clone(),
        plots: m.design.n() as u64,
        yield_sd_kg_ha: m.sy,
        yield_mean_kg_ha: m.design.y.iter().sum::<f64>() / m.design.y.len().max(1) as f64,
        lon: None,
        lat: None,
        products: m.treatments[1..].to_vec(),
        product_plots: prep.counts[1..].to_vec(),
        uplift_kg_ha: mean,
        cov_kg_ha2: cov,
    }
}

/// Summaries of a field's hyperparameters from weighted points.
pub(crate) fn hyper_summaries(
    m: &FieldModel,
    pts: &[(f64, [f64; 4])],
) -> (Summary, Summary, Summary, Summary, Summary) {
    let v = |f: &dyn Fn(&[f64; 4]) -> f64| -> Summary {
        Summary::from_weighted(pts.iter().map(|(w, t)| (f(t), *w)).collect())
    };
    let range = v(&|t| t[0].exp());
    let across = if m.anisotropic {
        v(&|t| t[1].exp())
    } else {
        Summary::NONE
    };
    let sf = v(&|t| t[2].exp());
    let sn = v(&|t| t[3].exp());
    let share = v(&|t| {
        let (f, e) = (t[2].exp().powi(2), t[3].exp().powi(2));
        f / (f + e)
    });
    (range, across, sf, sn, share)
}

/// The row, column and block SDs from weighted points' ln SDs of the random factors (in
/// the order of `s.random`); NONE for a factor not fitted.
pub(crate) fn random_sds(s: &FitSettings, pts: &[(f64, &[f64])]) -> [Summary; 3] {
    let sums = random::group_summaries(pts);
    [RandomEffect::Row, RandomEffect::Column, RandomEffect::Block].map(|e| {
        s.random
            .iter()
            .position(|r| *r == e)
            .and_then(|j| sums.get(j).cloned())
            .unwrap_or(Summary::NONE)
    })
}

/// The spatial effect (mean, variance) at point `i` of node `k`, if the node has a spectral
/// form.
fn effect_at(m: &FieldModel, k: &(i64, i64), i: usize) -> Option<(Vec<f64>, Vec<f64>)> {
    let node: &Node = &m.nodes[k];
    let pt = &node.points[i];
    let repr = node.repr.as_ref()?;
    repr.spatial(&m.design, pt.theta[2].exp(), pt.theta[3].exp(), &pt.fit)
}

/// The spatial effect (weight, mean, variance) at each of `pts` that has a spectral form,
/// in parallel and in order, leaving out the one at index `skip`.
fn spatial_effects(
    m: &FieldModel,
    pts: &[Weighted],
    skip: Option<usize>,
) -> Vec<(f64, Vec<f64>, Vec<f64>)> {
    pts.par_iter()
        .enumerate()
        .filter(|(j, _)| Some(*j) != skip)
        .filter_map(|(_, (w, k, i))| effect_at(m, k, *i).map(|(mean, var)| (*w, mean, var)))
        .collect()
}

/// A field's plot effects under its own posterior when `fit_own` left them to be made (a
/// planned joint fit fell back to separate fits): the spatial effect at each of
/// `spatial_pts`, weighted, with the one `fit_own` made for the comparison taken as it is.
pub(crate) fn own_plots(
    prep: &Prepared,
    spatial_pts: &[Weighted],
    mode_spatial: Option<(usize, (Vec<f64>, Vec<f64>))>,
) -> Vec<AdjustedPlot> {
    let m = &prep.model;
    let mut effects = spatial_effects(m, spatial_pts, mode_spatial.as_ref().map(|x| x.0));
    if let Some((j, (mean, var))) = mode_spatial {
        // Those before the mode's point had no spectral form: it goes first.
        debug_assert!(spatial_pts[..j]
            .iter()
            .all(|(_, k, _)| m.nodes[k].repr.is_none()));
        effects.insert(0, (spatial_pts[j].0, mean, var));
    }
    adjusted_plots(prep, &effects)
}

/// A field's treatment rows under its own posterior (the separate fit) and, per product,
/// (treatment, uplift mean, variance) for inverse-variance pooling.
pub(crate) fn own_rows(
    prep: &Prepared,
    comps: &[(f64, Component)],
    global: &EffectPrior,
    map: &FieldMap,
    s: &FitSettings,
) -> (Vec<TreatmentRow>, Vec<(String, f64, f64)>) {
    let m = &prep.model;
    let field = m.name.as_str();
    let nt = m.treatments.len();
    let mut rows = Vec::new();
    let mut uplifts = Vec::new();
    for t in 0..nt {
        let est = Mixture::new(
            comps
                .iter()
                .map(|(w, c)| (*w, c.est[0][t].0, c.est[0][t].1))
                .collect(),
        );
        let up = (t > 0).then(|| {
            Mixture::new(
                comps
                    .iter()
                    .map(|(w, c)| (*w, c.delta[0][t - 1].0, c.delta[0][t - 1].1))
                    .collect(),
            )
        });
        let pr = (t > 0).then(|| {
            let g = map.index[t - 1];
            (global.mean[g], global.var[g].sqrt())
        });
        let row = treatment_row(
            s,
            field,
            &m.treatments[t],
            prep.counts[t],
            Some(&est),
            up.as_ref(),
            pr,
        );
        if t > 0 {
            uplifts.push((m.treatments[t].clone(), row.uplift, row.uplift_sd.powi(2)));
        }
        rows.push(row);
    }
    (rows, uplifts)
}

/// One field alone: its posterior over its lattice, spatial effects, treatment rows,
/// hyperparameters and the comparison with the no-spatial-field model.
pub(crate) fn fit_own(
    prep: &Prepared,
    lat: &Lattice,
    global: &EffectPrior,
    map: &FieldMap,
    s: &FitSettings,
    with_plots: bool,
) -> Result<FieldFit, String> {
    let m = &prep.model;
    let field = m.name.as_str();
    let (prior, lmap) = local_prior(global, map);
    // Every point's component (in parallel), then the weights from their log C.
    let keyed: Vec<((i64, i64), usize, f64)> = lat
        .keys
        .iter()
        .flat_map(|&k| {
            let node = &m.nodes[&k];
            let lpr = m.log_prior_range(node.l, lat.rho0) + lat.lvol;
            (0..node.points.len()).map(move |i| (k, i, lpr + node.points[i].lw))
        })
        .collect();
    let mut by_point: BTreeMap<((i64, i64), usize), Component> = BTreeMap::new();
    let mut all: Vec<Weighted> = Vec::new();
    let evaluated: Vec<Option<Component>> = keyed
        .par_iter()
        .map(|(k, i, _)| {
            combine(
                &[&m.nodes[k].points[*i].fit],
                std::slice::from_ref(&lmap),
                &prior,
                0.0,
                Moments::Rows,
            )
        })
        .collect();
    for ((k, i, lw), c) in keyed.into_iter().zip(evaluated) {
        if let Some(c) = c {
            all.push((lw + c.log_c, k, i));
            by_point.insert((k, i), c);
        }
    }
    if all.is_empty() {
        return Err(format!(
            "field {field}: the hyperparameter posterior could not be evaluated"
        ));
    }
    let comps_w = top_weights(all, 3000);
    let point = |k: &(i64, i64), i: usize| &m.nodes[k].points[i];
    let comps: Vec<(f64, Component)> = comps_w
        .iter()
        .filter_map(|(w, k, i)| by_point.remove(&(*k, *i)).map(|c| (*w, c)))
        .collect();
    // Spatial effects: the highest-weight points holding 99.9 % of the mass, at most 64.
    let mut acc = 0.0;
    let spatial_pts: Vec<Weighted> = comps_w
        .iter()
        .copied()
        .take_while(|x| {
            let go = acc < 0.999;
            acc += x.0;
            go
        })
        .take(64)
        .collect();
    // Plot effects: under the field's own posterior only where no joint fit will replace
    // them (`with_plots`); otherwise only the effect at the heaviest point with a spectral
    // form, for the comparison, kept in case a planned joint fit falls back.
    let (plots, mode_effect, mode_spatial) = if with_plots {
        let effects = spatial_effects(m, &spatial_pts, None);
        let mode_effect = effects
            .first()
            .map(|e| e.1.clone())
            .unwrap_or_else(|| vec![0.0; m.design.n()]);
        (Some(adjusted_plots(prep, &effects)), mode_effect, None)
    } else {
        let mode_spatial = spatial_pts
            .iter()
            .enumerate()
            .find_map(|(j, (_, k, i))| effect_at(m, k, *i).map(|e| (j, e)));
        let mode_effect = mode_spatial
            .as_ref()
            .map(|(_, (mean, _))| mean.clone())
            .unwrap_or_else(|| vec![0.0; m.design.n()]);
        (None, mode_effect, mode_spatial)
    };
    let n = m.design.n();
    // Hyperparameters over the components.
    let pts: Vec<(f64, [f64; 4])> = comps_w
        .iter()
        .map(|(w, k, i)| (*w, point(k, *i).theta))
        .collect();
    let (range, across, sf, sn, share) = hyper_summaries(m, &pts);
    let group_pts: Vec<(f64, &[f64])> = comps_w
        .iter()
        .map(|(w, k, i)| (*w, point(k, *i).groups.as_slice()))
        .collect();
    let [row_sd, column_sd, block_sd] = random_sds(s, &group_pts);
    let warnings = posterior_warnings(m, lat, &comps_w, s);
    // The comparison at the posterior mode.
    let (_, mk, mi) = comps_w[0];
    let mode = point(&mk, mi);
    let method = match m.nodes[&mk].basis {
        Some((a, b, _)) => format!("hsgp {a}x{b}"),
        None => "exact".into(),
    };
    let mut comparison = compare(prep, &mode.fit, &mode_effect)?;
    // The fit is in kg/ha; the log marginal likelihoods are stated for the yields in the
    // output unit: a restricted likelihood of n yields with p flat mean parameters gains
    // (n - p) ln(k) when the unit is k times smaller.
    let jacobian = (m.design.n() - m.design.p_fixed()) as f64 * s.kg_ha_per_unit.ln();
    comparison.log_ml_spatial += jacobian;
    comparison.log_ml_without_spatial += jacobian;
    let hyper = FieldHyper {
        field: field.into(),
        plots: n as u64,
        range_m: range.mean,
        range_lo95_m: range.lo95,
        range_hi95_m: range.hi95,
        range_across: across,
        spatial_sd: sf.mean,
        spatial_sd_ci: sf,
        noise_sd: sn.mean,
        noise_sd_ci: sn,
        spatial_share: share.mean,
        spatial_share_ci: share,
        interaction_sd: Summary::NONE,
        row_sd,
        column_sd,
        block_sd,
        log_marginal_likelihood: mode.fit.reml + jacobian,
        method,
        warning: warnings.join("; "),
    };
    Ok(FieldFit {
        plots,
        spatial_pts,
        mode_spatial,
        rows: Vec::new(),
        comparison,
        hyper,
        uplifts: Vec::new(),
        comps,
        comp_keys: comps_w.iter().map(|(_, k, i)| (*k, *i)).collect(),
        stage_one: stage_one(prep, lat),
    })
}

/// Warnings on a field's posterior: mass near a bound of the length-scale search, and mass
/// at length scales the reduced-rank basis resolves only in part.
fn posterior_warnings(
    m: &FieldModel,
    lat: &Lattice,
    comps_w: &[Weighted],
    s: &FitSettings,
) -> Vec<String> {
    let mut warnings = Vec::new();
    // Mass near a bound of the length-scale search.
    for d in 0..if m.anisotropic { 2 } else { 1 } {
        let maxk = ((lat.bounds[d].1 - lat.bounds[d].0) / lat.h[d]).round() as i64;
        let edge: f64 = comps_w
            .iter()
            .filter(|(_, k, _)| {
                let kd = if d == 0 { k.0 } else { k.1 };
                kd <= 1 || kd >= maxk - 1
            })
            .map(|x| x.0)
            .sum();
        if lat.at_bound[d] && edge > 0.10 {
            warnings.push(format!(
                "{:.0} % of the range posterior lies at a bound of its search ({:.1}..{:.1} m); the field may be too small to tell the range",
                100.0 * edge,
                lat.bounds[d].0.exp(),
                lat.bounds[d].1.exp()
            ));
        }
    }
    let capped: f64 = comps_w
        .iter()
        .filter(|(_, k, _)| m.nodes[k].basis.is_some_and(|b| b.2))
        .map(|x| x.0)
        .sum();
    if capped > 0.05 {
        warnings.push(format!(
            "{:.0} % of the posterior is at length scales the reduced-rank basis ({} functions) resolves only in part; raise adjust.hsgp_max_basis or adjust.exact_max_plots",
            100.0 * capped,
            s.hsgp_max_basis
        ));
    }
    warnings
}
