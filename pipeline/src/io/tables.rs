//! The run folder's CSV tables as [`Table`] row types: `rejected.csv`, `design.csv`,
//! `plots.csv`, `adjusted_plots.csv`, `treatments.csv`, `comparison.csv` and
//! `hyperparameters.csv`, and the season's `locations.csv` and `product_x_field_sd.csv`. Each column is named, written and read in one place.

use super::table::{col, count, number, yield_col, Col, Table};
use plotsieve_stages::adjust::applied::AppliedRow;
use plotsieve_stages::adjust::{
    AdjustedPlot, Comparison, FieldHyper, ResponseCurveRow, ResponseRow, TreatmentRow,
};
use plotsieve_stages::plots::PlotStats;
use plotsieve_stages::table::{DesignRow, Rejection};
use plotsieve_stages::util::fmt;

/// A text column bound to a `String` field.
macro_rules! text {
    ($name:expr, $field:ident) => {
        col(
            $name,
            |r: &Self| r.$field.to_string(),
            |r: &mut Self, v: &str| {
                r.$field = v.into();
                Ok(())
            },
        )
    };
}

/// A number column bound to an `f64` field, written with `$d` decimals.
macro_rules! num {
    ($name:expr, $field:ident, $d:expr) => {
        col(
            $name,
            |r: &Self| fmt(r.$field, $d),
            |r: &mut Self, v: &str| {
                r.$field = number(v)?;
                Ok(())
            },
        )
    };
}

/// A yield column bound to an `f64` field (kg/ha; the file has the output unit).
macro_rules! yld {
    ($name:expr, $field:ident, $d:expr) => {
        yield_col(
            $name,
            |r: &Self| r.$field,
            |r: &mut Self, x| r.$field = x,
            $d,
        )
    };
}

/// A count column bound to an integer field.
macro_rules! whole {
    ($name:expr, $field:ident) => {
        col(
            $name,
            |r: &Self| r.$field.to_string(),
            |r: &mut Self, v: &str| {
                r.$field = count(v)?;
                Ok(())
            },
        )
    };
}

impl Table for Rejection {
    fn columns(_unit: &str) -> Vec<Col<Self>> {
        vec![
            text!("source_file", source_file),
            whole!("source_row", source_row),
            text!("id", id),
            text!("rule", rule),
            text!("column", column),
            text!("value", value),
            text!("limit", limit),
        ]
    }
}

impl Table for DesignRow {
    fn columns(_unit: &str) -> Vec<Col<Self>> {
        vec![
            text!("plot_id", plot_id),
            text!("treatment", treatment),
            text!("block", block),
            text!("field", field),
            whole!("source_row", row),
        ]
    }
}

impl Table for PlotStats {
    fn columns(unit: &str) -> Vec<Col<Self>> {
        // Counts are read as numbers (an analyst's own table may write 12.0).
        vec![
            text!("plot_id", plot_id),
            text!("field", field),
            text!("treatment", treatment),
            text!("block", block),
            text!("status", status),
            text!("reason", reason),
            col(
                "points",
                |r: &Self| r.points.to_string(),
                |r: &mut Self, v: &str| {
                    r.points = number(v)? as u64;
                    Ok(())
                },
            ),
            yld!(format!("yield_mean_{unit}"), yield_mean, 6),
            yld!(format!("yield_median_{unit}"), yield_median, 6),
            yld!(format!("yield_trimmed_mean_{unit}"), yield_trimmed_mean, 6),
            yld!(format!("yield_sd_{unit}"), yield_sd, 6),
            num!("moisture_mean_pct", moisture_mean_pct, 4),
            num!("centroid_x_m", centroid_x_m, 4),
            num!("centroid_y_m", centroid_y_m, 4),
            num!("area_m2", area_m2, 4),
            num!("net_area_m2", net_area_m2, 4),
            num!("harvested_m2", harvested_m2, 4),
            num!("coverage", coverage, 6),
            col(
                "grid_range",
                |r: &Self| r.grid_range.to_string(),
                |r: &mut Self, v: &str| {
                    r.grid_range = number(v)? as u32;
                    Ok(())
                },
            ),
            col(
                "grid_row",
                |r: &Self| r.grid_row.to_string(),
                |r: &mut Self, v: &str| {
                    r.grid_row = number(v)? as u32;
                    Ok(())
                },
            ),
            num!("along_m", along_m, 4),
            num!("across_m", across_m, 4),
            col(
                "source",
                // Plots from a plot table have no polygon of their own, hence no area.
                |r: &Self| {
                    if r.area_m2.is_nan() {
                        "plot_table".into()
                    } else {
                        "monitor".into()
                    }
                },
                |_: &mut Self, _| Ok(()),
            ),
        ]
    }
}

impl Table for AdjustedPlot {
    fn columns(unit: &str) -> Vec<Col<Self>> {
        vec![
            text!("plot_id", plot_id),
            text!("field", field),
            text!("treatment", treatment),
            text!("block", block),
            yld!(format!("raw_yield_{unit}"), raw, 6),
            yld!(format!("spatial_effect_{unit}"), spatial_mean, 6),
            yld!(format!("spatial_effect_sd_{unit}"), spatial_sd, 6),
            yld!(format!("adjusted_yield_{unit}"), adjusted, 6),
            yld!(format!("adjusted_yield_sd_{unit}"), adjusted_sd, 6),
        ]
    }
}

impl Table for TreatmentRow {
    fn columns(unit: &str) -> Vec<Col<Self>> {
        vec![
            text!("field", field),
            text!("treatment", treatment),
            whole!("plots", plots),
            yld!(format!("estimate_{unit}"), estimate, 6),
            yld!(format!("sd_{unit}"), sd, 6),
            yld!(format!("lo95_{unit}"), lo95, 6),
            yld!(format!("hi95_{unit}"), hi95, 6),
            yld!(format!("uplift_{unit}"), uplift, 6),
            yld!(format!("uplift_sd_{unit}"), uplift_sd, 6),
            yld!(format!("uplift_lo90_{unit}"), uplift_lo90, 6),
            yld!(format!("uplift_hi90_{unit}"), uplift_hi90, 6),
            yld!(format!("uplift_lo95_{unit}"), uplift_lo95, 6),
            yld!(format!("uplift_hi95_{unit}"), uplift_hi95, 6),
            num!("p_uplift_gt0", p_uplift_gt0, 6),
            yld!(format!("break_even_{unit}"), break_even, 6),
            num!("p_uplift_gt_break_even", p_uplift_gt_break_even, 6),
            num!("expected_net_return_per_ha", expected_net_return_per_ha, 2),
            yld!(format!("prior_mean_{unit}"), prior_mean, 6),
            yld!(format!("prior_sd_{unit}"), prior_sd, 6),
            yld!(format!("new_field_uplift_{unit}"), new_field_uplift, 6),
            yld!(format!("new_field_sd_{unit}"), new_field_sd, 6),
            yld!(format!("new_field_lo90_{unit}"), new_field_lo90, 6),
            yld!(format!("new_field_hi90_{unit}"), new_field_hi90, 6),
            yld!(format!("new_field_lo95_{unit}"), new_field_lo95, 6),
            yld!(format!("new_field_hi95_{unit}"), new_field_hi95, 6),
            num!("p_new_field_gt0", p_new_field_gt0, 6),
            num!("p_new_field_gt_break_even", p_new_field_gt_break_even, 6),
        ]
    }
}

impl Table for ResponseRow {
    fn columns(unit: &str) -> Vec<Col<Self>> {
        vec![
            text!("field", field),
            text!("model", model),
            num!("probability", probability, 6),
            num!("log_bayes_factor_vs_unordered", log_bayes_factor, 4),
            text!("rate_unit", rate_unit),
            num!("optimum_rate", optimum_rate, 3),
            num!("optimum_lo90", optimum_lo90, 3),
            num!("optimum_hi90", optimum_hi90, 3),
            num!("optimum_lo95", optimum_lo95, 3),
            num!("optimum_hi95", optimum_hi95, 3),
            num!("p_optimum_at_highest_rate", p_optimum_at_highest, 4),
            yld!(format!("gain_at_optimum_{unit}"), gain_at_optimum, 6),
            num!(
                "net_return_at_optimum_per_ha",
                net_return_at_optimum_per_ha,
                2
            ),
            num!("p_optimum_beats_lowest", p_optimum_beats_lowest, 4),
            num!("p_optimum_beats_current", p_optimum_beats_current, 4),
            num!("flat_top_lo", flat_top_lo, 3),
            num!("flat_top_hi", flat_top_hi, 3),
            num!("new_field_optimum_lo90", new_field_lo90, 3),
            num!("new_field_optimum_hi90", new_field_hi90, 3),
            num!("new_field_optimum_lo95", new_field_lo95, 3),
            num!("new_field_optimum_hi95", new_field_hi95, 3),
            num!(
                "p_new_field_optimum_beats_lowest",
                p_new_field_beats_lowest,
                4
            ),
            text!("note", note),
        ]
    }
}

impl Table for ResponseCurveRow {
    fn columns(unit: &str) -> Vec<Col<Self>> {
        vec![
            text!("field", field),
            num!("rate", rate, 3),
            col(
                "tested",
                |r: &Self| r.tested.to_string(),
                |r: &mut Self, v: &str| {
                    r.tested = v == "true";
                    Ok(())
                },
            ),
            yld!(format!("gain_{unit}"), gain, 6),
            yld!(format!("gain_lo95_{unit}"), gain_lo95, 6),
            yld!(format!("gain_hi95_{unit}"), gain_hi95, 6),
            num!("net_return_per_ha", net_return_per_ha, 2),
            num!("net_return_lo95_per_ha", net_return_lo95_per_ha, 2),
            num!("net_return_hi95_per_ha", net_return_hi95_per_ha, 2),
            num!("p_beats_lowest", p_beats_lowest, 4),
            num!("p_beats_current", p_beats_current, 4),
        ]
    }
}

impl Table for Comparison {
    fn columns(_unit: &str) -> Vec<Col<Self>> {
        vec![
            text!("field", field),
            num!("log_ml_spatial", log_ml_spatial, 6),
            num!("log_ml_without_spatial", log_ml_without_spatial, 6),
            num!("efficiency", efficiency, 6),
            num!("moran_i_without_spatial", moran_without_spatial, 6),
            num!("moran_i_spatial", moran_spatial, 6),
            num!("rank_correlation", rank_correlation, 6),
            num!("top_quarter_overlap", top_overlap, 6),
        ]
    }
}

/// A number column with its own getter and setter (for fields inside a [`Summary`]).
macro_rules! numf {
    ($name:expr, $d:expr, |$r:ident| $get:expr, |$w:ident, $x:ident| $set:expr) => {
        col(
            $name,
            |$r: &Self| fmt($get, $d),
            |$w: &mut Self, v: &str| {
                let $x = number(v)?;
                $set;
                Ok(())
            },
        )
    };
}

/// A yield column with its own getter and setter (kg/ha; the file has the output unit).
macro_rules! yldf {
    ($name:expr, $d:expr, |$r:ident| $get:expr, |$w:ident, $x:ident| $set:expr) => {
        yield_col($name, |$r: &Self| $get, |$w: &mut Self, $x| $set, $d)
    };
}

impl Table for FieldHyper {
    fn columns(unit: &str) -> Vec<Col<Self>> {
        let u = |name: &str| format!("{name}_{unit}");
        vec![
            text!("field", field),
            whole!("plots", plots),
            num!("range_m", range_m, 4),
            num!("range_lo95_m", range_lo95_m, 4),
            num!("range_hi95_m", range_hi95_m, 4),
            numf!("range_across_m", 4, |r| r.range_across.mean, |r, x| r
                .range_across
                .mean =
                x),
            numf!("range_across_lo95_m", 4, |r| r.range_across.lo95, |r, x| {
                r.range_across.lo95 = x
            }),
            numf!("range_across_hi95_m", 4, |r| r.range_across.hi95, |r, x| {
                r.range_across.hi95 = x
            }),
            yldf!(u("spatial_sd"), 6, |r| r.spatial_sd_ci.mean, |r, x| {
                r.spatial_sd_ci.mean = x;
                r.spatial_sd = x
            }),
            yldf!(u("spatial_sd_lo95"), 6, |r| r.spatial_sd_ci.lo95, |r, x| {
                r.spatial_sd_ci.lo95 = x
            }),
            yldf!(u("spatial_sd_hi95"), 6, |r| r.spatial_sd_ci.hi95, |r, x| {
                r.spatial_sd_ci.hi95 = x
            }),
            yldf!(u("noise_sd"), 6, |r| r.noise_sd_ci.mean, |r, x| {
                r.noise_sd_ci.mean = x;
                r.noise_sd = x
            }),
            yldf!(u("noise_sd_lo95"), 6, |r| r.noise_sd_ci.lo95, |r, x| r
                .noise_sd_ci
                .lo95 =
                x),
            yldf!(u("noise_sd_hi95"), 6, |r| r.noise_sd_ci.hi95, |r, x| r
                .noise_sd_ci
                .hi95 =
                x),
            numf!("spatial_share", 6, |r| r.spatial_share_ci.mean, |r, x| {
                r.spatial_share_ci.mean = x;
                r.spatial_share = x
            }),
            numf!(
                "spatial_share_lo95",
                6,
                |r| r.spatial_share_ci.lo95,
                |r, x| r.spatial_share_ci.lo95 = x
            ),
            numf!(
                "spatial_share_hi95",
                6,
                |r| r.spatial_share_ci.hi95,
                |r, x| r.spatial_share_ci.hi95 = x
            ),
            yldf!(u("interaction_sd"), 6, |r| r.interaction_sd.mean, |r, x| {
                r.interaction_sd.mean = x
            }),
            yldf!(
                u("interaction_sd_lo95"),
                6,
                |r| r.interaction_sd.lo95,
                |r, x| r.interaction_sd.lo95 = x
            ),
            yldf!(
                u("interaction_sd_hi95"),
                6,
                |r| r.interaction_sd.hi95,
                |r, x| r.interaction_sd.hi95 = x
            ),
            yldf!(u("row_sd"), 6, |r| r.row_sd.mean, |r, x| r.row_sd.mean = x),
            yldf!(u("row_sd_lo95"), 6, |r| r.row_sd.lo95, |r, x| r
                .row_sd
                .lo95 = x),
            yldf!(u("row_sd_hi95"), 6, |r| r.row_sd.hi95, |r, x| r
                .row_sd
                .hi95 = x),
            yldf!(u("column_sd"), 6, |r| r.column_sd.mean, |r, x| r
                .column_sd
                .mean =
                x),
            yldf!(u("column_sd_lo95"), 6, |r| r.column_sd.lo95, |r, x| {
                r.column_sd.lo95 = x
            }),
            yldf!(u("column_sd_hi95"), 6, |r| r.column_sd.hi95, |r, x| {
                r.column_sd.hi95 = x
            }),
            yldf!(u("block_sd"), 6, |r| r.block_sd.mean, |r, x| r
                .block_sd
                .mean = x),
            yldf!(u("block_sd_lo95"), 6, |r| r.block_sd.lo95, |r, x| r
                .block_sd
                .lo95 =
                x),
            yldf!(u("block_sd_hi95"), 6, |r| r.block_sd.hi95, |r, x| r
                .block_sd
                .hi95 =
                x),
            num!("log_marginal_likelihood", log_marginal_likelihood, 6),
            text!("method", method),
            text!("warning", warning),
        ]
    }
}

impl Table for plotsieve_stages::season::LocationRow {
    fn columns(unit: &str) -> Vec<Col<Self>> {
        vec![
            text!("trial", trial),
            text!("field", field),
            text!("product", product),
            whole!("plots", plots),
            yld!(format!("stage_one_uplift_{unit}"), stage_one_uplift, 6),
            yld!(format!("stage_one_sd_{unit}"), stage_one_sd, 6),
            yld!(format!("uplift_{unit}"), uplift, 6),
            yld!(format!("uplift_sd_{unit}"), uplift_sd, 6),
            yld!(format!("uplift_lo95_{unit}"), uplift_lo95, 6),
            yld!(format!("uplift_hi95_{unit}"), uplift_hi95, 6),
            num!("p_uplift_gt0", p_uplift_gt0, 6),
            num!("lon", lon, 6),
            num!("lat", lat, 6),
        ]
    }
}

impl Table for plotsieve_stages::season::TauNode {
    fn columns(unit: &str) -> Vec<Col<Self>> {
        vec![
            yld!(format!("product_x_field_sd_{unit}"), sd, 6),
            num!("prior_mass", prior, 8),
            num!("posterior_weight", posterior, 8),
        ]
    }
}

impl Table for AppliedRow {
    fn columns(_unit: &str) -> Vec<Col<Self>> {
        vec![
            text!("field", field),
            text!("treatment", treatment),
            text!("rate_unit", rate_unit),
            num!("target_rate", target_rate, 3),
            whole!("plots", plots),
            whole!("plots_with_rate", plots_with_rate),
            num!("applied_mean", applied_mean, 3),
            num!("applied_sd", applied_sd, 3),
            num!("applied_min", applied_min, 3),
            num!("applied_max", applied_max, 3),
            num!("difference", difference, 3),
            num!("difference_pct", difference_pct, 2),
        ]
    }
}
