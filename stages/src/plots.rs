//! Plots: spatial join of clean points to plot polygons, and plot statistics.
//!
//! Parameters: clean points, projected plot polygons, the design table, `plots.min_points`.
//! Returns: for each point the plot it falls in (or a rejection `outside_plots`), and per
//! plot the point count, mean, median and SD of yield at standard moisture in the output
//! unit, mean moisture, polygon centroid and area. Plots with fewer than `min_points` points
//! stay in the table with status `set_aside` and a plot row in the rejection table.
//! Method: an R-tree (rstar) of polygon bounding boxes, then an exact point-in-polygon test
//! (geo `Contains`). A point inside two overlapping polygons goes to the first in the
//! design order.
//! Complexity: O(n log m) for n points and m plots.

use crate::config::{Crop, OutputUnit};
use crate::table::{CleanPoint, DesignRow, PlotCounts, PlotPolygon, Rejection, StageSummary};
use crate::util::{mean, median, sd};
use geo::{Area, Centroid, Contains, LineString, Polygon};
use rstar::primitives::{GeomWithData, Rectangle};
use rstar::RTree;
use std::collections::{BTreeMap, HashMap};

/// Statistics of one plot.
#[derive(Clone, Debug, PartialEq)]
pub struct PlotStats {
    pub plot_id: String,
    pub field: String,
    pub treatment: String,
    pub block: String,
    /// `kept`, or `set_aside` with the rule in `reason`.
    pub status: String,
    pub reason: String,
    pub points: u64,
    /// Yields at standard moisture in the trial's output unit.
    pub yield_mean: f64,
    pub yield_median: f64,
    pub yield_sd: f64,
    pub moisture_mean_pct: f64,
    pub centroid_x_m: f64,
    pub centroid_y_m: f64,
    pub area_m2: f64,
}

/// What the plots stage hands on.
#[derive(Clone, Debug)]
pub struct PlotsOutput {
    /// For each kept clean point (by index into the input), the plot index it falls in.
    pub assignment: Vec<(usize, usize)>,
    pub plots: Vec<PlotStats>,
    pub rejections: Vec<Rejection>,
    pub summary: StageSummary,
}

/// A geo polygon from a plot ring set.
pub fn to_geo(p: &PlotPolygon) -> Polygon<f64> {
    Polygon::new(
        LineString::from(p.exterior.clone()),
        p.holes
            .iter()
            .map(|h| LineString::from(h.clone()))
            .collect(),
    )
}

/// Index polygons by their bounding boxes.
pub fn index(polys: &[Polygon<f64>]) -> RTree<GeomWithData<Rectangle<[f64; 2]>, usize>> {
    use geo::BoundingRect;
    let items = polys
        .iter()
        .enumerate()
        .filter_map(|(i, p)| {
            let r = p.bounding_rect()?;
            Some(GeomWithData::new(
                Rectangle::from_corners([r.min().x, r.min().y], [r.max().x, r.max().y]),
                i,
            ))
        })
        .collect();
    RTree::bulk_load(items)
}

/// The first polygon (lowest index) that contains the point.
pub fn locate(
    tree: &RTree<GeomWithData<Rectangle<[f64; 2]>, usize>>,
    polys: &[Polygon<f64>],
    x: f64,
    y: f64,
) -> Option<usize> {
    tree.locate_all_at_point(&[x, y])
        .map(|g| g.data)
        .filter(|&i| polys[i].contains(&geo::Point::new(x, y)))
        .min()
}

/// Run the plots stage.
pub fn run(
    points: &[CleanPoint],
    files: &[String],
    polygons: &[PlotPolygon],
    design: &[DesignRow],
    design_file: &str,
    min_points: u64,
    unit: OutputUnit,
    crop: &Crop,
) -> PlotsOutput {
    // Plots in design order, so that overlaps and ties resolve the same way every run.
    let by_id: HashMap<&str, &PlotPolygon> =
        polygons.iter().map(|p| (p.plot_id.as_str(), p)).collect();
    let ordered: Vec<(&DesignRow, &PlotPolygon)> = design
        .iter()
        .filter_map(|d| by_id.get(d.plot_id.as_str()).map(|p| (d, *p)))
        .collect();
    let polys: Vec<Polygon<f64>> = ordered.iter().map(|(_, p)| to_geo(p)).collect();
    let tree = index(&polys);
    let mut assignment = Vec::new();
    let mut rejections = Vec::new();
    let mut members: Vec<Vec<usize>> = vec![Vec::new(); polys.len()];
    for (i, p) in points.iter().enumerate() {
        match locate(&tree, &polys, p.base.x_m, p.base.y_m) {
            Some(k) => {
                assignment.push((i, k));
                members[k].push(i);
            }
            None => rejections.push(Rejection {
                source_file: files[p.base.file as usize].clone(),
                source_row: p.base.row,
                id: p.base.id.to_string(),
                rule: "outside_plots".into(),
                column: "x_m,y_m".into(),
                value: format!("{:.2},{:.2}", p.base.x_m, p.base.y_m),
                limit: "inside a plot polygon".into(),
            }),
        }
    }
    let mut summary =
        StageSummary::from_rejections("plots", "points", points.len() as u64, &rejections);
    let mut plots = Vec::new();
    let mut plot_counts = PlotCounts {
        count_in: ordered.len() as u64,
        ..Default::default()
    };
    for (k, (d, _)) in ordered.iter().enumerate() {
        let ys: Vec<f64> = members[k]
            .iter()
            .map(|&i| unit.from_kg_ha(points[i].yield_std_kg_ha, crop))
            .collect();
        let ms: Vec<f64> = members[k]
            .iter()
            .map(|&i| points[i].moisture_shifted_pct)
            .collect();
        let c = polys[k]
            .centroid()
            .map(|c| (c.x(), c.y()))
            .unwrap_or((f64::NAN, f64::NAN));
        let n = ys.len() as u64;
        let set_aside = n < min_points;
        if set_aside {
            plot_counts.set_aside += 1;
            *plot_counts.by_rule.entry("min_points".into()).or_default() += 1;
            rejections.push(Rejection {
                source_file: design_file.to_string(),
                source_row: d.row,
                id: d.plot_id.clone(),
                rule: "min_points".into(),
                column: "points".into(),
                value: n.to_string(),
                limit: format!(">= {min_points}"),
            });
        } else {
            plot_counts.kept += 1;
        }
        plots.push(PlotStats {
            plot_id: d.plot_id.clone(),
            field: d.field.clone(),
            treatment: d.treatment.clone(),
            block: d.block.clone(),
            status: if set_aside { "set_aside" } else { "kept" }.into(),
            reason: if set_aside {
                "min_points".into()
            } else {
                String::new()
            },
            points: n,
            yield_mean: mean(&ys),
            yield_median: median(&ys),
            yield_sd: sd(&ys),
            moisture_mean_pct: mean(&ms),
            centroid_x_m: c.0,
            centroid_y_m: c.1,
            area_m2: polys[k].unsigned_area(),
        });
    }
    let mut per_field: BTreeMap<String, u64> = BTreeMap::new();
    for p in plots.iter().filter(|p| p.status == "kept") {
        *per_field.entry(p.field.clone()).or_default() += 1;
    }
    summary
        .details
        .insert("kept_plots_per_field".into(), serde_json::json!(per_field));
    summary.plots = Some(plot_counts);
    PlotsOutput {
        assignment,
        plots,
        rejections,
        summary,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn locate_in_square_and_hole() {
        let sq = PlotPolygon {
            plot_id: "a".into(),
            exterior: vec![
                (0.0, 0.0),
                (10.0, 0.0),
                (10.0, 10.0),
                (0.0, 10.0),
                (0.0, 0.0),
            ],
            holes: vec![vec![
                (4.0, 4.0),
                (6.0, 4.0),
                (6.0, 6.0),
                (4.0, 6.0),
                (4.0, 4.0),
            ]],
        };
        let polys = vec![to_geo(&sq)];
        let t = index(&polys);
        assert_eq!(locate(&t, &polys, 1.0, 1.0), Some(0));
        assert_eq!(locate(&t, &polys, 5.0, 5.0), None, "inside the hole");
        assert_eq!(locate(&t, &polys, 11.0, 1.0), None);
        // Area 100 - 4 = 96 m2 by hand.
        assert!((polys[0].unsigned_area() - 96.0).abs() < 1e-9);
    }
}
