//! Each clean record's plot, or the rule it breaks: far from the trial, outside every plot,
//! in a plot too small for its trims, outside the net plot, or straddling its edge.

use super::geometry::{self, clip_area};
use super::{BoxTree, PlotsSettings};
use crate::table::{CleanPoint, Texts};
use geo::{Contains, Polygon};
use rayon::prelude::*;
use rstar::PointDistance;
use std::sync::Arc;

/// Why a point was removed: the rule's texts are shared ([`crate::table::Texts`]), the
/// value is the point's own.
pub(super) struct PointVerdict {
    pub rule: &'static str,
    pub column: &'static str,
    pub value: String,
    pub limit: Arc<str>,
}

/// A record's plot (by index), or why it joins none (boxed, so that the list stays small
/// when most records join a plot).
pub(super) enum Joined {
    Plot(usize),
    Rejected(Box<PointVerdict>),
}

/// The plots and records as the join sees them.
pub(super) struct Layout<'a> {
    pub tree: &'a BoxTree,
    /// Each record's gross plot.
    pub gross: &'a [Option<usize>],
    /// Each plot's net ring and polygon (None: nothing left after the trims).
    pub nets: &'a [Option<Vec<(f64, f64)>>],
    pub net_geo: &'a [Option<Polygon<f64>>],
    /// Each record's footprint.
    pub footprint: &'a [[(f64, f64); 4]],
}

/// Each record's plot or the rule it breaks, records in parallel, taken in order; the
/// limits each rule names are made once (in `texts`) and shared by every record it removes.
pub(super) fn join(
    points: &[CleanPoint],
    g: &Layout,
    s: &PlotsSettings,
    texts: &mut Texts,
) -> Vec<Joined> {
    // The limits each rule names, made once and shared by every point it removes.
    let far_limit = texts.get(&format!("within {} m of a plot", s.far_m));
    let outside_limit = texts.get("inside a plot polygon");
    let small_limit = texts.get("plot too small for its trims");
    let trim_limit = texts.get(&format!(
        "inside the net plot (end trim {} m but at most {} of the plot's length, side trim {} m)",
        s.end_trim_m, s.end_trim_max_fraction, s.side_trim_m
    ));
    let straddle_limit = texts.get(&format!(">= {}", s.min_swath_inside));
    points
        .par_iter()
        .enumerate()
        .map(|(i, p)| {
            let (x, y) = (p.base.x_m, p.base.y_m);
            let reject =
                |rule: &'static str, column: &'static str, value: String, limit: &Arc<str>| {
                    Joined::Rejected(Box::new(PointVerdict {
                        rule,
                        column,
                        value,
                        limit: limit.clone(),
                    }))
                };
            let Some(k) = g.gross[i] else {
                let near = g
                    .tree
                    .nearest_neighbor(&[x, y])
                    .map(|g| g.geom().distance_2(&[x, y]).sqrt())
                    .unwrap_or(f64::INFINITY);
                let (rule, limit) = if near > s.far_m {
                    ("far_from_trial", &far_limit)
                } else {
                    ("outside_plots", &outside_limit)
                };
                return reject(
                    rule,
                    "distance_to_nearest_plot_m",
                    format!("{near:.1}"),
                    limit,
                );
            };
            let Some(net) = &g.net_geo[k] else {
                return reject(
                    "border_trim",
                    "x_m,y_m",
                    format!("{x:.2},{y:.2}"),
                    &small_limit,
                );
            };
            if !net.contains(&geo::Point::new(x, y)) {
                return reject(
                    "border_trim",
                    "x_m,y_m",
                    format!("{x:.2},{y:.2}"),
                    &trim_limit,
                );
            }
            let fp = &g.footprint[i];
            let fp_area = geometry::signed_area(fp).abs();
            // The net plot (any simple polygon) clipped by the convex g.footprint.
            let inside = if fp_area > 0.0 {
                clip_area(g.nets[k].as_ref().expect("net exists"), fp) / fp_area
            } else {
                1.0
            };
            if inside < s.min_swath_inside {
                return reject(
                    "swath_straddle",
                    "footprint_inside_fraction",
                    format!("{inside:.3}"),
                    &straddle_limit,
                );
            }
            Joined::Plot(k)
        })
        .collect()
}
