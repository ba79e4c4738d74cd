//! Plot-table entry: plot-level yields (a plot combine weighs each plot) instead of monitor
//! records. A CSV with one row per plot:
//!
//! - `plot_id` (or `plot`), the treatment (`treatment`, `variety`, `entry`, `product` or
//!   `genotype`), `block` (or `rep`, `replicate`), optionally `field` (default `1`);
//! - the yield at standard moisture with its unit in the column name: `yield_t_ha`,
//!   `yield_kg_ha`, `yield_q_ha` or `yield_bu_ac` (bushels of the trial's crop);
//! - the position: `x_m` and `y_m` (projected metres), or `row` and `range` (or `column`)
//!   times `adjust.row_spacing_m` and `adjust.range_spacing_m`.
//!
//! A row that cannot be used is a rejection naming its line and column (`missing_value`,
//! `unparseable`, `yield_bounds` for a yield outside the crop's biological bounds); a
//! duplicate plot id, a missing column or a table with no row is an error, and
//! [`PlotTable::usable`] makes one with no usable row an error.

use super::IngestError;
use crate::crop::{Crop, LB_AC_IN_KG_HA};
use crate::plots::PlotStats;
use crate::table::Rejection;
use std::collections::BTreeMap;
use std::path::Path;

/// A plot table read: its rows, the plots kept and the rows rejected.
pub struct PlotTable {
    pub rows: u64,
    pub plots: Vec<PlotStats>,
    pub rejections: Vec<Rejection>,
    /// How the table was read (columns and units), for `check` and the summary.
    pub read_as: String,
}

const PLOT_ID: &[&str] = &["plot_id", "plot"];
const TREATMENT: &[&str] = &["treatment", "variety", "entry", "product", "genotype"];
const BLOCK: &[&str] = &["block", "rep", "replicate"];
const RANGE: &[&str] = &["range", "column", "col"];

/// kg/ha in one unit of a yield column, by its suffix.
fn yield_unit(suffix: &str, crop: &Crop) -> Option<f64> {
    match suffix {
        "kg_ha" => Some(1.0),
        "t_ha" => Some(1000.0),
        // 1 quintal = 100 kg.
        "q_ha" => Some(100.0),
        "bu_ac" => Some(LB_AC_IN_KG_HA * crop.bushel_lb),
        _ => None,
    }
}

/// Read and validate a plot table; yields come out in kg/ha.
pub fn read(
    path: &Path,
    name: &str,
    crop: &Crop,
    row_spacing: f64,
    range_spacing: f64,
) -> Result<PlotTable, IngestError> {
    let unusable = |message: String| IngestError::Unusable {
        file: name.to_string(),
        message,
    };
    let (mut rdr, header) = super::open_table(path, name, b',')?;
    let col = |names: &[&str]| {
        header
            .iter()
            .position(|h| names.contains(&h.trim().to_ascii_lowercase().as_str()))
    };
    let found = || header.iter().collect::<Vec<_>>().join(", ");
    let need = |names: &[&str], what: &str| {
        col(names).ok_or_else(|| {
            unusable(format!(
                "no {what} column (one of {}; found: {})",
                names.join(", "),
                found()
            ))
        })
    };
    let (i_id, i_trt, i_blk) = (
        need(PLOT_ID, "plot id")?,
        need(TREATMENT, "treatment")?,
        need(BLOCK, "block")?,
    );
    let i_field = col(&["field"]);
    let (i_yield, per_unit, ycol) = header
        .iter()
        .enumerate()
        .find_map(|(i, h)| {
            let h = h.trim();
            h.strip_prefix("yield_")
                .and_then(|s| yield_unit(s, crop))
                .map(|k| (i, k, h.to_string()))
        })
        .ok_or_else(|| {
            unusable(format!(
                "no yield column: name it with its unit, yield_t_ha, yield_kg_ha, yield_q_ha or yield_bu_ac (found: {})",
                found()
            ))
        })?;
    let (i_x, i_y, sx, sy, pos) = match (col(&["x_m"]), col(&["y_m"]), col(&["row"]), col(RANGE)) {
        (Some(x), Some(y), _, _) => (x, y, 1.0, 1.0, "x_m/y_m (metres)".to_string()),
        (_, _, Some(r), Some(g)) => {
            if !(row_spacing > 0.0 && range_spacing > 0.0) {
                return Err(unusable("a table with row and range needs adjust.row_spacing_m and adjust.range_spacing_m above 0".into()));
            }
            (
                r,
                g,
                row_spacing,
                range_spacing,
                format!("row x {row_spacing} m and range x {range_spacing} m"),
            )
        }
        _ => {
            return Err(unusable(format!(
                "needs columns x_m and y_m, or row and range (found: {})",
                found()
            )))
        }
    };
    let names = |i: usize| header.get(i).unwrap_or("").trim().to_string();
    let mut out = PlotTable {
        rows: 0,
        plots: Vec::new(),
        rejections: Vec::new(),
        read_as: format!(
            "plot table: plot id {}, treatment {}, block {}, field {}, yield {ycol}, position {pos}",
            names(i_id),
            names(i_trt),
            names(i_blk),
            i_field.map(names).unwrap_or_else(|| "(none: all plots in field 1)".into())
        ),
    };
    let mut seen: BTreeMap<String, u64> = BTreeMap::new();
    let (lo, hi) = (crop.yield_min_kg_ha, crop.yield_max_kg_ha);
    for rec in rdr.records() {
        out.rows += 1;
        let rec = match rec {
            Ok(r) => r,
            Err(e) => {
                let line = e.position().map(|p| p.line()).unwrap_or(out.rows + 1);
                out.rejections
                    .push(super::formats::unreadable_row(name, line, &e));
                continue;
            }
        };
        let line = rec.position().map(|p| p.line()).unwrap_or(out.rows + 1);
        let cell = |i: usize| rec.get(i).unwrap_or("").trim().to_string();
        let rej = |rule: &str, i: usize, value: &str, limit: &str| {
            super::formats::reject(name, line, rule, &names(i), value, limit)
        };
        let id = cell(i_id);
        if let Some(i) = [i_id, i_trt, i_blk]
            .into_iter()
            .chain(i_field)
            .find(|&i| cell(i).is_empty())
        {
            out.rejections.push(rej("missing_value", i, "", "a value"));
            continue;
        }
        if let Some(first) = seen.insert(id.clone(), line) {
            return Err(unusable(format!(
                "plot id {id:?} on lines {first} and {line}: plot ids must be unique"
            )));
        }
        let num = |i: usize| cell(i).parse::<f64>().ok().filter(|v| v.is_finite());
        let Some(y) = num(i_yield) else {
            out.rejections
                .push(rej("unparseable", i_yield, &cell(i_yield), "a number"));
            continue;
        };
        let kg = y * per_unit;
        if !(lo..=hi).contains(&kg) {
            out.rejections.push(rej(
                "yield_bounds",
                i_yield,
                &cell(i_yield),
                &format!("{lo}-{hi} kg/ha (the crop's bounds)"),
            ));
            continue;
        }
        let (Some(x), Some(yy)) = (num(i_x), num(i_y)) else {
            let i = if num(i_x).is_none() { i_x } else { i_y };
            out.rejections
                .push(rej("unparseable", i, &cell(i), "a number"));
            continue;
        };
        let field = i_field.map(cell).unwrap_or_else(|| "1".into());
        out.plots.push(PlotStats::from_yield(
            &id,
            &field,
            &cell(i_trt),
            &cell(i_blk),
            kg,
            x * sx,
            yy * sy,
        ));
    }
    if out.rows == 0 {
        return Err(unusable("no plots: the table has a header only".into()));
    }
    Ok(out)
}

impl PlotTable {
    /// The table, or an error when no row of it can be used (naming the first bad row).
    pub fn usable(self, name: &str) -> Result<PlotTable, IngestError> {
        if !self.plots.is_empty() {
            return Ok(self);
        }
        let first = self
            .rejections
            .first()
            .map(|r| {
                format!(
                    "; the first, line {}, column {}: {} {:?} (expected {})",
                    r.source_row, r.column, r.rule, r.value, r.limit
                )
            })
            .unwrap_or_default();
        Err(IngestError::Unusable {
            file: name.to_string(),
            message: format!("none of its {} rows could be used{first}", self.rows),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::crop::crop_table;

    fn table(text: &str) -> Result<PlotTable, IngestError> {
        let dir = std::env::temp_dir().join(format!("plotsieve-pt-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let p = dir.join(format!("t{}.csv", text.len()));
        std::fs::write(&p, text).unwrap();
        let r = read(&p, "t.csv", &crop_table()["wheat"], 1.5, 6.0);
        std::fs::remove_file(&p).unwrap();
        r
    }

    #[test]
    fn a_variety_trial_table_with_rows_and_ranges() {
        let t = table(
            "plot,variety,rep,yield_t_ha,row,range\n\
             1,Alpha,1,6.5,1,1\n\
             2,Beta,1,7.25,2,1\n\
             3,Alpha,2,x,1,2\n\
             4,Beta,2,95,2,2\n\
             5,,2,6.0,3,2\n",
        )
        .unwrap();
        assert_eq!(t.rows, 5);
        assert_eq!(t.plots.len(), 2);
        assert_eq!(t.plots[1].yield_mean, 7250.0);
        assert_eq!(
            (t.plots[1].centroid_x_m, t.plots[1].centroid_y_m),
            (3.0, 6.0)
        );
        assert_eq!(t.plots[0].field, "1");
        let rules: Vec<(&str, u64, &str)> = t
            .rejections
            .iter()
            .map(|r| (r.rule.as_str(), r.source_row, r.column.as_str()))
            .collect();
        assert_eq!(
            rules,
            vec![
                ("unparseable", 4, "yield_t_ha"),
                ("yield_bounds", 5, "yield_t_ha"),
                ("missing_value", 6, "variety")
            ]
        );
        assert!(t.read_as.contains("treatment variety, block rep"));
    }

    #[test]
    fn units_ids_and_columns_are_checked() {
        // bu/ac of wheat (60 lb/bu): 100 bu/ac = 6,725.1 kg/ha.
        let t = table("plot_id,treatment,block,yield_bu_ac,x_m,y_m\nA,c,1,100,0,0\n").unwrap();
        assert!(
            (t.plots[0].yield_mean - 6725.106).abs() < 0.01,
            "{}",
            t.plots[0].yield_mean
        );
        let e = |text: &str| table(text).err().unwrap().to_string();
        assert!(e("plot_id,treatment,block,yield,x_m,y_m\nA,c,1,7,0,0\n")
            .contains("no yield column: name it with its unit"));
        assert!(
            e("plot_id,treatment,block,yield_t_ha,x_m,y_m\nA,c,1,7,0,0\nA,d,1,7,1,0\n")
                .contains("plot id \"A\" on lines 2 and 3")
        );
        assert!(e("plot_id,treatment,yield_t_ha,x_m,y_m\nA,c,7,0,0\n").contains("no block column"));
        assert!(e("plot_id,treatment,block,yield_t_ha\nA,c,1,7\n")
            .contains("needs columns x_m and y_m"));
        assert!(e("plot_id,treatment,block,yield_t_ha,x_m,y_m\n").contains("header only"));
    }
}
