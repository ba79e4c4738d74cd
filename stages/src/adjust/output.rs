//! What the adjust stage returns: per-plot, per-treatment, hyperparameter and comparison
//! rows, and their assembly from the fits (economics included).

use super::*;

/// The spatial model against the same model without the spatial field (the usual RCBD
/// analysis when blocks are in the mean model), per field.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Comparison {
    pub field: String,
    pub log_ml_spatial: f64,
    pub log_ml_without_spatial: f64,
    /// Mean over products of var(uplift, RCBD) / var(uplift, spatial): above 1 means the
    /// spatial model estimates the contrasts more precisely.
    pub efficiency: f64,
    /// Residual Moran's I without and with the spatial field (Moran 1950, Biometrika 37:17).
    pub moran_without_spatial: f64,
    pub moran_spatial: f64,
    /// Spearman's rank correlation of the products' uplifts under the two models.
    pub rank_correlation: f64,
    /// Share of the top quarter of products (at least one) both models put there.
    pub top_overlap: f64,
}

/// A plot after adjustment.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct AdjustedPlot {
    pub plot_id: String,
    pub field: String,
    pub treatment: String,
    pub block: String,
    pub raw: f64,
    /// The effect of the plot's position: the spatial field, plus the plot's row, column or
    /// incomplete-block effects when `adjust.random_effects` has them.
    pub spatial_mean: f64,
    pub spatial_sd: f64,
    pub adjusted: f64,
    pub adjusted_sd: f64,
}

/// A treatment in a field (or pooled over fields: field = "all").
#[derive(Clone, Debug, Default, PartialEq)]
pub struct TreatmentRow {
    pub field: String,
    pub treatment: String,
    pub plots: u64,
    /// Treatment mean yield (per field; NaN in pooled rows, where fields differ in level).
    pub estimate: f64,
    pub sd: f64,
    pub lo95: f64,
    pub hi95: f64,
    /// Uplift over the check; NaN for the check itself.
    pub uplift: f64,
    pub uplift_sd: f64,
    pub uplift_lo90: f64,
    pub uplift_hi90: f64,
    pub uplift_lo95: f64,
    pub uplift_hi95: f64,
    pub p_uplift_gt0: f64,
    /// Uplift that pays for the product (cost / price), in the output unit; NaN without
    /// economics.
    pub break_even: f64,
    pub p_uplift_gt_break_even: f64,
    /// Expected uplift x price - cost, per hectare.
    pub expected_net_return_per_ha: f64,
    /// The prior on the product's effect (mean, SD), shown beside the posterior.
    pub prior_mean: f64,
    pub prior_sd: f64,
    /// Pooled rows of a joint fit: the uplift in a field that was not in the trial (the
    /// shared effect plus a new draw of the treatment x field interaction): its mean, SD,
    /// 90 and 95 % intervals, P(> 0) and P(> break-even). NaN elsewhere.
    pub new_field_uplift: f64,
    pub new_field_sd: f64,
    pub new_field_lo90: f64,
    pub new_field_hi90: f64,
    pub new_field_lo95: f64,
    pub new_field_hi95: f64,
    pub p_new_field_gt0: f64,
    pub p_new_field_gt_break_even: f64,
}

/// Posterior mean and 95 % interval of one hyperparameter (NaN where it does not apply).
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Summary {
    pub mean: f64,
    pub lo95: f64,
    pub hi95: f64,
}

impl Summary {
    pub const NONE: Summary = Summary {
        mean: f64::NAN,
        lo95: f64::NAN,
        hi95: f64::NAN,
    };
    /// From weighted values (weights need not sum to one).
    pub fn from_weighted(mut v: Vec<(f64, f64)>) -> Summary {
        let total: f64 = v.iter().map(|x| x.1).sum();
        if v.is_empty() || !(total > 0.0) {
            return Summary::NONE;
        }
        let mean = v.iter().map(|x| x.0 * x.1).sum::<f64>() / total;
        v.sort_by(|a, b| a.0.total_cmp(&b.0));
        let q = |q: f64| {
            let mut acc = 0.0;
            for (x, w) in &v {
                acc += w / total;
                if acc >= q {
                    return *x;
                }
            }
            v.last().map(|x| x.0).unwrap_or(f64::NAN)
        };
        Summary {
            mean,
            lo95: q(0.025),
            hi95: q(0.975),
        }
    }
}

/// Hyperparameters of one field (or, in the row for field "all" of a joint fit, the
/// interaction SD and the shared range).
#[derive(Clone, Debug, Default, PartialEq)]
pub struct FieldHyper {
    pub field: String,
    pub plots: u64,
    /// Range (along the grid with anisotropy), metres: posterior mean and 95 % interval.
    pub range_m: f64,
    pub range_lo95_m: f64,
    pub range_hi95_m: f64,
    /// Range across the grid (anisotropic fits only).
    pub range_across: Summary,
    pub spatial_sd: f64,
    pub spatial_sd_ci: Summary,
    pub noise_sd: f64,
    pub noise_sd_ci: Summary,
    pub spatial_share: f64,
    pub spatial_share_ci: Summary,
    pub interaction_sd: Summary,
    /// SDs of the random design factors (rows, columns, incomplete blocks; see
    /// `adjust.random_effects`), each NONE when not fitted.
    pub row_sd: Summary,
    pub column_sd: Summary,
    pub block_sd: Summary,
    /// REML log marginal likelihood at the posterior mode.
    pub log_marginal_likelihood: f64,
    /// "exact", or "hsgp m0xm1" with the basis functions per axis at the mode.
    pub method: String,
    /// Empty, or a warning such as the range sitting at a bound.
    pub warning: String,
}

/// What adjust hands on.
#[derive(Clone, Debug)]
pub struct AdjustOutput {
    pub comparisons: Vec<Comparison>,
    pub plots: Vec<AdjustedPlot>,
    pub treatments: Vec<TreatmentRow>,
    pub hyper: Vec<FieldHyper>,
    pub warnings: Vec<String>,
    /// Fields of the input that are not in the result, each with why (the pooled rows come
    /// from the other fields only).
    pub missing_fields: Vec<String>,
    /// Effective sample size of the joint importance draws (NaN without a joint fit).
    pub joint_ess: f64,
    /// Each fitted field's contrasts from its own fit (the stage-one input of a season).
    pub stage_one: Vec<StageOne>,
    /// A rate trial's response curves (empty otherwise): rows per field and pooled, and the
    /// averaged curve on a grid of rates.
    pub response: Vec<ResponseRow>,
    pub response_curve: Vec<ResponseCurveRow>,
}

/// One field's product contrasts with the check from the field fitted alone, with flat
/// priors on the contrasts: the posterior mean and covariance over the field's
/// hyperparameter posterior (a mixture of the GLS estimates, moment-matched), kg/ha. This is
/// stage one of a season's two-stage fit (`crate::season`).
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct StageOne {
    pub field: String,
    /// Kept plots fitted.
    pub plots: u64,
    /// SD of the field's plot yields (sets the season's default priors as in a joint fit).
    pub yield_sd_kg_ha: f64,
    /// Mean of the field's plot yields (0 in files from before it was written).
    #[serde(default)]
    pub yield_mean_kg_ha: f64,
    /// The field's centre (mean of the plot centres), WGS 84; the pipeline fills it in.
    #[serde(default)]
    pub lon: Option<f64>,
    #[serde(default)]
    pub lat: Option<f64>,
    /// Products (the check excluded), their kept plots, uplifts and covariance (row major
    /// rows, one per product).
    pub products: Vec<String>,
    pub product_plots: Vec<u64>,
    pub uplift_kg_ha: Vec<f64>,
    pub cov_kg_ha2: Vec<Vec<f64>>,
}

/// Break-even uplift (cost / price, kg/ha) and expected net return per hectare for one
/// product; NaN without economics.
pub(crate) fn economics(s: &FitSettings, treatment: &str, uplift: f64) -> (f64, f64) {
    let cost = s.product_cost_per_ha.get(treatment).copied().unwrap_or(0.0);
    if !(s.grain_price_per_t > 0.0) || uplift.is_nan() {
        return (f64::NAN, f64::NAN);
    }
    let be = cost / s.grain_price_per_t * 1000.0;
    (be, uplift / 1000.0 * s.grain_price_per_t - cost)
}

/// A treatment row from the posterior of its mean yield and (for products) its uplift.
#[allow(clippy::too_many_arguments)]
pub(crate) fn treatment_row(
    s: &FitSettings,
    field: &str,
    treatment: &str,
    plots: u64,
    est: Option<&Mixture>,
    up: Option<&Mixture>,
    prior: Option<(f64, f64)>,
) -> TreatmentRow {
    let nan = f64::NAN;
    let mut r = TreatmentRow {
        field: field.into(),
        treatment: treatment.into(),
        plots,
        estimate: nan,
        sd: nan,
        lo95: nan,
        hi95: nan,
        uplift: nan,
        uplift_sd: nan,
        uplift_lo90: nan,
        uplift_hi90: nan,
        uplift_lo95: nan,
        uplift_hi95: nan,
        p_uplift_gt0: nan,
        break_even: nan,
        p_uplift_gt_break_even: nan,
        expected_net_return_per_ha: nan,
        prior_mean: prior.map_or(nan, |p| p.0),
        prior_sd: prior.map_or(nan, |p| p.1),
        new_field_uplift: nan,
        new_field_sd: nan,
        new_field_lo90: nan,
        new_field_hi90: nan,
        new_field_lo95: nan,
        new_field_hi95: nan,
        p_new_field_gt0: nan,
        p_new_field_gt_break_even: nan,
    };
    if let Some(e) = est {
        r.estimate = e.mean();
        r.sd = e.var().sqrt();
        r.lo95 = e.quantile(0.025);
        r.hi95 = e.quantile(0.975);
    }
    if let Some(u) = up {
        let (be, ret) = economics(s, treatment, u.mean());
        let o = Odds::of(u, be);
        (r.uplift, r.uplift_sd, r.uplift_lo90, r.uplift_hi90) = (o.mean, o.sd, o.lo90, o.hi90);
        (r.uplift_lo95, r.uplift_hi95, r.p_uplift_gt0) = (o.lo95, o.hi95, o.p_gt0);
        (r.break_even, r.expected_net_return_per_ha) = (be, ret);
        r.p_uplift_gt_break_even = o.p_gt_break_even;
    }
    r
}

/// An uplift's summaries from its mixture: mean, SD, 90 and 95 % intervals, P(> 0) and
/// P(> break-even) (NaN without a finite break-even).
struct Odds {
    mean: f64,
    sd: f64,
    lo90: f64,
    hi90: f64,
    lo95: f64,
    hi95: f64,
    p_gt0: f64,
    p_gt_break_even: f64,
}

impl Odds {
    fn of(m: &Mixture, break_even: f64) -> Odds {
        Odds {
            mean: m.mean(),
            sd: m.var().sqrt(),
            lo90: m.quantile(0.05),
            hi90: m.quantile(0.95),
            lo95: m.quantile(0.025),
            hi95: m.quantile(0.975),
            p_gt0: 1.0 - m.cdf(0.0),
            p_gt_break_even: if break_even.is_finite() {
                1.0 - m.cdf(break_even)
            } else {
                f64::NAN
            },
        }
    }
}

/// Sets a pooled row's new-field predictive from its mixture (the row's break-even must be
/// set already).
/// A product's pooled row (field "all") from the components of a joint posterior, each
/// (weight, mean and variance of the shared effect, interaction SD): the shared effect's
/// mixture, and a field not in the fit, delta_new = beta + u with u ~ N(0, s^2), mixed over
/// the same components. `prior` is the product's (mean, SD).
pub(crate) fn pooled_row(
    s: &FitSettings,
    name: &str,
    count: u64,
    parts: &[(f64, f64, f64, f64)],
    prior: (f64, f64),
) -> TreatmentRow {
    let up = Mixture::new(parts.iter().map(|p| (p.0, p.1, p.2)).collect());
    let mut row = treatment_row(s, "all", name, count, None, Some(&up), Some(prior));
    let new_field = Mixture::new(parts.iter().map(|p| (p.0, p.1, p.2 + p.3 * p.3)).collect());
    set_new_field(&mut row, &new_field);
    row
}

pub(crate) fn set_new_field(r: &mut TreatmentRow, m: &Mixture) {
    let o = Odds::of(m, r.break_even);
    (r.new_field_uplift, r.new_field_sd) = (o.mean, o.sd);
    (r.new_field_lo90, r.new_field_hi90) = (o.lo90, o.hi90);
    (r.new_field_lo95, r.new_field_hi95) = (o.lo95, o.hi95);
    (r.p_new_field_gt0, r.p_new_field_gt_break_even) = (o.p_gt0, o.p_gt_break_even);
}

/// Plots with their spatial effect from a mixture over hyperparameter points.
pub(crate) fn adjusted_plots(
    prep: &Prepared,
    effects: &[(f64, Vec<f64>, Vec<f64>)],
) -> Vec<AdjustedPlot> {
    prep.plots
        .iter()
        .enumerate()
        .map(|(j, pl)| {
            let mix = Mixture::new(effects.iter().map(|(w, mu, v)| (*w, mu[j], v[j])).collect());
            let (mu, sdv) = (mix.mean(), mix.var().sqrt());
            AdjustedPlot {
                plot_id: pl.plot_id.clone(),
                field: prep.model.name.clone(),
                treatment: pl.treatment.clone(),
                block: pl.block.clone(),
                raw: pl.yield_mean,
                spatial_mean: mu,
                spatial_sd: sdv,
                adjusted: pl.yield_mean - mu,
                adjusted_sd: sdv,
            }
        })
        .collect()
}
