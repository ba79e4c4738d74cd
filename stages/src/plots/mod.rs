//! Plots: clean points to trial-grade plot yields.
//!
//! Parameters: clean points, projected plot polygons (from GeoJSON or a grid [`layout`]), the
//! design table and `[plots]` settings.
//! Steps, each removal logged with its rule, value and limit:
//!
//! 1. Join: each point goes to the first plot polygon (in design order) that contains it,
//!    found through an R-tree (rstar) of polygon bounding boxes and an exact test (geo
//!    `Contains`). A point in no plot is `outside_plots`, or `far_from_trial` when it lies
//!    more than `far_m` from every plot's bounding box (an export that strayed onto another
//!    field or a road).
//! 2. Border trimming: the net plot is the plot's own rectangle (minimum rotated rectangle,
//!    along its longer side) shrunk by `end_trim_m` at each end and `side_trim_m` at each side.
//!    A point of the plot outside the net plot is `border_trim`.
//! 3. Swath straddle: the point's swath footprint (logged width across its heading, distance
//!    since the previous point along it, at most two of the export's logging intervals) must
//!    lie at least `min_swath_inside` inside the net
//!    plot (exact clipping, [`geometry::clip_area`]), else `swath_straddle`.
//! 4. Per plot: point count, harvested area (union of footprints within the net plot, on a
//!    raster of `coverage_cell_m`) and its fraction of the net area, mean, median, trimmed
//!    mean (`trim_fraction` off each tail) and SD of yield at standard moisture, mean
//!    moisture, centroid, and grid coordinates (range along travel, row across, and metres
//!    along and across from the field's first plot). Plots with fewer than `min_points`
//!    points (one-second records: a record of an export logging every 3 s counts 3; a short
//!    plot needs at most `min_points_max_fraction` of the records a complete harvest of its
//!    net plot gives, and at least 3) or a coverage below `min_coverage` are set aside
//!    (`min_points`, `min_coverage`) and stay in the table, flagged.
//!
//! Complexity: O(n log m) for n points and m plots, plus the footprint raster per plot.

pub mod geometry;
mod join;
mod motion;
pub mod settings;

pub use crate::table::PlotStats;
use crate::table::{
    AppliedRate, CleanPoint, DesignRow, PlotCounts, PlotPolygon, Rejection, StageSummary, Texts,
};
use crate::util::{mean, median, sd};
use geo::{Area, Centroid, Contains, LineString, Polygon};
use geometry::{net_polygon, Frame};
use rayon::prelude::*;
use rstar::primitives::{GeomWithData, Rectangle};
use rstar::RTree;
pub use settings::PlotsSettings;
use std::collections::{BTreeMap, HashMap};

/// What the plots stage hands on.
#[derive(Clone, Debug)]
pub struct PlotsOutput {
    /// For each kept clean point (by index into the input), the plot index it counts for.
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

type BoxTree = RTree<GeomWithData<Rectangle<[f64; 2]>, usize>>;

/// Index polygons by their bounding boxes.
pub fn index(polys: &[Polygon<f64>]) -> BoxTree {
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
pub fn locate(tree: &BoxTree, polys: &[Polygon<f64>], x: f64, y: f64) -> Option<usize> {
    tree.locate_all_at_point(&[x, y])
        .map(|g| g.data)
        .filter(|&i| polys[i].contains(&geo::Point::new(x, y)))
        .min()
}

/// Mean of the values left after cutting `fraction` of them off each tail.
pub fn trimmed_mean(values: &[f64], fraction: f64) -> f64 {
    if values.is_empty() {
        return f64::NAN;
    }
    let mut v = values.to_vec();
    v.sort_by(|a, b| a.total_cmp(b));
    let k = (fraction * v.len() as f64).floor() as usize;
    let core = &v[k.min(v.len() / 2)..v.len() - k.min((v.len() - 1) / 2)];
    mean(core)
}

/// Group sorted coordinates into ranks: a new rank after a gap wider than `gap`.
fn ranks(values: &[f64], gap: f64) -> Vec<u32> {
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_by(|&a, &b| values[a].total_cmp(&values[b]));
    let mut out = vec![0u32; values.len()];
    let mut rank = 1;
    for (k, &i) in order.iter().enumerate() {
        if k > 0 && values[i] - values[order[k - 1]] > gap {
            rank += 1;
        }
        out[i] = rank;
    }
    out
}

/// Run the plots stage.
#[allow(clippy::too_many_arguments)]
pub fn run(
    points: &[CleanPoint],
    files: &[String],
    polygons: &[PlotPolygon],
    design: &[DesignRow],
    design_file: &str,
    s: &PlotsSettings,
    plot_bounds: Option<(f64, f64)>,
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
    let motion::Motion {
        interval,
        footprint,
        heading,
    } = motion::of(points);
    // Each point's plot polygon (the gross plot), points in parallel.
    let gross: Vec<Option<usize>> = points
        .par_iter()
        .map(|p| locate(&tree, &polys, p.base.x_m, p.base.y_m))
        .collect();
    let travel = motion::plot_directions(&gross, &heading, polys.len());
    let nets: Vec<Option<Vec<(f64, f64)>>> = polys
        .iter()
        .zip(&travel)
        .map(|(p, t)| net_polygon(p, *t, s.end_trim_m, s.end_trim_max_fraction, s.side_trim_m))
        .collect();
    let net_geo = net_polygons(&nets);

    let mut texts = Texts::default();
    let layout = join::Layout {
        tree: &tree,
        gross: &gross,
        nets: &nets,
        net_geo: &net_geo,
        footprint: &footprint,
    };
    let Assigned {
        assignment,
        mut rejections,
        members,
        export_fields,
    } = assign(points, files, &ordered, &layout, s, &mut texts);
    let mut summary =
        StageSummary::from_rejections("plots", "points", points.len() as u64, &rejections);
    let PlotGrid {
        centroids,
        local,
        grid,
    } = plot_grid(&ordered, &polys);
    let mut plots = Vec::new();
    let mut plot_counts = PlotCounts {
        count_in: ordered.len() as u64,
        ..Default::default()
    };
    let coverages = coverages(&members, points, &nets, &footprint, s);
    let stats = statistics(&members, points, s);
    for (k, (d, _)) in ordered.iter().enumerate() {
        let ([y_mean, y_median, y_trimmed, y_sd, m_mean], applied) = stats[k].clone();
        let net_ring = nets[k].clone().unwrap_or_default();
        let net_area = geometry::signed_area(&net_ring).abs();
        let cov = coverages[k];
        let n = members[k].len() as u64;
        let figures = PlotFigures {
            net_area,
            coverage: cov,
            yield_mean: y_mean,
        };
        let reason = set_aside_reason(&members[k], points, &interval, &figures, s, plot_bounds);
        match &reason {
            Some((rule, column, value, limit)) => {
                plot_counts.set_aside += 1;
                *plot_counts.by_rule.entry(rule.to_string()).or_default() += 1;
                rejections.push(Rejection {
                    source_file: texts.get(design_file),
                    source_row: d.row,
                    id: d.plot_id.clone(),
                    rule: texts.get(rule),
                    column: texts.get(column),
                    value: value.clone(),
                    limit: texts.get(limit),
                });
            }
            None => plot_counts.kept += 1,
        }
        plots.push(PlotStats {
            plot_id: d.plot_id.clone(),
            field: d.field.clone(),
            treatment: d.treatment.clone(),
            block: d.block.clone(),
            status: if reason.is_some() {
                "set_aside"
            } else {
                "kept"
            }
            .into(),
            reason: reason.map(|r| r.0.to_string()).unwrap_or_default(),
            points: n,
            yield_mean: y_mean,
            yield_median: y_median,
            yield_trimmed_mean: y_trimmed,
            yield_sd: y_sd,
            moisture_mean_pct: m_mean,
            centroid_x_m: centroids[k].0,
            centroid_y_m: centroids[k].1,
            area_m2: polys[k].unsigned_area(),
            net_area_m2: net_area,
            harvested_m2: cov * net_area,
            coverage: cov,
            grid_range: grid[k].0,
            grid_row: grid[k].1,
            along_m: local[k].0,
            across_m: local[k].1,
            net_ring,
            applied,
        });
    }
    let mut per_field: BTreeMap<String, u64> = BTreeMap::new();
    for p in plots.iter().filter(|p| p.status == "kept") {
        *per_field.entry(p.field.clone()).or_default() += 1;
    }
    summary
        .details
        .insert("kept_plots_per_field".into(), serde_json::json!(per_field));
    summary.details.insert(
        "points_per_export_and_field".into(),
        serde_json::json!(export_fields),
    );
    let mut warnings = dropped_out(&plots, points, files, &export_fields, &summary);
    warnings.extend(too_small_warning(&ordered, &nets, s));
    summary.set_warnings(&warnings);
    summary.plots = Some(plot_counts);
    PlotsOutput {
        assignment,
        plots,
        rejections,
        summary,
    }
}

/// Each plot's centroid, its position in metres from its field's corner and its grid
/// (range, row) numbers, in the axes of the field's first plot.
struct PlotGrid {
    centroids: Vec<(f64, f64)>,
    local: Vec<(f64, f64)>,
    grid: Vec<(u32, u32)>,
}

/// Grid coordinates per field, in the axes of the field's first plot.
fn plot_grid(ordered: &[(&DesignRow, &PlotPolygon)], polys: &[Polygon<f64>]) -> PlotGrid {
    let mut field_frames: BTreeMap<&str, (Frame, f64, f64)> = BTreeMap::new();
    for (k, (d, _)) in ordered.iter().enumerate() {
        if let Some(f) = geometry::frame_of(&polys[k]) {
            field_frames.entry(d.field.as_str()).or_insert(f);
        }
    }
    let centroids: Vec<(f64, f64)> = polys
        .iter()
        .map(|p| {
            p.centroid()
                .map(|c| (c.x(), c.y()))
                .unwrap_or((f64::NAN, f64::NAN))
        })
        .collect();
    let mut local = vec![(f64::NAN, f64::NAN); polys.len()];
    let mut grid = vec![(0u32, 0u32); polys.len()];
    for (field, (frame, len, wid)) in &field_frames {
        let ks: Vec<usize> = (0..polys.len())
            .filter(|&k| ordered[k].0.field == *field)
            .collect();
        let uv: Vec<(f64, f64)> = ks
            .iter()
            .map(|&k| frame.local(centroids[k].0, centroids[k].1))
            .collect();
        let (u0, v0) = uv.iter().fold((f64::INFINITY, f64::INFINITY), |a, b| {
            (a.0.min(b.0), a.1.min(b.1))
        });
        let r_along = ranks(&uv.iter().map(|c| c.0).collect::<Vec<_>>(), 0.5 * len);
        let r_across = ranks(&uv.iter().map(|c| c.1).collect::<Vec<_>>(), 0.5 * wid);
        for (n, &k) in ks.iter().enumerate() {
            local[k] = (uv[n].0 - u0, uv[n].1 - v0);
            grid[k] = (r_along[n], r_across[n]);
        }
    }
    PlotGrid {
        centroids,
        local,
        grid,
    }
}

/// A rule a plot breaks, as (rule, column, value, limit): too few records for its net plot,
/// too little of it harvested, or a mean outside the crop's plot bounds.
fn set_aside_reason(
    members: &[usize],
    points: &[CleanPoint],
    interval: &HashMap<u32, f64>,
    f: &PlotFigures,
    s: &PlotsSettings,
    plot_bounds: Option<(f64, f64)>,
) -> Option<(&'static str, &'static str, String, String)> {
    let (n, net_area, cov, y_mean) = (members.len() as u64, f.net_area, f.coverage, f.yield_mean);
    // Records in one-second terms: a record of an export logging every 3 s counts 3.
    let seconds: f64 = members
        .iter()
        .map(|&i| {
            interval
                .get(&points[i].base.file)
                .copied()
                .unwrap_or(1.0)
                .max(1.0)
        })
        .sum();
    // The records a complete harvest of the net plot gives at the plot's median speed
    // and swath, in one-second terms; NaN where either is unknown.
    let expected_s = {
        let speeds: Vec<f64> = members
            .iter()
            .map(|&i| points[i].base.speed_m_s)
            .filter(|v| v.is_finite() && *v > 0.0)
            .collect();
        let widths: Vec<f64> = members
            .iter()
            .map(|&i| points[i].base.width_m)
            .filter(|v| v.is_finite() && *v > 0.0)
            .collect();
        net_area / (median(&speeds) * median(&widths))
    };
    let need = s.min_points_for(expected_s);
    if seconds < need {
        Some((
            "min_points",
            "points",
            if seconds == n as f64 {
                n.to_string()
            } else {
                format!("{n} records of {seconds:.0} s")
            },
            if need < s.min_points as f64 {
                format!(
                    ">= {need} (plots.min_points = {}, at most {} of the {expected_s:.1} s a complete harvest of the net plot gives)",
                    s.min_points, s.min_points_max_fraction
                )
            } else {
                format!(">= {}", s.min_points)
            },
        ))
    } else if cov < s.min_coverage {
        Some((
            "min_coverage",
            "coverage",
            format!("{cov:.3}"),
            format!(">= {}", s.min_coverage),
        ))
    } else if let Some((lo, hi)) = plot_bounds.filter(|(lo, hi)| !(*lo..=*hi).contains(&y_mean)) {
        Some((
            "plot_yield_bounds",
            "yield_mean",
            format!("{y_mean:.0} kg/ha"),
            format!("{lo}-{hi} kg/ha (crop.plot_yield_min_kg_ha and plot_yield_max_kg_ha)"),
        ))
    } else {
        None
    }
}

/// What the set-aside rules read of a plot besides its records.
struct PlotFigures {
    net_area: f64,
    coverage: f64,
    yield_mean: f64,
}

/// Each plot's coverage (the raster of its footprints), plots in parallel.
fn coverages(
    members: &[Vec<usize>],
    points: &[CleanPoint],
    nets: &[Option<Vec<(f64, f64)>>],
    footprint: &[[(f64, f64); 4]],
    s: &PlotsSettings,
) -> Vec<f64> {
    (0..members.len())
        .into_par_iter()
        .map(|k| {
            let net_ring = nets[k].as_deref().unwrap_or_default();
            // Without a swath width (a yield-point export without one) the harvested area
            // is unknown: coverage is NaN and min_coverage does not apply.
            let widths_known = members[k]
                .iter()
                .any(|&i| points[i].base.width_m.is_finite());
            if net_ring.is_empty() {
                0.0
            } else if !widths_known {
                f64::NAN
            } else {
                let fps: Vec<&[(f64, f64)]> = members[k]
                    .iter()
                    .map(|&i| footprint[i].as_slice())
                    .collect();
                geometry::coverage(net_ring, &fps, s.coverage_cell_m)
            }
        })
        .collect()
}

/// Each plot's yield mean, median, trimmed mean and SD and its mean moisture, plots in
/// parallel.
fn statistics(
    members: &[Vec<usize>],
    points: &[CleanPoint],
    s: &PlotsSettings,
) -> Vec<([f64; 5], Option<AppliedRate>)> {
    // As-applied rates only where the exports log them.
    let logged = points.iter().any(|p| p.base.applied_rate.is_finite());
    members
        .par_iter()
        .map(|m| {
            let ys: Vec<f64> = m.iter().map(|&i| points[i].yield_std_kg_ha).collect();
            let ms: Vec<f64> = m.iter().map(|&i| points[i].moisture_shifted_pct).collect();
            let applied = logged.then(|| {
                let rs: Vec<f64> = m
                    .iter()
                    .map(|&i| points[i].base.applied_rate)
                    .filter(|r| r.is_finite())
                    .collect();
                AppliedRate {
                    points: rs.len() as u64,
                    mean: mean(&rs),
                    sd: sd(&rs),
                }
            });
            (
                [
                    mean(&ys),
                    median(&ys),
                    trimmed_mean(&ys, s.trim_fraction),
                    sd(&ys),
                    mean(&ms),
                ],
                applied,
            )
        })
        .collect()
}

/// Each net ring closed as a polygon.
fn net_polygons(nets: &[Option<Vec<(f64, f64)>>]) -> Vec<Option<Polygon<f64>>> {
    nets.iter()
        .map(|n| {
            n.as_ref().map(|r| {
                let mut ring = r.clone();
                ring.push(r[0]);
                Polygon::new(LineString::from(ring), vec![])
            })
        })
        .collect()
}

/// The warning for plots the trims leave nothing of (with the end trims capped by the plot's
/// length, only a side trim of half the plot's width or more, or a degenerate polygon),
/// naming up to ten.
fn too_small_warning(
    ordered: &[(&DesignRow, &PlotPolygon)],
    nets: &[Option<Vec<(f64, f64)>>],
    s: &PlotsSettings,
) -> Option<String> {
    let untrimmable: Vec<&str> = ordered
        .iter()
        .zip(nets)
        .filter(|(_, n)| n.is_none())
        .map(|((d, _), _)| d.plot_id.as_str())
        .collect();
    if untrimmable.is_empty() {
        return None;
    }
    let shown: Vec<&str> = untrimmable.iter().take(10).copied().collect();
    Some(format!(
        "{} plot(s) are too small for their trims, so none of their points can count: {}{}; each side loses plots.side_trim_m = {} m (set it below half the plot's width) and each end plots.end_trim_m = {} m, at most plots.end_trim_max_fraction = {} of the plot's length",
        untrimmable.len(),
        shown.join(", "),
        if untrimmable.len() > 10 { format!(" and {} more", untrimmable.len() - 10) } else { String::new() },
        s.side_trim_m,
        s.end_trim_m,
        s.end_trim_max_fraction
    ))
}

/// The join's outcome: each record's plot or rejection row, each plot's records, and the
/// records per export and field.
struct Assigned {
    /// (record, plot) for every record that joined a plot.
    assignment: Vec<(usize, usize)>,
    rejections: Vec<Rejection>,
    members: Vec<Vec<usize>>,
    export_fields: BTreeMap<String, BTreeMap<String, u64>>,
}

/// Join every record to its plot (or a rejection row) and gather each plot's records.
fn assign(
    points: &[CleanPoint],
    files: &[String],
    ordered: &[(&DesignRow, &PlotPolygon)],
    layout: &join::Layout,
    s: &PlotsSettings,
    texts: &mut Texts,
) -> Assigned {
    let joined = join::join(points, layout, s, texts);
    let mut assignment = Vec::new();
    let mut rejections = Vec::new();
    let mut members: Vec<Vec<usize>> = vec![Vec::new(); ordered.len()];
    // Points per (export, plot), gathered into exports and fields below.
    let mut per_export_plot: HashMap<(u32, usize), u64> = HashMap::new();
    let file_texts: Vec<_> = files.iter().map(|f| texts.get(f)).collect();
    for (i, j) in joined.into_iter().enumerate() {
        match j {
            join::Joined::Rejected(v) => {
                let p = &points[i].base;
                rejections.push(Rejection {
                    source_file: file_texts[p.file as usize].clone(),
                    source_row: p.row,
                    id: p.id.to_string(),
                    rule: texts.get(v.rule),
                    column: texts.get(v.column),
                    value: v.value,
                    limit: v.limit,
                });
            }
            join::Joined::Plot(k) => {
                assignment.push((i, k));
                members[k].push(i);
                *per_export_plot.entry((points[i].base.file, k)).or_default() += 1;
            }
        }
    }
    let mut export_fields: BTreeMap<String, BTreeMap<String, u64>> = BTreeMap::new();
    for ((f, k), n) in per_export_plot {
        *export_fields
            .entry(files[f as usize].clone())
            .or_default()
            .entry(ordered[k].0.field.clone())
            .or_default() += n;
    }
    Assigned {
        assignment,
        rejections,
        members,
        export_fields,
    }
}

/// Fields whose every plot was set aside, and exports none of whose clean points reached a
/// plot: both drop out of everything after this stage.
fn dropped_out(
    plots: &[PlotStats],
    points: &[CleanPoint],
    files: &[String],
    export_fields: &BTreeMap<String, BTreeMap<String, u64>>,
    summary: &StageSummary,
) -> Vec<String> {
    let mut out = Vec::new();
    let mut fields: BTreeMap<&str, (u64, BTreeMap<&str, u64>)> = BTreeMap::new();
    for p in plots {
        let e = fields.entry(p.field.as_str()).or_default();
        e.0 += 1;
        if p.status != "kept" {
            *e.1.entry(p.reason.as_str()).or_default() += 1;
        }
    }
    for (f, (n, reasons)) in fields {
        if reasons.values().sum::<u64>() == n {
            let why: Vec<String> = reasons.iter().map(|(r, k)| format!("{r}: {k}")).collect();
            out.push(format!(
                "field {f}: all {n} plots set aside ({}); the field drops out of the adjustment",
                why.join(", ")
            ));
        }
    }
    let mut clean_per_file: BTreeMap<&str, u64> = BTreeMap::new();
    for p in points {
        *clean_per_file
            .entry(files[p.base.file as usize].as_str())
            .or_default() += 1;
    }
    for (f, n) in clean_per_file {
        if !export_fields.contains_key(f) {
            let why: Vec<String> = summary
                .by_file
                .get(f)
                .map(|m| m.iter().map(|(r, k)| format!("{r}: {k}")).collect())
                .unwrap_or_default();
            out.push(format!(
                "export {f}: none of its {n} clean points is used in a plot ({}); check its coordinates against the plots",
                why.join(", ")
            ));
        }
    }
    out
}

#[cfg(test)]
mod tests;
