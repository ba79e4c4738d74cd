//! The stage's rows from the fields' fits: under the joint posterior of all fields (each
//! field's rows, its hyperparameters and the pooled rows), or from each field's own
//! posterior with an inverse-variance pooled row.

use super::joint_fit::JointFit;
use super::*;

/// What the rows are made from.
pub(crate) struct Fitted<'a> {
    pub preps: &'a [Prepared<'a>],
    pub maps: &'a [FieldMap],
    pub global: &'a EffectPrior,
    /// The products over all fields, in the order of `global`.
    pub products: &'a [String],
    pub s: &'a FitSettings,
}

/// Every field's rows and the pooled rows under the joint fit.
pub(crate) fn joint_rows(
    c: &Fitted,
    out: &mut AdjustOutput,
    own: Vec<FieldFit>,
    jf: &JointFit,
    shared: bool,
) {
    let Fitted {
        preps,
        maps,
        global,
        products,
        s,
    } = c;
    out.joint_ess = jf.ess;
    if jf.ess < 100.0 {
        out.warnings.push(format!(
            "the joint fit's importance draws have an effective sample size of {:.0}; raise adjust.joint_draws",
            jf.ess
        ));
    }
    for (f, (prep, mut fit)) in preps.iter().zip(own).enumerate() {
        joint_field(c, &mut fit, prep, f, jf);
        push_fit(out, fit);
    }
    let inter = Summary::from_weighted(jf.comps.iter().map(|(w, _, sv, _)| (*sv, *w)).collect());
    let (range, across) = if shared {
        let pts: Vec<(f64, [f64; 4])> = jf
            .comps
            .iter()
            .map(|(w, _, _, pick)| {
                let (k, i) = pick[0];
                (*w, preps[0].model.nodes[&k].points[i].theta)
            })
            .collect();
        let (r, a, ..) = hyper_summaries(&preps[0].model, &pts);
        (r, a)
    } else {
        (Summary::NONE, Summary::NONE)
    };
    out.hyper.push(FieldHyper {
        field: "all".into(),
        plots: preps.iter().map(|p| p.model.design.n() as u64).sum(),
        range_m: range.mean,
        range_lo95_m: range.lo95,
        range_hi95_m: range.hi95,
        range_across: across,
        spatial_sd: f64::NAN,
        spatial_sd_ci: Summary::NONE,
        noise_sd: f64::NAN,
        noise_sd_ci: Summary::NONE,
        spatial_share: f64::NAN,
        spatial_share_ci: Summary::NONE,
        interaction_sd: inter,
        row_sd: Summary::NONE,
        column_sd: Summary::NONE,
        block_sd: Summary::NONE,
        log_marginal_likelihood: f64::NAN,
        // The ESS is of every weighted draw; the mixture keeps the draws above 1e-10
        // of the largest weight (at most 3,000, resampled beyond).
        method: format!(
            "joint, {} draws, ESS {:.0}, {} kept",
            jf.draws,
            jf.ess,
            jf.comps.len()
        ),
        warning: String::new(),
    });
    let mut pooled: Vec<TreatmentRow> = vec![treatment_row(
        s,
        "all",
        &s.check,
        preps.iter().map(|p| p.counts[0]).sum(),
        None,
        None,
        None,
    )];
    for (g, name) in products.iter().enumerate() {
        let count = preps
            .iter()
            .zip(maps.iter())
            .filter_map(|(p, m)| {
                m.index
                    .iter()
                    .position(|&k| k == g)
                    .map(|t| p.counts[t + 1])
            })
            .sum();
        let parts: Vec<(f64, f64, f64, f64)> = jf
            .comps
            .iter()
            .map(|(w, c, sv, _)| (*w, c.beta_mean[g], c.beta_var[g], *sv))
            .collect();
        pooled.push(pooled_row(
            s,
            name,
            count,
            &parts,
            (global.mean[g], global.var[g].sqrt()),
        ));
    }
    out.treatments.extend(pooled);
}

/// One field's rows, hyperparameters and plot effects under the joint fit (field `f`).
fn joint_field(c: &Fitted, fit: &mut FieldFit, prep: &Prepared, f: usize, jf: &JointFit) {
    let (maps, global, s) = (c.maps, c.global, c.s);
    let m = &prep.model;
    let nt = m.treatments.len();
    fit.rows = (0..nt)
        .map(|t| {
            let est = Mixture::new(
                jf.comps
                    .iter()
                    .map(|(w, c, _, _)| (*w, c.est[f][t].0, c.est[f][t].1))
                    .collect(),
            );
            let up = (t > 0).then(|| {
                Mixture::new(
                    jf.comps
                        .iter()
                        .map(|(w, c, _, _)| (*w, c.delta[f][t - 1].0, c.delta[f][t - 1].1))
                        .collect(),
                )
            });
            let pr = (t > 0).then(|| {
                let g = maps[f].index[t - 1];
                (global.mean[g], global.var[g].sqrt())
            });
            treatment_row(
                s,
                &m.name,
                &m.treatments[t],
                prep.counts[t],
                Some(&est),
                up.as_ref(),
                pr,
            )
        })
        .collect();
    let pts: Vec<(f64, [f64; 4])> = jf
        .comps
        .iter()
        .map(|(w, _, _, pick)| {
            let (k, i) = pick[f];
            (*w, m.nodes[&k].points[i].theta)
        })
        .collect();
    let (range, across, sf, sn, share) = hyper_summaries(m, &pts);
    let group_pts: Vec<(f64, &[f64])> = jf
        .comps
        .iter()
        .map(|(w, _, _, pick)| {
            let (k, i) = pick[f];
            (*w, m.nodes[&k].points[i].groups.as_slice())
        })
        .collect();
    let h = &mut fit.hyper;
    [h.row_sd, h.column_sd, h.block_sd] = random_sds(s, &group_pts);
    (h.range_m, h.range_lo95_m, h.range_hi95_m) = (range.mean, range.lo95, range.hi95);
    h.range_across = across;
    (h.spatial_sd, h.spatial_sd_ci) = (sf.mean, sf);
    (h.noise_sd, h.noise_sd_ci) = (sn.mean, sn);
    (h.spatial_share, h.spatial_share_ci) = (share.mean, share);
    fit.plots = Some(joint_plots(prep, f, jf));
}

/// Each field's rows under its own posterior, and pooled rows over the fields holding each
/// product (`keep`: the fitted fields' indices in `preps`).
pub(crate) fn separate_rows(
    c: &Fitted,
    out: &mut AdjustOutput,
    mut own: Vec<FieldFit>,
    keep: &[usize],
) {
    let Fitted {
        preps,
        maps,
        global,
        products,
        s,
    } = c;
    let mut pool: BTreeMap<String, Vec<(f64, f64)>> = BTreeMap::new();
    let mut counts: BTreeMap<String, u64> = BTreeMap::new();
    // Each product's row in the field that holds it (the last one seen).
    let mut field_row: BTreeMap<String, TreatmentRow> = BTreeMap::new();
    // Each field's rows and plot effects under its own posterior (fields in parallel).
    own.par_iter_mut().enumerate().for_each(|(i, fit)| {
        let prep = &preps[keep[i]];
        (fit.rows, fit.uplifts) = own_rows(prep, &fit.comps, global, &maps[keep[i]], s);
        if fit.plots.is_none() {
            fit.plots = Some(own_plots(prep, &fit.spatial_pts, fit.mode_spatial.take()));
        }
    });
    for (i, fit) in own.into_iter().enumerate() {
        let prep = &preps[keep[i]];
        for (t, c) in prep.model.treatments.iter().zip(&prep.counts) {
            *counts.entry(t.clone()).or_default() += c;
        }
        for (t, u, v) in &fit.uplifts {
            pool.entry(t.clone()).or_default().push((*u, *v));
        }
        for r in &fit.rows {
            field_row.insert(r.treatment.clone(), r.clone());
        }
        push_fit(out, fit);
    }
    // Pooled rows: inverse-variance weighted over the fields holding the product (a
    // fixed-effect combination of separate fits; each field's uplift already carries
    // the product prior, so an informative prior counts once per field here).
    out.treatments.push(treatment_row(
        s,
        "all",
        &s.check,
        counts[&s.check],
        None,
        None,
        None,
    ));
    for (t, v) in pool {
        // A product in one field: its pooled row is that field's (the same posterior
        // mixture, so the same intervals and probabilities, not a normal
        // approximation of it).
        if let (1, Some(r)) = (v.len(), field_row.get(&t)) {
            out.treatments.push(TreatmentRow {
                field: "all".into(),
                estimate: f64::NAN,
                sd: f64::NAN,
                lo95: f64::NAN,
                hi95: f64::NAN,
                ..r.clone()
            });
            continue;
        }
        let w: f64 = v.iter().map(|x| 1.0 / x.1).sum();
        let up = v.iter().map(|x| x.0 / x.1).sum::<f64>() / w;
        let mix = Mixture::new(vec![(1.0, up, 1.0 / w)]);
        let g = products.iter().position(|p| *p == t).unwrap_or(0);
        out.treatments.push(treatment_row(
            s,
            "all",
            &t,
            counts[&t],
            None,
            Some(&mix),
            Some((global.mean[g], global.var[g].sqrt())),
        ));
    }
}
