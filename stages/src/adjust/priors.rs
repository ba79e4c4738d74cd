//! Priors carried forward: every adjust run writes `4-adjust/priors.json` (per product the
//! pooled uplift's posterior mean and SD and, from a joint fit, the SD of the uplift in a new
//! field; per field the range and SD posteriors), and a later trial names such a file as
//! `adjust.priors_from` to start from what was learned, with `adjust.priors_widen` to widen
//! it for a new environment or stage. Values are kept in kg/ha so a file serves trials
//! reported in any unit of the same crop.
//!
//! The prior on a product's effect is N(mean, (widen x SD)^2), SD being the new-field SD
//! where the file has one and `adjust.priors_sd = "new_field"` (a product's effect in the
//! next trial is a new draw around the mean effect), else the pooled SD. Product priors the
//! trial file gives itself (`adjust.product_prior_mean` / `_sd`) win over the file's.

use super::output::{FieldHyper, TreatmentRow};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// Product priors (mean, SD) in kg/ha, by product.
pub type Priors = BTreeMap<String, (f64, f64)>;

/// The file's format tag.
pub const FORMAT: &str = "plotsieve-priors-1";

crate::choice! {
    /// `adjust.priors_sd`: which SD of a carried-forward product becomes its prior SD.
    pub enum PriorSd {
        /// The SD of the uplift in a field that was not in the earlier trial (falls back to
        /// the pooled SD where the file has none: a single-field or separate fit).
        NewField = "new_field",
        /// The pooled (average-field) uplift's posterior SD.
        Pooled = "pooled",
    }
}

/// One product's posterior, kg/ha.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ProductPosterior {
    pub uplift_mean_kg_ha: f64,
    pub uplift_sd_kg_ha: f64,
    /// `None` without a joint fit over two or more fields.
    pub new_field_sd_kg_ha: Option<f64>,
}

/// One field's hyperparameter posteriors (means and 95 % intervals), for the record.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FieldPosterior {
    pub field: String,
    pub range_m: [Option<f64>; 3],
    pub spatial_sd_kg_ha: [Option<f64>; 3],
    pub noise_sd_kg_ha: [Option<f64>; 3],
}

/// A priors file.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PriorsFile {
    pub format: String,
    pub trial: String,
    pub crop: String,
    pub check: String,
    pub products: BTreeMap<String, ProductPosterior>,
    pub fields: Vec<FieldPosterior>,
}

fn finite(x: f64) -> Option<f64> {
    x.is_finite().then_some(x)
}

impl PriorsFile {
    /// From a fit's pooled treatment rows (field "all") and its hyperparameters, in kg/ha.
    pub fn from_fit(
        trial: &str,
        crop: &str,
        check: &str,
        treatments: &[TreatmentRow],
        hyper: &[FieldHyper],
    ) -> PriorsFile {
        let products = treatments
            .iter()
            .filter(|r| r.field == "all" && r.treatment != check)
            .filter(|r| r.uplift.is_finite() && r.uplift_sd > 0.0)
            .map(|r| {
                (
                    r.treatment.clone(),
                    ProductPosterior {
                        uplift_mean_kg_ha: r.uplift,
                        uplift_sd_kg_ha: r.uplift_sd,
                        new_field_sd_kg_ha: finite(r.new_field_sd),
                    },
                )
            })
            .collect();
        let fields = hyper
            .iter()
            .filter(|h| h.field != "all")
            .map(|h| FieldPosterior {
                field: h.field.clone(),
                range_m: [h.range_m, h.range_lo95_m, h.range_hi95_m].map(finite),
                spatial_sd_kg_ha: [h.spatial_sd, h.spatial_sd_ci.lo95, h.spatial_sd_ci.hi95]
                    .map(finite),
                noise_sd_kg_ha: [h.noise_sd, h.noise_sd_ci.lo95, h.noise_sd_ci.hi95].map(finite),
            })
            .collect();
        PriorsFile {
            format: FORMAT.into(),
            trial: trial.into(),
            crop: crop.into(),
            check: check.into(),
            products,
            fields,
        }
    }

    /// Read and check a priors file (`name` as the trial names it).
    pub fn parse(text: &str, name: &str) -> Result<PriorsFile, String> {
        let f: PriorsFile = serde_json::from_str(text)
            .map_err(|e| format!("{name}: not a priors file written by plotsieve: {e}"))?;
        if f.format != FORMAT {
            return Err(format!(
                "{name}: format {:?}, expected {FORMAT:?}",
                f.format
            ));
        }
        for (p, v) in &f.products {
            if !(v.uplift_mean_kg_ha.is_finite() && v.uplift_sd_kg_ha > 0.0) {
                return Err(format!(
                    "{name}: product {p:?} needs a finite uplift_mean_kg_ha and an uplift_sd_kg_ha above 0"
                ));
            }
        }
        Ok(f)
    }

    /// The product priors (mean, SD) in kg/ha this file gives a trial of `crop` with check
    /// `check`: SDs widened by `widen`; `own` (the trial file's priors) win. Also a line
    /// saying what was taken, for the summary.
    pub fn priors_for(
        &self,
        name: &str,
        crop: &str,
        check: &str,
        widen: f64,
        which: PriorSd,
        own: &BTreeMap<String, (f64, f64)>,
    ) -> Result<(Priors, String), String> {
        if !self.crop.eq_ignore_ascii_case(crop) {
            return Err(format!(
                "{name} (adjust.priors_from) is from a {} trial; this trial's crop is {crop}",
                self.crop
            ));
        }
        if self.check != check {
            return Err(format!(
                "{name} (adjust.priors_from) has uplifts over the check {:?}; this trial's check is {check:?}: priors on uplifts need the same check",
                self.check
            ));
        }
        if !(widen > 0.0 && widen.is_finite()) {
            return Err(format!("adjust.priors_widen must be above 0 (got {widen})"));
        }
        let mut out = own.clone();
        let (mut taken, mut pooled_only) = (Vec::new(), Vec::new());
        for (p, v) in &self.products {
            if own.contains_key(p) {
                continue;
            }
            let sd = match (which, v.new_field_sd_kg_ha) {
                (PriorSd::NewField, Some(sd)) if sd > 0.0 => sd,
                (PriorSd::NewField, _) => {
                    pooled_only.push(p.clone());
                    v.uplift_sd_kg_ha
                }
                (PriorSd::Pooled, _) => v.uplift_sd_kg_ha,
            };
            out.insert(p.clone(), (v.uplift_mean_kg_ha, widen * sd));
            taken.push(p.clone());
        }
        let mut said = format!(
            "priors for {} from {name} (trial {:?}), {} SD x {widen}",
            if taken.is_empty() {
                "no product".to_string()
            } else {
                taken.join(", ")
            },
            self.trial,
            which.as_str()
        );
        if !pooled_only.is_empty() {
            said += &format!(
                "; the pooled SD for {} (the file has no new-field SD: not a joint fit over fields)",
                pooled_only.join(", ")
            );
        }
        Ok((out, said))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn file() -> PriorsFile {
        let mut products = BTreeMap::new();
        products.insert(
            "a".to_string(),
            ProductPosterior {
                uplift_mean_kg_ha: 300.0,
                uplift_sd_kg_ha: 200.0,
                new_field_sd_kg_ha: Some(250.0),
            },
        );
        products.insert(
            "b".to_string(),
            ProductPosterior {
                uplift_mean_kg_ha: -50.0,
                uplift_sd_kg_ha: 80.0,
                new_field_sd_kg_ha: None,
            },
        );
        PriorsFile {
            format: FORMAT.into(),
            trial: "earlier".into(),
            crop: "wheat".into(),
            check: "c".into(),
            products,
            fields: Vec::new(),
        }
    }

    #[test]
    fn widening_multiplies_the_sd_and_the_trials_own_priors_win() {
        let f = file();
        let none = BTreeMap::new();
        let (p1, _) = f
            .priors_for("p.json", "wheat", "c", 1.0, PriorSd::Pooled, &none)
            .unwrap();
        let (p2, said) = f
            .priors_for("p.json", "Wheat", "c", 2.0, PriorSd::Pooled, &none)
            .unwrap();
        assert_eq!(p1["a"], (300.0, 200.0));
        assert_eq!(
            p2["a"],
            (300.0, 400.0),
            "a widening of 2 doubles the prior SD"
        );
        assert_eq!(p2["b"], (-50.0, 160.0));
        assert!(said.contains("priors for a, b from p.json"), "{said}");
        let (p3, said) = f
            .priors_for("p.json", "wheat", "c", 1.0, PriorSd::NewField, &none)
            .unwrap();
        assert_eq!((p3["a"], p3["b"]), ((300.0, 250.0), (-50.0, 80.0)));
        assert!(said.contains("the pooled SD for b"), "{said}");
        let own = BTreeMap::from([("a".to_string(), (10.0, 5.0))]);
        let (p4, _) = f
            .priors_for("p.json", "wheat", "c", 2.0, PriorSd::Pooled, &own)
            .unwrap();
        assert_eq!(p4["a"], (10.0, 5.0));
        assert!(f
            .priors_for("p.json", "corn", "c", 1.0, PriorSd::Pooled, &none)
            .unwrap_err()
            .contains("from a wheat trial"));
        assert!(f
            .priors_for("p.json", "wheat", "d", 1.0, PriorSd::Pooled, &none)
            .unwrap_err()
            .contains("the same check"));
    }

    #[test]
    fn the_file_round_trips_and_bad_files_are_named() {
        let f = file();
        let text = serde_json::to_string_pretty(&f).unwrap();
        assert_eq!(PriorsFile::parse(&text, "p.json").unwrap(), f);
        assert!(PriorsFile::parse("{}", "p.json")
            .unwrap_err()
            .starts_with("p.json: not a priors file"));
        let other = text.replace(FORMAT, "something-else");
        assert!(PriorsFile::parse(&other, "p.json")
            .unwrap_err()
            .contains("expected \"plotsieve-priors-1\""));
    }
}
