//! A rate trial's response rows: the rates checked against the fitted treatments, the
//! posterior points of each field's own fit and of the joint fit handed to `response`, and
//! the rows of `response.csv` and `response_curve.csv`.

use super::response::{self, Curve, Economics, Piece, PostPoint, RateDesign};
use super::*;

/// A response row: one curve (or their average) in one field (or pooled: "all").
#[derive(Clone, Debug, Default, PartialEq)]
pub struct ResponseRow {
    pub field: String,
    /// "averaged", or one of the curves.
    pub model: String,
    /// Posterior probability of the curve among the three (1 for the average).
    pub probability: f64,
    /// log Bayes factor of the curve against unordered treatments (NaN for the average).
    pub log_bayes_factor: f64,
    pub rate_unit: String,
    /// The rate that maximises the expected net return (without prices, the yield).
    pub optimum_rate: f64,
    pub optimum_lo90: f64,
    pub optimum_hi90: f64,
    pub optimum_lo95: f64,
    pub optimum_hi95: f64,
    /// Share of the posterior whose optimum is the highest rate tested.
    pub p_optimum_at_highest: f64,
    /// Expected yield gain over the lowest rate at the optimum, kg/ha.
    pub gain_at_optimum: f64,
    /// Expected net return over the lowest rate at the optimum, per hectare.
    pub net_return_at_optimum_per_ha: f64,
    pub p_optimum_beats_lowest: f64,
    pub p_optimum_beats_current: f64,
    pub flat_top_lo: f64,
    pub flat_top_hi: f64,
    /// A joint fit's pooled average: the optimum's 90 and 95 % intervals in a field that
    /// was not in the trial (the shared curve plus a new draw of the treatment x field
    /// interaction at each rate tested), and P(the optimum beats the lowest rate there).
    pub new_field_lo90: f64,
    pub new_field_hi90: f64,
    pub new_field_lo95: f64,
    pub new_field_hi95: f64,
    pub p_new_field_beats_lowest: f64,
    pub note: String,
}

/// The averaged curve at one rate in one field (or pooled).
#[derive(Clone, Debug, Default, PartialEq)]
pub struct ResponseCurveRow {
    pub field: String,
    pub rate: f64,
    /// The rate is one of the trial's.
    pub tested: bool,
    /// Yield gain over the lowest rate, kg/ha: mean and 95 % band.
    pub gain: f64,
    pub gain_lo95: f64,
    pub gain_hi95: f64,
    /// Net return over the lowest rate, per hectare.
    pub net_return_per_ha: f64,
    pub net_return_lo95_per_ha: f64,
    pub net_return_hi95_per_ha: f64,
    pub p_beats_lowest: f64,
    pub p_beats_current: f64,
}

/// Every treatment of `fitted` has a rate, and every rate a treatment: what is wrong, if
/// anything.
pub fn rate_mismatch(r: &RateSettings, fitted: &BTreeSet<&str>) -> Option<String> {
    let mut problems = Vec::new();
    let missing: Vec<&str> = fitted
        .iter()
        .copied()
        .filter(|t| !r.by_treatment.contains_key(*t))
        .collect();
    if !missing.is_empty() {
        problems.push(format!(
            "treatment(s) {} have no rate in adjust.rates (a rate trial needs every treatment's rate, in {})",
            missing.join(", "),
            r.unit
        ));
    }
    let unknown: Vec<&str> = r
        .by_treatment
        .keys()
        .map(|t| t.as_str())
        .filter(|t| !fitted.contains(t))
        .collect();
    if !unknown.is_empty() {
        problems.push(format!(
            "adjust.rates names {} but no kept plot has that treatment (a typo, or a treatment whose plots were all set aside?)",
            unknown.join(", ")
        ));
    }
    (!problems.is_empty()).then(|| problems.join("; "))
}

/// A rate trial's rates against the kept plots' treatments, before a fit (for `check`).
pub fn rate_problems(plots: &[PlotStats], s: &FitSettings) -> Option<String> {
    let r = s.rates.as_ref()?;
    let kept: BTreeSet<&str> = plots
        .iter()
        .filter(|p| p.status == "kept" && p.yield_mean.is_finite())
        .map(|p| p.treatment.as_str())
        .collect();
    rate_mismatch(r, &kept).map(|m| format!("rate trial: {m}"))
}

/// The products' rates in global order and the check's, or what does not match.
pub(crate) fn rates_of(
    r: &RateSettings,
    preps: &[Prepared],
    products: &[String],
    check: &str,
) -> Result<(Vec<f64>, f64), String> {
    let fitted: BTreeSet<&str> = preps
        .iter()
        .flat_map(|p| p.model.treatments.iter().map(|t| t.as_str()))
        .collect();
    if let Some(m) = rate_mismatch(r, &fitted) {
        return Err(m);
    }
    let rates: Vec<f64> = products.iter().map(|t| r.by_treatment[t]).collect();
    Ok((rates, r.by_treatment[check]))
}

/// The rows of one posterior's pieces under `field`.
fn rows_for(
    field: &str,
    ps: &[Piece],
    rd: &RateDesign,
    e: &Economics,
    unit: &str,
    seed: u64,
    new_field: bool,
) -> (Vec<ResponseRow>, Vec<ResponseCurveRow>) {
    let lbf = response::log_bayes_factors(ps);
    let top = field::log_sum_exp(lbf.iter().copied());
    use rayon::prelude::*;
    // The average and each curve, in parallel.
    let sums: Vec<Option<response::CurveSummary>> = (0..=Curve::ALL.len())
        .into_par_iter()
        .map(|k| {
            if k == 0 {
                return Some(response::summarise(ps, rd, e, seed, true, new_field));
            }
            let c = Curve::ALL[k - 1];
            let own: Vec<Piece> = ps.iter().filter(|p| p.curve == c).cloned().collect();
            (!own.is_empty())
                .then(|| response::summarise(&own, rd, e, seed ^ 0x5bd1_e995, false, false))
        })
        .collect();
    let mut rows = Vec::new();
    let avg = sums[0].as_ref().expect("the average is always summarised");
    let tested: Vec<f64> =
        rd.u.iter()
            .chain(std::iter::once(&rd.uc))
            .map(|&u| rd.rate(u))
            .collect();
    let curve: Vec<ResponseCurveRow> = avg
        .grid
        .iter()
        .map(|g| ResponseCurveRow {
            field: field.to_string(),
            rate: g[0],
            tested: tested
                .iter()
                .any(|t| (t - g[0]).abs() <= 1e-9 * (rd.hi - rd.lo).max(1.0)),
            gain: g[1],
            gain_lo95: g[2],
            gain_hi95: g[3],
            net_return_per_ha: g[4],
            net_return_lo95_per_ha: g[5],
            net_return_hi95_per_ha: g[6],
            p_beats_lowest: g[7],
            p_beats_current: g[8],
        })
        .collect();
    rows.push(row(field, "averaged", 1.0, f64::NAN, avg, e, unit));
    for ((c, l), sm) in Curve::ALL.iter().zip(lbf).zip(&sums[1..]) {
        if let Some(sm) = sm {
            rows.push(row(field, c.name(), (l - top).exp(), l, sm, e, unit));
        }
    }
    (rows, curve)
}

fn row(
    field: &str,
    model: &str,
    probability: f64,
    lbf: f64,
    s: &response::CurveSummary,
    e: &Economics,
    unit: &str,
) -> ResponseRow {
    let mut notes = Vec::new();
    if s.p_at_highest >= 0.05 {
        notes.push(format!(
            "the optimum is the highest rate tested in {:.0} % of the posterior: the best rate may lie beyond the rates tested (not extrapolated)",
            100.0 * s.p_at_highest
        ));
    }
    if e.price_per_kg <= 0.0 {
        notes.push("no grain price (adjust.grain_price): the optimum is the rate of highest expected yield".into());
    } else if e.cost_per_ha <= 0.0 {
        notes.push("no input price (adjust.input_price): the optimum is the rate of highest expected return from the grain alone".into());
    }
    ResponseRow {
        field: field.to_string(),
        model: model.to_string(),
        probability,
        log_bayes_factor: lbf,
        rate_unit: unit.to_string(),
        optimum_rate: s.optimum,
        optimum_lo90: s.optimum_q[0],
        optimum_hi90: s.optimum_q[1],
        optimum_lo95: s.optimum_q[2],
        optimum_hi95: s.optimum_q[3],
        p_optimum_at_highest: s.p_at_highest,
        gain_at_optimum: s.gain_at_optimum,
        net_return_at_optimum_per_ha: s.net_return_at_optimum,
        p_optimum_beats_lowest: s.p_optimum_beats_lowest,
        p_optimum_beats_current: s.p_optimum_beats_current,
        flat_top_lo: s.flat_top.0,
        flat_top_hi: s.flat_top.1,
        new_field_lo90: s.new_field_q[0],
        new_field_hi90: s.new_field_q[1],
        new_field_lo95: s.new_field_q[2],
        new_field_hi95: s.new_field_q[3],
        p_new_field_beats_lowest: s.new_field_beats_lowest,
        note: notes.join("; "),
    }
}

/// The response rows of a rate trial: each fitted field's own curve, then the pooled one
/// ("all": the joint fit's, or the only field's).
pub(crate) fn response_rows(
    c: &assemble::Fitted,
    own: &[FieldFit],
    keep: &[usize],
    jf: Option<&JointFit>,
    r: &RateSettings,
    out: &mut AdjustOutput,
) -> Result<(), String> {
    let s = c.s;
    let (rates, check_rate) = rates_of(r, c.preps, c.products, &s.check)?;
    let rd = RateDesign::new(&rates, check_rate);
    let mean_sy = c.preps.iter().map(|p| p.model.sy).sum::<f64>() / c.preps.len().max(1) as f64;
    let tau = weak_prior_sd(s, mean_sy);
    let kept: Vec<f64> = c
        .preps
        .iter()
        .flat_map(|p| p.plots.iter().map(|x| x.yield_mean))
        .collect();
    let mean_yield = kept.iter().sum::<f64>() / kept.len().max(1) as f64;
    let e = Economics::new(r, s.grain_price_per_t, mean_yield);
    let unit = r.unit.as_str();
    let mut pooled: Option<(Vec<ResponseRow>, Vec<ResponseCurveRow>)> = None;
    for (j, (fit, &f)) in own.iter().zip(keep).enumerate() {
        let model = &c.preps[f].model;
        let points: Vec<PostPoint> = fit
            .comps
            .iter()
            .zip(&fit.comp_keys)
            .map(|((w, comp), (k, i))| PostPoint {
                w: *w,
                fits: vec![&model.nodes[k].points[*i].fit],
                s: 0.0,
                log_c: comp.log_c,
            })
            .collect();
        let ps = response::pieces(&points, std::slice::from_ref(&c.maps[f]), &rd, tau);
        if ps.is_empty() {
            out.warnings.push(format!(
                "field {}: no response curve could be fitted (every posterior point failed)",
                model.name
            ));
            continue;
        }
        let (rows, curve) = rows_for(
            &model.name,
            &ps,
            &rd,
            &e,
            unit,
            s.seed ^ (j as u64 + 1),
            false,
        );
        if own.len() == 1 && jf.is_none() {
            let (mut r, mut c) = (rows.clone(), curve.clone());
            r.iter_mut().for_each(|x| x.field = "all".into());
            c.iter_mut().for_each(|x| x.field = "all".into());
            pooled = Some((r, c));
        }
        out.response.extend(rows);
        out.response_curve.extend(curve);
    }
    if let Some(jf) = jf {
        let points: Vec<PostPoint> = jf
            .comps
            .iter()
            .map(|(w, comp, sd, pts)| PostPoint {
                w: *w,
                fits: pts
                    .iter()
                    .enumerate()
                    .map(|(f, (k, i))| &c.preps[f].model.nodes[k].points[*i].fit)
                    .collect(),
                s: *sd,
                log_c: comp.log_c,
            })
            .collect();
        let ps = response::pieces(&points, c.maps, &rd, tau);
        if ps.is_empty() {
            out.warnings
                .push("no pooled response curve could be fitted (every joint draw failed)".into());
        } else {
            pooled = Some(rows_for("all", &ps, &rd, &e, unit, s.seed, true));
        }
    } else if own.len() > 1 {
        out.warnings.push("no pooled response curve: the fields were fitted separately (adjust.pooling = \"joint\" pools the curve)".into());
    }
    if let Some((rows, curve)) = pooled {
        out.response.extend(rows);
        out.response_curve.extend(curve);
    }
    // An optimum that may lie beyond the rates tested is a warning, not only a note.
    // A single field's pooled rows are its own: said once.
    for r in out
        .response
        .iter()
        .filter(|r| r.model == "averaged" && (r.field != "all" || jf.is_some()))
    {
        if r.p_optimum_at_highest >= 0.05 {
            let at = if r.field == "all" {
                "pooled over the fields".to_string()
            } else {
                format!("field {}", r.field)
            };
            out.warnings.push(format!(
                "rate trial, {at}: the optimum is the highest rate tested ({} {}) in {:.0} % of the posterior; the best rate may lie beyond the rates tested, which is not extrapolated",
                rd.hi,
                r.rate_unit,
                100.0 * r.p_optimum_at_highest
            ));
        }
    }
    Ok(())
}

/// A season's pooled response (stage two over every trial's fields, see
/// `season::fit_curves`): the rows of field "all" with the new-field optimum.
pub fn pooled_response(
    points: &[PostPoint],
    maps: &[FieldMap],
    products: &[String],
    s: &FitSettings,
    r: &RateSettings,
    tau: f64,
    mean_yields: &[f64],
) -> Result<(Vec<ResponseRow>, Vec<ResponseCurveRow>), String> {
    let missing: Vec<&str> = products
        .iter()
        .map(|t| t.as_str())
        .chain(std::iter::once(s.check.as_str()))
        .filter(|t| !r.by_treatment.contains_key(*t))
        .collect();
    if !missing.is_empty() {
        return Err(format!(
            "treatment(s) {} have no rate in the trials' rates",
            missing.join(", ")
        ));
    }
    let rates: Vec<f64> = products.iter().map(|t| r.by_treatment[t]).collect();
    let rd = RateDesign::new(&rates, r.by_treatment[&s.check]);
    let known: Vec<f64> = mean_yields.iter().copied().filter(|y| *y > 0.0).collect();
    let mean_yield = known.iter().sum::<f64>() / known.len().max(1) as f64;
    let e = Economics::new(r, s.grain_price_per_t, mean_yield);
    let ps = response::pieces(points, maps, &rd, tau);
    if ps.is_empty() {
        return Err("no response curve could be fitted across the season".into());
    }
    Ok(rows_for("all", &ps, &rd, &e, r.unit.as_str(), s.seed, true))
}
