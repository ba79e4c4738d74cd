//! A rate trial's rates as data: a `rate_<unit>` column of the design table or of a CSV plot
//! table (`rate_kg_ha`, `rate_lb_ac`, `rate_l_ha`, `rate_seeds_ha`, `rate_seeds_ac`, the unit
//! in the name as for yields), one rate per treatment.

use crate::crop::RateUnit;
use std::collections::BTreeMap;

/// Treatment column names, as the design and plot tables accept them.
const TREATMENT: &[&str] = &["treatment", "variety", "entry", "product", "genotype"];

/// The rates of a table's `rate_<unit>` column: None when it has none; an error naming the
/// file, line and column for a rate that is not a number >= 0, a treatment given two rates,
/// or two rate columns.
pub fn rates_of_table(
    text: &str,
    name: &str,
) -> Result<Option<(RateUnit, BTreeMap<String, f64>)>, String> {
    let mut rdr = csv::ReaderBuilder::new()
        .flexible(true)
        .from_reader(text.as_bytes());
    let header: Vec<String> = match rdr.headers() {
        Ok(h) => h.iter().map(|c| c.trim().to_ascii_lowercase()).collect(),
        Err(_) => return Ok(None),
    };
    let rate_cols: Vec<(usize, RateUnit)> = header
        .iter()
        .enumerate()
        .filter_map(|(i, h)| {
            h.strip_prefix("rate_")
                .and_then(RateUnit::from_name)
                .map(|u| (i, u))
        })
        .collect();
    let (col, unit) = match rate_cols.as_slice() {
        [] => return Ok(None),
        [one] => *one,
        _ => {
            return Err(format!(
                "{name}: two rate columns ({}); give each treatment's rate in one",
                rate_cols
                    .iter()
                    .map(|(i, _)| header[*i].as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            ))
        }
    };
    let cname = header[col].clone();
    let trt = TREATMENT
        .iter()
        .find_map(|t| header.iter().position(|h| h == t))
        .ok_or_else(|| {
            format!(
                "{name}: column {cname} gives rates but there is no treatment column (one of {})",
                TREATMENT.join(", ")
            )
        })?;
    let mut rates: BTreeMap<String, (f64, u64)> = BTreeMap::new();
    for rec in rdr.records() {
        let rec = rec.map_err(|e| format!("{name}: {e}"))?;
        let line = rec.position().map_or(0, |p| p.line());
        let t = rec.get(trt).unwrap_or("").trim().to_string();
        let cell = rec.get(col).unwrap_or("").trim();
        if t.is_empty() && cell.is_empty() {
            continue;
        }
        let r: f64 = cell
            .parse()
            .ok()
            .filter(|r: &f64| r.is_finite() && *r >= 0.0)
            .ok_or_else(|| {
                format!("{name}, line {line}, column {cname}: expected a rate >= 0 in {unit}, found {cell:?}")
            })?;
        match rates.get(&t) {
            Some(&(r0, l0)) if r0 != r => {
                return Err(format!(
                    "{name}, line {line}, column {cname}: treatment {t} has rate {r} here but {r0} on line {l0} (a treatment has one rate)"
                ))
            }
            Some(_) => {}
            None => {
                rates.insert(t, (r, line));
            }
        }
    }
    Ok(Some((
        unit,
        rates.into_iter().map(|(t, (r, _))| (t, r)).collect(),
    )))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_rate_column_gives_one_rate_per_treatment() {
        let t = "plot_id,treatment,block,rate_lb_ac\n1,N0,1,0\n2,N1,1,60\n3,N0,2,0\n4,N2,2,120\n";
        let (u, r) = rates_of_table(t, "design.csv").unwrap().unwrap();
        assert_eq!(u, RateUnit::LbAc);
        assert_eq!(r.len(), 3);
        assert_eq!(r["N2"], 120.0);
        assert!(rates_of_table("plot_id,treatment\n1,a\n", "d.csv")
            .unwrap()
            .is_none());
    }

    #[test]
    fn a_treatment_with_two_rates_or_a_bad_rate_is_refused_by_line() {
        let t = "plot_id,treatment,block,rate_kg_ha\n1,N0,1,0\n2,N1,1,60\n3,N1,2,70\n";
        let e = rates_of_table(t, "design.csv").unwrap_err();
        assert_eq!(
            e,
            "design.csv, line 4, column rate_kg_ha: treatment N1 has rate 70 here but 60 on line 3 (a treatment has one rate)"
        );
        let t = "plot_id,variety,block,rate_kg_ha\n1,N0,1,-5\n";
        let e = rates_of_table(t, "p.csv").unwrap_err();
        assert!(
            e.contains(
                "p.csv, line 2, column rate_kg_ha: expected a rate >= 0 in kg_ha, found \"-5\""
            ),
            "{e}"
        );
        let t = "plot_id,treatment,rate_kg_ha,rate_lb_ac\n1,N0,0,0\n";
        assert!(rates_of_table(t, "d.csv")
            .unwrap_err()
            .contains("two rate columns"));
    }
}
