//! As-applied rates of a rate trial: each treatment's mean as-applied rate (over its kept
//! plots, each plot the mean of its records' logged rates) set against its target rate, per
//! field and over the trial (`all`); warnings where they part by more than the tolerance;
//! and the means as the rates the curve places the treatments at (`adjust.rate_source =
//! "applied"`).

use crate::crop::RateUnit;
use crate::table::PlotStats;
use std::collections::BTreeMap;

/// One treatment's as-applied rate against its target, in the trial's rate unit.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct AppliedRow {
    /// A field, or `all`.
    pub field: String,
    pub treatment: String,
    pub rate_unit: String,
    pub target_rate: f64,
    /// Kept plots, and those of them with as-applied records.
    pub plots: u64,
    pub plots_with_rate: u64,
    /// Mean, SD, lowest and highest of the plots' mean as-applied rates.
    pub applied_mean: f64,
    pub applied_sd: f64,
    pub applied_min: f64,
    pub applied_max: f64,
    /// `applied_mean - target_rate`, and as a percentage of the target (of the highest
    /// target for a zero target).
    pub difference: f64,
    pub difference_pct: f64,
}

/// A plot's mean as-applied rate in `unit` (None without as-applied records).
fn plot_rate(p: &PlotStats, unit: RateUnit) -> Option<f64> {
    p.applied
        .as_ref()
        .filter(|a| a.points > 0 && a.mean.is_finite())
        .map(|a| a.mean / unit.per_ha())
}

/// The rows per field and over the trial (`all`, last), for the treatments with a target
/// rate; kept plots only.
pub fn applied_rows(
    plots: &[PlotStats],
    targets: &BTreeMap<String, f64>,
    unit: RateUnit,
) -> Vec<AppliedRow> {
    let highest = targets.values().copied().fold(0.0, f64::max);
    let mut groups: BTreeMap<(String, String), (u64, Vec<f64>)> = BTreeMap::new();
    for p in plots.iter().filter(|p| p.status == "kept") {
        if !targets.contains_key(&p.treatment) {
            continue;
        }
        let rate = plot_rate(p, unit);
        for field in [p.field.as_str(), "all"] {
            let g = groups
                .entry((field.to_string(), p.treatment.clone()))
                .or_default();
            g.0 += 1;
            g.1.extend(rate);
        }
    }
    let row = |(field, treatment): (String, String), (n, rs): (u64, Vec<f64>)| {
        let target = targets[&treatment];
        let mean = crate::util::mean(&rs);
        let reference = if target > 0.0 { target } else { highest };
        AppliedRow {
            rate_unit: unit.to_string(),
            target_rate: target,
            plots: n,
            plots_with_rate: rs.len() as u64,
            applied_mean: mean,
            applied_sd: crate::util::sd(&rs),
            applied_min: rs.iter().copied().reduce(f64::min).unwrap_or(f64::NAN),
            applied_max: rs.iter().copied().reduce(f64::max).unwrap_or(f64::NAN),
            difference: mean - target,
            difference_pct: 100.0 * (mean - target) / reference,
            field,
            treatment,
        }
    };
    let (all, fields): (Vec<_>, Vec<_>) = groups.into_iter().partition(|((f, _), _)| f == "all");
    let mut rows: Vec<AppliedRow> = fields
        .into_iter()
        .chain(all)
        .map(|(k, v)| row(k, v))
        .collect();
    // Each field's treatments (then the trial's) in the order of their target rates.
    rows.sort_by(|a, b| {
        (a.field == "all")
            .cmp(&(b.field == "all"))
            .then(a.field.cmp(&b.field))
            .then(a.target_rate.total_cmp(&b.target_rate))
            .then(a.treatment.cmp(&b.treatment))
    });
    rows
}

/// Warnings: kept plots without as-applied records, and treatments whose trial-wide mean is
/// further from the target than `tolerance_pct`.
pub fn applied_warnings(rows: &[AppliedRow], tolerance_pct: f64, applied: bool) -> Vec<String> {
    let mut out = Vec::new();
    for r in rows.iter().filter(|r| r.field == "all") {
        if r.plots_with_rate < r.plots {
            out.push(format!(
                "as-applied rates: {} of the {} kept plots of {} have no as-applied record (the column is empty there){}",
                r.plots - r.plots_with_rate,
                r.plots,
                r.treatment,
                if applied {
                    "; its as-applied mean comes from the others"
                } else {
                    ""
                }
            ));
        }
        if r.difference_pct.abs() > tolerance_pct {
            out.push(format!(
                "as-applied rates: {} averaged {:.1} {} against its target {} ({:+.1} %, beyond adjust.applied_rate_tolerance_pct = {}); {}",
                r.treatment,
                r.applied_mean,
                r.rate_unit,
                r.target_rate,
                r.difference_pct,
                tolerance_pct,
                if applied {
                    "the curve places it at its as-applied mean (adjust.rate_source = \"applied\")"
                } else {
                    "the curve places it at its target rate: set adjust.rate_source = \"applied\" to place it where it was applied"
                }
            ));
        }
    }
    out
}

/// The trial-wide mean as-applied rate of each treatment (`adjust.rate_source =
/// "applied"`), rounded to 0.001 of the unit; an error naming a treatment without any
/// as-applied record, or when fewer than three distinct rates remain.
pub fn applied_means(rows: &[AppliedRow]) -> Result<BTreeMap<String, f64>, String> {
    let mut out = BTreeMap::new();
    let mut none = Vec::new();
    for r in rows.iter().filter(|r| r.field == "all") {
        if r.plots_with_rate == 0 {
            none.push(r.treatment.as_str());
        } else {
            out.insert(
                r.treatment.clone(),
                (r.applied_mean * 1000.0).round() / 1000.0,
            );
        }
    }
    if !none.is_empty() {
        return Err(format!(
            "adjust.rate_source = \"applied\": no kept plot of {} has an as-applied record, so the curve has no rate for it (use rate_source = \"target\", or check columns.applied_rate)",
            none.join(", ")
        ));
    }
    let mut distinct: Vec<f64> = out.values().copied().collect();
    distinct.sort_by(f64::total_cmp);
    distinct.dedup();
    if distinct.len() < 3 {
        return Err(format!(
            "adjust.rate_source = \"applied\": the as-applied means give {} distinct rate(s); a curve needs three",
            distinct.len()
        ));
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::table::AppliedRate;

    fn plot(field: &str, t: &str, applied: Option<f64>) -> PlotStats {
        let mut p = PlotStats::from_yield("p", field, t, "1", 9000.0, 0.0, 0.0);
        p.applied = Some(AppliedRate {
            points: u64::from(applied.is_some()) * 40,
            mean: applied.unwrap_or(f64::NAN),
            sd: 1.0,
        });
        p
    }

    #[test]
    fn treatment_means_differences_and_warnings() {
        let targets: BTreeMap<String, f64> = [("N0", 0.0), ("N100", 100.0), ("N200", 200.0)]
            .into_iter()
            .map(|(t, r)| (t.to_string(), r))
            .collect();
        // Stored per hectare in kg: 1 lb/ac = 1.12085 kg/ha.
        let plots = vec![
            plot("A", "N0", Some(2.0)),
            plot("A", "N100", Some(84.0)),
            plot("B", "N100", Some(86.0)),
            plot("A", "N200", Some(198.0)),
            plot("B", "N200", None),
        ];
        let rows = applied_rows(&plots, &targets, RateUnit::KgHa);
        // Fields first, then `all`.
        assert_eq!(rows.len(), 3 + 2 + 3);
        assert!(rows[..5].iter().all(|r| r.field != "all"));
        let all = |t: &str| {
            rows.iter()
                .find(|r| r.field == "all" && r.treatment == t)
                .unwrap()
        };
        assert_eq!(all("N100").applied_mean, 85.0);
        assert!((all("N100").applied_sd - 2f64.sqrt()).abs() < 1e-12);
        assert_eq!(all("N100").difference_pct, -15.0);
        // A zero target: percent of the highest target.
        assert_eq!(all("N0").difference_pct, 1.0);
        assert_eq!((all("N200").plots, all("N200").plots_with_rate), (2, 1));
        let w = applied_warnings(&rows, 10.0, false);
        assert_eq!(w.len(), 2, "{w:?}");
        assert!(w[0].contains("N100 averaged 85.0 kg_ha against its target 100 (-15.0 %"));
        assert!(w[1].contains("1 of the 2 kept plots of N200"));
        // No warning for N100 at a 20 % tolerance.
        assert_eq!(applied_warnings(&rows, 20.0, false).len(), 1);
        let means = applied_means(&rows).unwrap();
        assert_eq!(means["N100"], 85.0);
        assert_eq!(means["N200"], 198.0);
        // In lb/ac: 85 kg/ha = 75.8353 lb/ac.
        let lb = applied_rows(&plots, &targets, RateUnit::LbAc);
        let n100 = lb
            .iter()
            .find(|r| r.field == "all" && r.treatment == "N100");
        assert!((n100.unwrap().applied_mean - 85.0 / 1.120851).abs() < 1e-4);
    }

    #[test]
    fn applied_means_refuse_a_treatment_without_records() {
        let targets: BTreeMap<String, f64> = [("N0", 0.0), ("N1", 50.0), ("N2", 100.0)]
            .into_iter()
            .map(|(t, r)| (t.to_string(), r))
            .collect();
        let plots = vec![
            plot("A", "N0", Some(0.0)),
            plot("A", "N1", None),
            plot("A", "N2", Some(99.0)),
        ];
        let e = applied_means(&applied_rows(&plots, &targets, RateUnit::KgHa)).unwrap_err();
        assert!(
            e.contains("no kept plot of N1 has an as-applied record"),
            "{e}"
        );
        let plots = vec![
            plot("A", "N0", Some(50.0)),
            plot("A", "N1", Some(50.0)),
            plot("A", "N2", Some(99.0)),
        ];
        let e = applied_means(&applied_rows(&plots, &targets, RateUnit::KgHa)).unwrap_err();
        assert!(e.contains("2 distinct rate(s)"), "{e}");
    }
}
