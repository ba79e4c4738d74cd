//! The per-field maps of the HTML report: every record by raw yield, the records removed by
//! rule, and the plots' raw means, spatial trend and adjusted means.

use super::raster;
use super::svg::{esc, scale};
use super::svg::{quantile, ring_path, Panel, MAX_CIRCLES, OKABE_ITO, PAD_L, PAD_T, PUOR, VIRIDIS};
use super::{HtmlInput, MapPoint};
use crate::adjust::AdjustedPlot;
use crate::table::{PlotPolygon, PlotStats};
use crate::util::fmt;
use rayon::prelude::*;
use std::collections::BTreeMap;
use std::fmt::Write as _;

/// A map panel's width in pixels.
const MAP_PX: f64 = 440.0;

/// What every field's maps share.
struct Shared<'a> {
    by_id: BTreeMap<&'a str, &'a PlotPolygon>,
    adjusted: BTreeMap<&'a str, &'a AdjustedPlot>,
    /// Rules by the records they removed, most first.
    top_rules: Vec<(&'a str, usize)>,
    colour_of: BTreeMap<&'a str, &'a str>,
    /// The raw map's colour range.
    ylo: f64,
    yhi: f64,
    /// The records with a position, by x.
    by_x: Vec<usize>,
}

/// One field's records and the panel they are drawn in.
struct Records<'a> {
    field: &'a str,
    p: Panel,
    /// The records in the field's box, in record order.
    pts: Vec<&'a MapPoint>,
    /// Up to MAX_CIRCLES records are drawn one by one; more as a raster of cell means.
    raster: Option<raster::Raster>,
    /// Every plot outline of the field as one path.
    outlines: String,
}

/// One section of maps per field.
pub(super) fn fields(s: &mut String, r: &HtmlInput) {
    let mut fields: BTreeMap<&str, Vec<usize>> = BTreeMap::new();
    let by_id: BTreeMap<&str, &PlotPolygon> =
        r.polygons.iter().map(|p| (p.plot_id.as_str(), p)).collect();
    for (i, p) in r.plots.iter().enumerate() {
        fields.entry(&p.field).or_default().push(i);
    }
    let adjusted: BTreeMap<&str, &AdjustedPlot> =
        r.adjusted.iter().map(|a| (a.plot_id.as_str(), a)).collect();
    let mut rule_names: BTreeMap<&str, usize> = BTreeMap::new();
    for p in r.points.iter().filter(|p| !p.rule.is_empty()) {
        *rule_names.entry(&*p.rule).or_default() += 1;
    }
    let mut top_rules: Vec<(&str, usize)> = rule_names.into_iter().collect();
    top_rules.sort_by(|a, b| b.1.cmp(&a.1).then(a.0.cmp(b.0)));
    let colour_of: BTreeMap<&str, &str> = top_rules
        .iter()
        .take(7)
        .enumerate()
        .map(|(i, (r, _))| (*r, OKABE_ITO[i]))
        .collect();
    // The colour range of the raw map from the records kept through the plots stage (the
    // removed ones would stretch it), 2nd to 98th percentile.
    let kept: Vec<f64> = r
        .points
        .iter()
        .filter(|p| p.rule.is_empty())
        .map(|p| p.yield_unit)
        .collect();
    let ys: Vec<f64> = if kept.is_empty() {
        r.points.iter().map(|p| p.yield_unit).collect()
    } else {
        kept
    };
    let (ylo, yhi) = (quantile(&ys, 0.02), quantile(&ys, 0.98));
    let mut by_x: Vec<usize> = (0..r.points.len())
        .filter(|&i| r.points[i].x.is_finite())
        .collect();
    by_x.sort_by(|&a, &b| r.points[a].x.total_cmp(&r.points[b].x));
    let sh = Shared {
        by_id,
        adjusted,
        top_rules,
        colour_of,
        ylo,
        yhi,
        by_x,
    };
    // Fields drawn in parallel, written in field order.
    let fields: Vec<(&str, Vec<usize>)> = fields.into_iter().collect();
    let sections: Vec<String> = fields
        .par_iter()
        .map(|(field, idx)| {
            let mut t = String::new();
            field_section(&mut t, r, &sh, field, idx);
            t
        })
        .collect();
    for t in sections {
        s.push_str(&t);
    }
}

/// One field's section: its records (raw and removed) and its plots.
fn field_section(s: &mut String, r: &HtmlInput, sh: &Shared, field: &str, idx: &[usize]) {
    let (by_id, by_x) = (&sh.by_id, &sh.by_x);
    let rings: Vec<&PlotPolygon> = idx
        .iter()
        .filter_map(|&i| by_id.get(r.plots[i].plot_id.as_str()).copied())
        .collect();
    let (mut x0, mut y0, mut x1, mut y1) = (f64::MAX, f64::MAX, f64::MIN, f64::MIN);
    for p in &rings {
        for &(x, y) in &p.exterior {
            x0 = x0.min(x);
            y0 = y0.min(y);
            x1 = x1.max(x);
            y1 = y1.max(y);
        }
    }
    if x0 > x1 {
        return;
    }
    let m = 30.0;
    let (x0, y0, x1, y1) = (x0 - m, y0 - m, x1 + m, y1 + m);
    // The records in the field's box (from the points sorted by x), in record order.
    let from = by_x.partition_point(|&i| r.points[i].x < x0);
    let to = by_x.partition_point(|&i| r.points[i].x <= x1);
    let mut inside: Vec<usize> = by_x[from..to]
        .iter()
        .copied()
        .filter(|&i| r.points[i].y >= y0 && r.points[i].y <= y1)
        .collect();
    inside.sort_unstable();
    let pts: Vec<&MapPoint> = inside.iter().map(|&i| &r.points[i]).collect();
    // Up to MAX_CIRCLES records are drawn one by one; more as a raster of cell means.
    let raster = (pts.len() > MAX_CIRCLES).then(|| {
        let panel = Panel::new(x0, y0, x1, y1, MAP_PX);
        let pos: Vec<(f64, f64)> = pts
            .iter()
            .map(|q| (panel.px(q.x) - PAD_L, panel.py(q.y) - PAD_T))
            .collect();
        raster::Raster::new(panel.w, panel.h, &pos)
    });
    let _ = write!(
        s,
        "<section><h2>Field {}</h2><div class=\"maps\">",
        esc(field)
    );
    let p = Panel::new(x0, y0, x1, y1, MAP_PX);
    // Every plot outline of the field as one path (one element, not one per plot).
    let outlines: String = rings
        .iter()
        .map(|ring| ring_path(&p, &ring.exterior))
        .collect();
    let m = Records {
        field,
        p,
        pts,
        raster,
        outlines,
    };
    raw_map(s, r, sh, &m);
    removed_map(s, sh, &m);
    plot_maps(s, r, sh, &m.p, field, idx);
    let _ = write!(s, "</div><p class=\"note\">Grey dashed plots were set aside or not adjusted. Maps are in the projected CRS, metres from the map's lower-left corner.</p></section>");
}

/// The field's records by raw yield.
fn raw_map(s: &mut String, r: &HtmlInput, sh: &Shared, m: &Records) {
    let (d, u, ylo, yhi) = (r.decimals, r.unit_label, sh.ylo, sh.yhi);
    let Records {
        field,
        p,
        pts,
        raster,
        outlines,
    } = m;
    match &raster {
        None => {
            p.open(s, &format!("Field {field}: every record, raw yield ({u})"));
            for q in pts.iter() {
                let t = (q.yield_unit - ylo) / (yhi - ylo);
                let _ = write!(
                    s,
                    "<circle cx=\"{:.1}\" cy=\"{:.1}\" r=\"1.3\" fill=\"{}\"/>",
                    p.px(q.x),
                    p.py(q.y),
                    scale(&VIRIDIS, t)
                );
            }
        }
        Some(ras) => {
            p.open(
                s,
                &format!(
                    "Field {field}: every record, raw yield ({u}); {} records, each {:.0}-pixel cell their mean",
                    pts.len(),
                    raster::CELL_PX
                ),
            );
            let png = ras.png(&|idx| {
                let mean = idx.iter().map(|&i| pts[i].yield_unit).sum::<f64>() / idx.len() as f64;
                Some(raster::rgb(&scale(&VIRIDIS, (mean - ylo) / (yhi - ylo))))
            });
            raster::svg_image(s, &png, PAD_L, PAD_T, p.w, p.h);
        }
    }
    let _ = write!(s, "<path d=\"{outlines}\" class=\"outline\"/>");
    p.axes(s);
    p.colourbar(s, &VIRIDIS, ylo, yhi, u, d);
    let _ = write!(s, "</svg></figure>");
}

/// The field's records removed, coloured by rule.
fn removed_map(s: &mut String, sh: &Shared, m: &Records) {
    let (top_rules, colour_of) = (&sh.top_rules, &sh.colour_of);
    let Records {
        field,
        p,
        pts,
        raster,
        outlines,
    } = m;
    // Removed points by rule.
    p.open(s, &format!("Field {field}: records removed, by rule"));
    let _ = write!(s, "<path d=\"{outlines}\" class=\"outline\"/>");
    match &raster {
        None => {
            for q in pts.iter().filter(|q| !q.rule.is_empty()) {
                let c = colour_of.get(&*q.rule).copied().unwrap_or("#999999");
                let _ = write!(
                    s,
                    "<circle cx=\"{:.1}\" cy=\"{:.1}\" r=\"1.6\" fill=\"{c}\"/>",
                    p.px(q.x),
                    p.py(q.y)
                );
            }
        }
        Some(ras) => {
            // A cell with removed records takes the colour of its most frequent rule
            // (ties: the rule first by name).
            let png = ras.png(&|idx| {
                let mut n: BTreeMap<&str, usize> = BTreeMap::new();
                for &i in idx.iter().filter(|&&i| !pts[i].rule.is_empty()) {
                    *n.entry(&*pts[i].rule).or_default() += 1;
                }
                let top = n.iter().max_by(|a, b| a.1.cmp(b.1).then(b.0.cmp(a.0)))?;
                Some(raster::rgb(
                    colour_of.get(top.0).copied().unwrap_or("#999999"),
                ))
            });
            raster::svg_image(s, &png, PAD_L, PAD_T, p.w, p.h);
        }
    }
    p.axes(s);
    let lx = PAD_L + p.w + 12.0;
    let mut ly = PAD_T + 10.0;
    for (rule, _) in top_rules.iter().take(7) {
        let _ = write!(s, "<circle cx=\"{:.1}\" cy=\"{:.1}\" r=\"4\" fill=\"{}\"/><text x=\"{:.1}\" y=\"{:.1}\" class=\"tl\">{}</text>", lx + 4.0, ly - 3.0, colour_of[rule], lx + 12.0, ly, esc(rule));
        ly += 14.0;
    }
    if top_rules.len() > 7 {
        let _ = write!(s, "<circle cx=\"{:.1}\" cy=\"{:.1}\" r=\"4\" fill=\"#999999\"/><text x=\"{:.1}\" y=\"{:.1}\" class=\"tl\">other rules</text>", lx + 4.0, ly - 3.0, lx + 12.0, ly);
    }
    let _ = write!(s, "</svg></figure>");
}

/// The field's plots: raw means, spatial trend and adjusted means.
fn plot_maps(s: &mut String, r: &HtmlInput, sh: &Shared, p: &Panel, field: &str, idx: &[usize]) {
    let (d, u, by_id, adjusted) = (r.decimals, r.unit_label, &sh.by_id, &sh.adjusted);
    // Plot maps: raw means, spatial trend, adjusted means.
    let vals = |f: &dyn Fn(&PlotStats) -> Option<f64>| -> Vec<(usize, f64)> {
        idx.iter()
            .filter_map(|&i| f(&r.plots[i]).filter(|v| v.is_finite()).map(|v| (i, v)))
            .collect()
    };
    let raw = vals(&|pl| (pl.status == "kept").then_some(pl.yield_mean));
    let trend = vals(&|pl| adjusted.get(pl.plot_id.as_str()).map(|a| a.spatial_mean));
    let adj = vals(&|pl| adjusted.get(pl.plot_id.as_str()).map(|a| a.adjusted));
    let both: Vec<f64> = raw.iter().chain(adj.iter()).map(|v| v.1).collect();
    let (plo, phi) = (quantile(&both, 0.0), quantile(&both, 1.0));
    let tmax = trend
        .iter()
        .map(|v| v.1.abs())
        .fold(0.0, f64::max)
        .max(1e-9);
    for (title, values, anchors, lo, hi, label) in [
        (
            format!("Field {field}: plot raw means ({u})"),
            &raw,
            &VIRIDIS[..],
            plo,
            phi,
            u.to_string(),
        ),
        (
            format!("Field {field}: estimated spatial trend ({u})"),
            &trend,
            &PUOR[..],
            -tmax,
            tmax,
            format!("{u}, +/-"),
        ),
        (
            format!("Field {field}: spatially adjusted plot means ({u})"),
            &adj,
            &VIRIDIS[..],
            plo,
            phi,
            u.to_string(),
        ),
    ] {
        p.open(s, &title);
        for &(i, v) in values.iter() {
            if let Some(ring) = by_id.get(r.plots[i].plot_id.as_str()) {
                let t = (v - lo) / (hi - lo);
                let _ = write!(
                    s,
                    "<path d=\"{}\" fill=\"{}\" class=\"plot\"><title>{} {}: {}</title></path>",
                    ring_path(p, &ring.exterior),
                    scale(anchors, t),
                    esc(&r.plots[i].plot_id),
                    esc(&r.plots[i].treatment),
                    fmt(v, d)
                );
            }
        }
        for &i in idx {
            if !values.iter().any(|v| v.0 == i) {
                if let Some(ring) = by_id.get(r.plots[i].plot_id.as_str()) {
                    let _ = write!(
                        s,
                        "<path d=\"{}\" class=\"missing\"><title>{}: set aside</title></path>",
                        ring_path(p, &ring.exterior),
                        esc(&r.plots[i].plot_id)
                    );
                }
            }
        }
        p.axes(s);
        p.colourbar(s, anchors, lo, hi, &label, d);
        let _ = write!(s, "</svg></figure>");
    }
}
