//! `[adjust]` settings: the section as written (`AdjustSettings`, typed, with its checks) and
//! the checked form the fit takes (`FitSettings`).

use super::Kernel;
use crate::crop::{AreaUnit, InputUnit, PriceUnit, RateUnit};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

crate::choice! {
    /// `adjust.rate_source`: the rate a rate trial's curve places each treatment at.
    pub enum RateSource {
        /// The rate the trial gives (`adjust.rates` or the rate column).
        Target = "target",
        /// The mean as-applied rate of the treatment's kept plots (`columns.applied_rate`).
        Applied = "applied",
    }
}

crate::choice! {
    /// `adjust.pooling`: how fields are combined.
    pub enum Pooling {
        /// One model for all fields: shared product effects with a treatment x field
        /// interaction.
        Joint = "joint",
        /// Each field alone; pooled rows by inverse-variance weighting of the field uplifts.
        Separate = "separate",
    }
}

crate::choice! {
    /// `adjust.random_effects`: design factors fitted as random effects with their own
    /// variance, beside the spatial field.
    pub enum RandomEffect {
        /// Rows of the plot grid (across travel; the plot table's `row`).
        Row = "row",
        /// Columns of the plot grid (along travel; the plot table's `range` or `column`).
        Column = "column",
        /// The design's blocks (incomplete blocks, as in an alpha-lattice; then the fixed
        /// `adjust.blocks` is off).
        Block = "block",
    }
}

/// Settings of the fit (from `[adjust]`).
#[derive(Clone, Debug)]
pub struct FitSettings {
    pub check: String,
    pub blocks: bool,
    /// Design factors with random effects, in the order of [`RandomEffect::NAMES`].
    pub random: Vec<RandomEffect>,
    pub min_range_m: f64,
    pub max_range_m: f64,
    /// Coarse lattice points per length-scale axis.
    pub range_grid_points: usize,
    pub kernel: Kernel,
    pub anisotropic: bool,
    pub pooling: Pooling,
    /// Joint fits: one length scale for all fields (else one per field).
    pub shared_range: bool,
    pub interaction: bool,
    /// P(interaction SD > this) = 0.05, kg/ha; 0 = the mean SD of the fields' plot yields.
    pub interaction_sd_u: f64,
    /// SD of the default prior on product effects, kg/ha; 0 = ten times the mean SD of plot
    /// yields.
    pub weak_prior_sd: f64,
    /// Informative priors (mean, SD) per product, kg/ha.
    pub product_prior: BTreeMap<String, (f64, f64)>,
    pub exact_max_plots: usize,
    pub hsgp_max_basis: usize,
    pub hsgp_boundary: f64,
    /// Importance draws of a joint fit.
    pub joint_draws: usize,
    pub seed: u64,
    /// Grain price per tonne at standard moisture (0 = no economics), converted from the
    /// trial's `grain_price` in its `grain_price_unit`.
    pub grain_price_per_t: f64,
    /// Product cost per hectare, by treatment (from `product_cost` per
    /// `product_cost_unit`).
    pub product_cost_per_ha: BTreeMap<String, f64>,
    /// The units the trial gave its prices in, for the reports.
    pub money: Money,
    /// kg/ha in one output unit. Yields are fitted in kg/ha; the log marginal likelihoods
    /// are stated for the yields in the output unit (a density changes with the unit).
    pub kg_ha_per_unit: f64,
    /// A rate trial's rates and prices (None: unordered products).
    pub rates: Option<RateSettings>,
}

/// A rate trial: each treatment's rate and the input's price, checked.
#[derive(Clone, Debug, PartialEq)]
pub struct RateSettings {
    /// Rate per treatment, in `unit`.
    pub by_treatment: BTreeMap<String, f64>,
    pub unit: RateUnit,
    /// Cost per hectare of one rate unit (0 = no input price).
    pub cost_per_ha: f64,
    /// The grower's current rate, in `unit`.
    pub current: Option<f64>,
    /// The flat top's width in money per hectare (0 = the price of 1 % of the mean yield).
    pub flat_top_within_per_ha: f64,
}

/// Prices as the trial gave them: the grain price and its unit, the cost area unit.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Money {
    pub grain_price: f64,
    pub grain_price_unit: PriceUnit,
    pub product_cost_unit: AreaUnit,
}

impl Money {
    /// The prices in words for the reports, e.g. "grain 4.5 per bu at standard moisture;
    /// product costs per ac".
    pub fn words(&self) -> String {
        format!(
            "grain {} per {} at standard moisture; product costs and net returns per {}",
            self.grain_price, self.grain_price_unit, self.product_cost_unit
        )
    }
}

impl FitSettings {
    /// The defaults of `config/defaults.toml`, for tests and benchmarks.
    pub fn new(check: &str) -> FitSettings {
        crate::defaults::section::<AdjustSettings>("adjust").checked(check, 1.0, f64::NAN)
    }
}
/// `[adjust]` settings.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AdjustSettings {
    pub kernel: Kernel,
    pub blocks: bool,
    pub random_effects: Vec<RandomEffect>,
    pub min_range_m: f64,
    pub max_range_m: f64,
    pub range_grid_points: i64,
    pub anisotropic: bool,
    pub pooling: Pooling,
    pub shared_range: bool,
    pub interaction: bool,
    pub interaction_sd_u: f64,
    pub weak_prior_sd: f64,
    pub product_prior_mean: BTreeMap<String, f64>,
    pub product_prior_sd: BTreeMap<String, f64>,
    /// A priors file of an earlier run ([`super::priors`]), relative to the trial file.
    pub priors_from: String,
    pub priors_widen: f64,
    pub priors_sd: super::priors::PriorSd,
    pub exact_max_plots: i64,
    pub hsgp_max_basis: i64,
    pub hsgp_boundary_factor: f64,
    pub joint_draws: i64,
    pub seed: i64,
    /// Grain price at standard moisture per `grain_price_unit` (0 = no economics).
    pub grain_price: f64,
    pub grain_price_unit: PriceUnit,
    /// Each product's cost per `product_cost_unit`.
    pub product_cost: BTreeMap<String, f64>,
    pub product_cost_unit: AreaUnit,
    pub plot_table: String,
    /// Accept a result from which a field is missing (its plots all set aside, or it cannot
    /// be fitted); otherwise that is an error.
    pub allow_missing_fields: bool,
    pub row_spacing_m: f64,
    pub range_spacing_m: f64,
    /// A rate trial: each treatment's rate of the input under test, in `rate_unit` (empty:
    /// the treatments are unordered products).
    pub rates: BTreeMap<String, f64>,
    pub rate_unit: RateUnit,
    /// The input's price per `input_price_unit` (0 = none: the curve's optimum is then the
    /// rate of highest yield, or of highest return when only the grain has a price).
    pub input_price: f64,
    pub input_price_unit: InputUnit,
    /// The grower's current rate, in `rate_unit` (negative = not given).
    pub current_rate: f64,
    /// The flat top: rates whose expected net return is within this much (per
    /// `product_cost_unit`) of the best; 0 = the price of 1 % of the trial's mean yield.
    pub flat_top_within: f64,
    /// With as-applied rates (`columns.applied_rate`): where each treatment sits on the
    /// curve, at its target rate or at the mean as-applied rate of its kept plots.
    pub rate_source: RateSource,
    /// A treatment whose mean as-applied rate is further than this from its target
    /// (percent of the target; of the highest target for a zero target) is a warning.
    pub applied_rate_tolerance_pct: f64,
}

impl AdjustSettings {
    /// The prices as the trial gives them, for the reports.
    pub fn money(&self) -> Money {
        Money {
            grain_price: self.grain_price,
            grain_price_unit: self.grain_price_unit,
            product_cost_unit: self.product_cost_unit,
        }
    }

    /// The fit's settings in kg/ha: the trial's check treatment, kg/ha in one output unit
    /// (the trial file gives priors in the output unit) and the crop's bushel weight in lb
    /// (for a price per bushel).
    pub fn checked(&self, check: &str, kg_ha_per_unit: f64, bushel_lb: f64) -> FitSettings {
        let a = self;
        let k = kg_ha_per_unit;
        FitSettings {
            check: check.to_string(),
            blocks: a.blocks,
            random: {
                let mut r = a.random_effects.clone();
                r.sort_by_key(|e| *e as u8);
                r.dedup();
                r
            },
            min_range_m: a.min_range_m,
            max_range_m: a.max_range_m,
            range_grid_points: a.range_grid_points as usize,
            kernel: a.kernel,
            anisotropic: a.anisotropic,
            pooling: a.pooling,
            shared_range: a.shared_range,
            interaction: a.interaction,
            interaction_sd_u: a.interaction_sd_u * k,
            weak_prior_sd: a.weak_prior_sd * k,
            product_prior: a
                .product_prior_mean
                .iter()
                .filter_map(|(t, m)| {
                    a.product_prior_sd
                        .get(t)
                        .map(|sd| (t.clone(), (*m * k, *sd * k)))
                })
                .collect(),
            exact_max_plots: a.exact_max_plots as usize,
            hsgp_max_basis: a.hsgp_max_basis as usize,
            hsgp_boundary: a.hsgp_boundary_factor,
            joint_draws: a.joint_draws as usize,
            seed: a.seed as u64,
            grain_price_per_t: a.grain_price * 1000.0 / a.grain_price_unit.kg(bushel_lb),
            product_cost_per_ha: a.costs_per_ha(check),
            money: a.money(),
            kg_ha_per_unit,
            rates: (!a.rates.is_empty()).then(|| RateSettings {
                by_treatment: a.rates.clone(),
                unit: a.rate_unit,
                cost_per_ha: a
                    .rate_unit
                    .cost_per_ha(a.input_price, a.input_price_unit)
                    .unwrap_or(f64::NAN),
                current: (a.current_rate >= 0.0).then_some(a.current_rate),
                flat_top_within_per_ha: a.flat_top_within / a.product_cost_unit.ha(),
            }),
        }
    }

    /// Each product's cost per hectare: `product_cost`, and in a rate trial with an input
    /// price the cost of each treatment's rate above the check's (for the products table's
    /// break-even and net return; a cost given in `product_cost` wins).
    fn costs_per_ha(&self, check: &str) -> BTreeMap<String, f64> {
        let a = self;
        let mut out: BTreeMap<String, f64> = BTreeMap::new();
        let per = a.rate_unit.cost_per_ha(a.input_price, a.input_price_unit);
        if let (Some(per), Some(rc)) = (per.filter(|p| *p > 0.0), a.rates.get(check)) {
            for (t, r) in &a.rates {
                if t != check {
                    out.insert(t.clone(), (r - rc) * per);
                }
            }
        }
        for (t, c) in &a.product_cost {
            out.insert(t.clone(), c / a.product_cost_unit.ha());
        }
        out
    }

    /// An input price without rates (after any rate column of the design or plot table has
    /// filled `rates`).
    pub fn price_without_rates(&self) -> Option<String> {
        (self.input_price > 0.0 && self.rates.is_empty()).then(|| "adjust.input_price is set but the trial gives no rates: an input price belongs to a rate trial (give each treatment's rate in adjust.rates, or in a rate_<unit> column of the design or plot table)".to_string())
    }

    /// As-applied rates against the rate-trial settings: the column goes with rates of a
    /// unit measuring the same quantity, and `rate_source = "applied"` needs the column.
    pub fn applied_problems(
        &self,
        applied: Option<&crate::ingest::settings::AppliedRateColumn>,
    ) -> Option<String> {
        let a = self;
        match applied {
            None if a.rate_source == RateSource::Applied => Some(
                "adjust.rate_source = \"applied\" needs the exports' as-applied rate column (columns.applied_rate = { name = ..., unit = ... })".into(),
            ),
            Some(_) if a.rates.is_empty() => Some(
                "columns.applied_rate is read for a rate trial, and this trial gives no rates (give each treatment's target rate in adjust.rates, or in a rate_<unit> column of the design table)".into(),
            ),
            Some(c) if c.unit.parts().0 != a.rate_unit.parts().0 => Some(format!(
                "columns.applied_rate.unit = \"{}\" does not measure what adjust.rate_unit = \"{}\" does (mass, volume or seeds)",
                c.unit, a.rate_unit
            )),
            _ if !(a.applied_rate_tolerance_pct > 0.0) => Some(format!(
                "adjust.applied_rate_tolerance_pct must be above 0 (got {})",
                a.applied_rate_tolerance_pct
            )),
            _ => None,
        }
    }

    /// Problems of the rate-trial settings, each naming its key.
    fn rate_problems(&self, p: &mut Vec<String>) {
        let a = self;
        for (t, r) in &a.rates {
            if !(*r >= 0.0) || !r.is_finite() {
                p.push(format!(
                    "adjust.rates.{t} must be a finite rate >= 0 in {} (got {r})",
                    a.rate_unit
                ));
            }
        }
        if !a.rates.is_empty() {
            let mut distinct: Vec<f64> = a.rates.values().copied().collect();
            distinct.sort_by(f64::total_cmp);
            distinct.dedup();
            if distinct.len() < 3 {
                p.push(format!(
                    "adjust.rates gives {} distinct rate(s) ({}); a response curve needs at least three",
                    distinct.len(),
                    distinct.iter().map(|r| r.to_string()).collect::<Vec<_>>().join(", ")
                ));
            }
        }
        if !(a.input_price >= 0.0) || !a.input_price.is_finite() {
            p.push(format!(
                "adjust.input_price must be a finite number >= 0 (got {})",
                a.input_price
            ));
        } else if a.input_price > 0.0 {
            if a.rate_unit
                .cost_per_ha(a.input_price, a.input_price_unit)
                .is_none()
            {
                p.push(format!(
                    "adjust.input_price_unit {:?} does not measure what adjust.rate_unit {:?} does (kg and lb go with kg_ha and lb_ac, l with l_ha, 1000_seeds with seeds_ha and seeds_ac)",
                    a.input_price_unit.as_str(),
                    a.rate_unit.as_str()
                ));
            }
        }
        if !a.current_rate.is_finite() {
            p.push(format!(
                "adjust.current_rate must be a finite number (negative = not given; got {})",
                a.current_rate
            ));
        }
        if !(a.flat_top_within >= 0.0) || !a.flat_top_within.is_finite() {
            p.push(format!(
                "adjust.flat_top_within must be a finite number >= 0 (got {})",
                a.flat_top_within
            ));
        }
    }

    /// Range problems, each naming its key.
    pub fn problems(&self, p: &mut Vec<String>) {
        self.rate_problems(p);
        if !(self.priors_widen > 0.0 && self.priors_widen.is_finite()) {
            p.push(format!(
                "adjust.priors_widen must be above 0 (got {})",
                self.priors_widen
            ));
        }
        if self.blocks && self.random_effects.contains(&RandomEffect::Block) {
            p.push("adjust.random_effects has \"block\" while adjust.blocks is true: blocks are either fixed or random, not both".into());
        }
        let mut nonneg = |key: &str, v: f64| {
            if !(v >= 0.0) || !v.is_finite() {
                p.push(format!("{key} must be a finite number >= 0 (got {v})"));
            }
        };
        nonneg("adjust.min_range_m", self.min_range_m);
        nonneg("adjust.max_range_m", self.max_range_m);
        nonneg("adjust.grain_price", self.grain_price);
        for (k, v) in &self.product_cost {
            nonneg(&format!("adjust.product_cost.{k}"), *v);
        }
        if self.max_range_m > 0.0 && self.min_range_m >= self.max_range_m {
            p.push(format!(
                "adjust.min_range_m must be below adjust.max_range_m (got {} and {})",
                self.min_range_m, self.max_range_m
            ));
        }
        let a = self;
        for (k, v, lo, hi) in [
            ("adjust.range_grid_points", a.range_grid_points, 3, 40),
            ("adjust.exact_max_plots", a.exact_max_plots, 10, 5000),
            ("adjust.hsgp_max_basis", a.hsgp_max_basis, 16, 2500),
            ("adjust.joint_draws", a.joint_draws, 100, 1_000_000),
        ] {
            if !(lo..=hi).contains(&v) {
                p.push(format!("{k} must be between {lo} and {hi} (got {v})"));
            }
        }
        if !(a.hsgp_boundary_factor >= 1.0) {
            p.push(format!(
                "adjust.hsgp_boundary_factor must be at least 1 (got {})",
                a.hsgp_boundary_factor
            ));
        }
        for (k, v) in [
            ("adjust.interaction_sd_u", a.interaction_sd_u),
            ("adjust.weak_prior_sd", a.weak_prior_sd),
        ] {
            if !(v >= 0.0) || !v.is_finite() {
                p.push(format!("{k} must be a finite number >= 0 (got {v})"));
            }
        }
        for (k, v) in &a.product_prior_sd {
            if !(*v > 0.0) || !v.is_finite() {
                p.push(format!(
                    "adjust.product_prior_sd.{k} must be above 0 (got {v})"
                ));
            }
            if !a.product_prior_mean.contains_key(k) {
                p.push(format!(
                    "adjust.product_prior_sd.{k} has no adjust.product_prior_mean.{k}"
                ));
            }
        }
        for (k, v) in &a.product_prior_mean {
            if !v.is_finite() {
                p.push(format!(
                    "adjust.product_prior_mean.{k} must be a finite number"
                ));
            }
            if !a.product_prior_sd.contains_key(k) {
                p.push(format!(
                    "adjust.product_prior_mean.{k} has no adjust.product_prior_sd.{k}"
                ));
            }
        }
    }
}
