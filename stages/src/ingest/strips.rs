//! Plots and design of a strip trial from the treatment labels on its records (as-applied or
//! prescription labels in `columns.treatment`, or the treatment of the prescription polygon
//! each record lies in, [`label_by_polygons`]), for on-farm trials without drawn plots.
//!
//! 1. Fields: exports whose labelled records overlap (bounding boxes within 30 m) are one
//!    field, named after the first export's file name.
//! 2. Direction of travel: the length-weighted mean axis of the steps between consecutive
//!    records of one label (doubled angles, so back-and-forth passes agree). `u` runs along
//!    it, `v` across.
//! 3. Runs: consecutive records of one export with one label, cut where the combine moves
//!    more across travel than along it (a turn) or more than 5 median steps + 2 m along it
//!    (a GPS jump).
//! 4. Pieces: runs of one treatment (with `columns.strip`: of one strip name) whose middles
//!    lie within 1.25 swaths across travel and that overlap or come within 2.5 median
//!    steps along it (a record lost to a GPS jump leaves a gap of two) are one piece: the
//!    passes of a strip several passes wide join, strips of one treatment on either side
//!    of another stay apart, and an unlabelled alley of a few metres between blocks splits
//!    a strip. A piece spans its records along travel plus half a step each end, and
//!    across from its passes' centres (2nd to 98th percentile) plus half the swath (the
//!    field's median logged width) each side: the extent of its records' swath footprints.
//!    One or two records on their own are GPS jumps (counted); a piece with fewer than
//!    `ingest.strip_min_records` one-second records is a stray label (no plot, a warning).
//!    Pieces whose centres lie within half a swath across travel form one strip. Where
//!    pieces of neighbouring strips overlap across travel, the border is the middle of the
//!    overlap.
//! 5. Plots: each piece one plot, or cut into equal plots about `ingest.strip_plot_length_m`
//!    long. Ids `FIELD-Sss-Ppp` (strip across, plot along, from 1).
//! 6. Replicates (blocks): with `columns.replicate`, the most common replicate name of the
//!    piece's records; otherwise pieces are grouped into ranges along travel (overlapping by
//!    more than half the shorter), and within each range, going across, a new replicate
//!    starts where a treatment repeats. Blocks are numbered 1, 2, ... in that order.
//!
//! Common practice for on-farm strip trials (adjacent strips of a check and a product form a
//! replicate); the geometry rules are this program's own.

use crate::table::{DesignRow, PlotPolygon, Point};
use crate::util::median;
use std::collections::BTreeMap;

/// What `build` needs besides the points.
#[derive(Clone, Debug)]
pub struct StripSettings {
    /// 0 = each piece one plot.
    pub plot_length_m: f64,
    /// Pieces with fewer one-second records are stray labels.
    pub min_records: u64,
    /// The swath width when the exports log none (`columns.width.value`), metres.
    pub fallback_width_m: Option<f64>,
    /// Where the labels come from, in words with the setting (for messages).
    pub source: String,
}

/// Plots, design and what was found, for the ingest summary.
#[derive(Clone, Debug, Default)]
pub struct Built {
    pub polygons: Vec<PlotPolygon>,
    pub design: Vec<DesignRow>,
    pub details: serde_json::Value,
    pub warnings: Vec<String>,
}

/// A field's name from an export's name: its file stem (a task-data time log: the log).
fn field_name(export: &str) -> String {
    let tail = export.rsplit(['/', '#']).next().unwrap_or(export);
    let stem = match tail.rfind('.') {
        Some(i) if i > 0 => &tail[..i],
        _ => tail,
    };
    stem.to_string()
}

fn find(parent: &mut [usize], mut i: usize) -> usize {
    while parent[i] != i {
        parent[i] = parent[parent[i]];
        i = parent[i];
    }
    i
}

/// The `q` quantile (0-1) of sorted values, by the nearest rank.
fn quantile(sorted: &[f64], q: f64) -> f64 {
    sorted[((sorted.len() - 1) as f64 * q).round() as usize]
}

/// The index of `key` in a label table (first entry: no label), added at the end if new.
pub fn intern(table: &mut Vec<[String; 3]>, key: &[String; 3]) -> u32 {
    match table.iter().position(|e| e == key) {
        Some(i) => i as u32,
        None => {
            table.push(key.clone());
            table.len() as u32 - 1
        }
    }
}

/// A label table's key of a treatment alone (no strip or replicate name).
fn treatment_key(treatment: &str) -> [String; 3] {
    [treatment.to_string(), String::new(), String::new()]
}

/// Labels from prescription polygons (projected, named by their treatment): each point
/// takes the treatment of the first polygon that contains it (0: none). Returns the labels
/// and their table (entry 0: no label; then the treatments in polygon order).
pub fn label_by_polygons(points: &[Point], polys: &[PlotPolygon]) -> (Vec<u32>, Vec<[String; 3]>) {
    use geo::{BoundingRect, Contains};
    use rayon::prelude::*;
    let mut table: Vec<[String; 3]> = vec![Default::default()];
    let tag: Vec<u32> = polys
        .iter()
        .map(|p| intern(&mut table, &treatment_key(&p.plot_id)))
        .collect();
    let shapes: Vec<(geo::Polygon<f64>, geo::Rect<f64>)> = polys
        .iter()
        .filter_map(|p| {
            let g = geo::Polygon::new(
                p.exterior.clone().into(),
                p.holes.iter().map(|h| h.clone().into()).collect(),
            );
            g.bounding_rect().map(|r| (g, r))
        })
        .collect();
    let labels = points
        .par_iter()
        .map(|q| {
            let c = geo::Coord { x: q.x_m, y: q.y_m };
            shapes
                .iter()
                .zip(&tag)
                .find(|((g, r), _)| {
                    c.x >= r.min().x
                        && c.x <= r.max().x
                        && c.y >= r.min().y
                        && c.y <= r.max().y
                        && g.contains(&c)
                })
                .map_or(0, |(_, t)| *t)
        })
        .collect();
    (labels, table)
}

/// One piece of a strip before it is cut into plots.
#[derive(Clone, Debug)]
struct Piece {
    treatment: String,
    strip: usize,
    u0: f64,
    u1: f64,
    v0: f64,
    v1: f64,
    /// Point indices of its records.
    members: Vec<usize>,
    block: String,
}

/// Build the plots and design of every field from the labelled records. `labels[i]` is
/// point i's index into `table` (0: none); `names` the exports' names.
pub fn build(
    points: &[Point],
    labels: &[u32],
    table: &[[String; 3]],
    names: &[String],
    s: &StripSettings,
) -> Result<Built, String> {
    let mut warnings = Vec::new();
    // 1. Fields: exports with labelled records, joined where their extents overlap.
    let nf = names.len();
    let mut bbox = vec![(f64::MAX, f64::MAX, f64::MIN, f64::MIN); nf];
    let mut labelled = vec![0u64; nf];
    for (p, &l) in points.iter().zip(labels) {
        if l == 0 {
            continue;
        }
        let b = &mut bbox[p.file as usize];
        *b = (
            b.0.min(p.x_m),
            b.1.min(p.y_m),
            b.2.max(p.x_m),
            b.3.max(p.y_m),
        );
        labelled[p.file as usize] += 1;
    }
    for (f, name) in names.iter().enumerate() {
        if labelled[f] == 0 {
            warnings.push(format!(
                "export {name}: no record carries a treatment label ({}); it is in no plot",
                s.source
            ));
        }
    }
    let mut parent: Vec<usize> = (0..nf).collect();
    let near = 30.0;
    for a in 0..nf {
        for b in a + 1..nf {
            let (p, q) = (bbox[a], bbox[b]);
            if labelled[a] > 0
                && labelled[b] > 0
                && p.0 <= q.2 + near
                && q.0 <= p.2 + near
                && p.1 <= q.3 + near
                && q.1 <= p.3 + near
            {
                let (ra, rb) = (find(&mut parent, a), find(&mut parent, b));
                parent[ra.max(rb)] = ra.min(rb);
            }
        }
    }
    let mut fields: BTreeMap<usize, Vec<usize>> = BTreeMap::new();
    for f in (0..nf).filter(|f| labelled[*f] > 0) {
        let r = find(&mut parent, f);
        fields.entry(r).or_default().push(f);
    }
    if fields.is_empty() {
        return Err(format!(
            "no record of any export carries a treatment label ({}), so no plot can be built ({} exports read)",
            s.source,
            names.len()
        ));
    }
    let mut by_point_field = vec![usize::MAX; nf];
    let mut field_names = Vec::new();
    for (k, files) in fields.values().enumerate() {
        let mut name = field_name(&names[files[0]]);
        if field_names.contains(&name) {
            name = format!("{name}-{}", k + 1);
        }
        field_names.push(name);
        for &f in files {
            by_point_field[f] = k;
        }
    }
    let mut out = Built::default();
    let mut details = serde_json::Map::new();
    for (k, files) in fields.values().enumerate() {
        let fname = &field_names[k];
        let idx: Vec<usize> = (0..points.len())
            .filter(|&i| labels[i] != 0 && by_point_field[points[i].file as usize] == k)
            .collect();
        let f = field(points, labels, table, &idx, fname, s, &mut warnings)?;
        let mut d = f.details;
        d.insert(
            "exports".into(),
            serde_json::json!(files.iter().map(|&i| &names[i]).collect::<Vec<_>>()),
        );
        details.insert(fname.clone(), serde_json::Value::Object(d));
        out.polygons.extend(f.polygons);
        out.design.extend(f.design);
    }
    for (i, d) in out.design.iter_mut().enumerate() {
        d.row = i as u64 + 2;
    }
    out.details = serde_json::json!({
        "from": s.source,
        "plot_length_m": s.plot_length_m,
        "fields": details,
    });
    out.warnings = warnings;
    Ok(out)
}

/// The swath of a field whose exports log none: passes lie side by side one swath apart, so
/// the spacing across travel between each run of records (of at least 5) and the nearest
/// other run beside it, where the two overlap along travel, is the swath. The median over
/// runs, or None when no two runs lie side by side (closer than 0.5 m across is one lane).
fn spacing_of_passes(runs: &[Vec<usize>], uv: &dyn Fn(usize) -> (f64, f64)) -> Option<f64> {
    // Per run: its extent along travel and its median position across.
    let lanes: Vec<(f64, f64, f64)> = runs
        .iter()
        .filter(|r| r.len() >= 5)
        .map(|r| {
            let u: Vec<f64> = r.iter().map(|&i| uv(i).0).collect();
            let v: Vec<f64> = r.iter().map(|&i| uv(i).1).collect();
            (
                u.iter().cloned().fold(f64::MAX, f64::min),
                u.iter().cloned().fold(f64::MIN, f64::max),
                median(&v),
            )
        })
        .collect();
    let gaps: Vec<f64> = lanes
        .iter()
        .filter_map(|a| {
            lanes
                .iter()
                .filter(|b| a.0.max(b.0) < a.1.min(b.1))
                .map(|b| (a.2 - b.2).abs())
                .filter(|d| *d > 0.5)
                .min_by(f64::total_cmp)
        })
        .collect();
    (!gaps.is_empty()).then(|| median(&gaps))
}

struct FieldBuilt {
    polygons: Vec<PlotPolygon>,
    design: Vec<DesignRow>,
    details: serde_json::Map<String, serde_json::Value>,
}

/// One field's plots from its labelled records `idx` (in point order).
fn field(
    points: &[Point],
    labels: &[u32],
    table: &[[String; 3]],
    idx: &[usize],
    fname: &str,
    s: &StripSettings,
    warnings: &mut Vec<String>,
) -> Result<FieldBuilt, String> {
    let widths: Vec<f64> = idx
        .iter()
        .map(|&i| points[i].width_m)
        .filter(|w| w.is_finite() && *w > 0.0)
        .collect();
    // The swath as logged (or columns.width.value); without either it is estimated below
    // from the spacing of neighbouring passes, once the runs are known.
    let logged_w = if widths.is_empty() {
        s.fallback_width_m
    } else {
        Some(median(&widths))
    };
    let step_cap = 3.0 * logged_w.unwrap_or(f64::INFINITY);
    // 2. Direction of travel; consecutive records of one label.
    let (theta, dts) = travel_axis(points, labels, idx, step_cap).ok_or_else(|| {
        format!("field {fname}: its labelled records give no direction of travel (no two consecutive records of one treatment a step apart)")
    })?;
    let (ax, ay) = (theta.cos(), theta.sin());
    let (cx, cy) = (-ay, ax);
    let (ox, oy) = (points[idx[0]].x_m, points[idx[0]].y_m);
    let uv = |i: usize| {
        let (dx, dy) = (points[i].x_m - ox, points[i].y_m - oy);
        (dx * ax + dy * ay, dx * cx + dy * cy)
    };
    // One-second records per record (an export logging every 3 s counts 3).
    let weight = if dts.is_empty() {
        1.0
    } else {
        median(&dts).round().max(1.0)
    };
    // 3-4. Runs: consecutive records of one export with one label, split where the combine
    // moves more across travel than along it (a turn) or jumps along it.
    let (runs, step) = runs_of(points, labels, idx, &uv);
    let (w, w_source) = match logged_w {
        Some(w) => (w, "logged (or columns.width.value)"),
        None => (
            spacing_of_passes(&runs, &uv).ok_or_else(|| {
                format!("field {fname}: its exports log no swath width to build strips from, and its passes are not side by side to estimate one: map columns.width or give columns.width.value")
            })?,
            "estimated: the median spacing across travel of neighbouring passes (no width logged)",
        ),
    };
    // Pieces: runs joined along and across.
    let (info, comps) = joined_runs(&runs, table, labels, &uv, w, step);
    let key = |r: &Vec<usize>| {
        let t = &table[labels[r[0]] as usize];
        (t[0].as_str(), t[1].as_str())
    };
    let mut pieces: Vec<Piece> = Vec::new();
    // Pieces too short to be plots, in words.
    let mut short: Vec<String> = Vec::new();
    let mut stray = 0u64;
    let mut isolated = 0u64;
    for ks in &comps {
        let mut m: Vec<usize> = ks.iter().flat_map(|&k| runs[k].iter().copied()).collect();
        m.sort_unstable();
        let treatment = key(&runs[ks[0]]).0.to_string();
        let lo = ks.iter().map(|&k| info[k].0).fold(f64::MAX, f64::min);
        let hi = ks.iter().map(|&k| info[k].1).fold(f64::MIN, f64::max);
        let mut v: Vec<f64> = m.iter().map(|&i| uv(i).1).collect();
        v.sort_by(f64::total_cmp);
        let (v0, v1) = (quantile(&v, 0.02) - 0.5 * w, quantile(&v, 0.98) + 0.5 * w);
        let records = (m.len() as f64 * weight) as u64;
        if m.len() <= 2 {
            // A record or two on their own: GPS jumps (clean removes them as such).
            isolated += m.len() as u64;
            continue;
        }
        if records < s.min_records {
            stray += m.len() as u64;
            short.push(format!(
                "{treatment} ({} at {:.0} to {:.0} m along, {:.0} m across)",
                m.len(),
                lo,
                hi,
                0.5 * (v0 + v1)
            ));
            continue;
        }
        pieces.push(Piece {
            treatment,
            strip: 0,
            u0: lo - 0.5 * step,
            u1: hi + 0.5 * step,
            v0,
            v1,
            members: m,
            block: String::new(),
        });
    }
    if !short.is_empty() {
        let n: usize = short.len();
        warnings.push(format!(
            "field {fname}: {n} run(s) of labelled records too short for a plot (fewer than ingest.strip_min_records = {} one-second records; stray labels or GPS jumps) are in no plot: treatment (records, from the field's first labelled record) {}",
            s.min_records,
            short.join("; ")
        ));
    }
    let nstrips = pieces::number_strips(&mut pieces, w);
    // 6. Replicates.
    let replicate_named = pieces::assign_replicates(&mut pieces, table, labels);
    // 5. Plots, in strip order across and along.
    pieces.sort_by(|a, b| a.strip.cmp(&b.strip).then(a.u0.total_cmp(&b.u0)));
    let frame = pieces::Frame {
        origin: (ox, oy),
        along: (ax, ay),
        across: (cx, cy),
    };
    let (polygons, design) = pieces::plots_of(&pieces, &frame, fname, s);
    let mut details = serde_json::Map::new();
    let bearing = ax.atan2(ay).to_degrees().rem_euclid(180.0);
    for (key, value) in [
        (
            "bearing_deg",
            serde_json::json!((bearing * 10.0).round() / 10.0),
        ),
        ("swath_m", serde_json::json!((w * 1000.0).round() / 1000.0)),
        ("swath_source", serde_json::json!(w_source)),
        ("labelled_records", serde_json::json!(idx.len())),
        ("records_in_short_runs", serde_json::json!(stray)),
        ("isolated_records", serde_json::json!(isolated)),
        ("strips", serde_json::json!(nstrips)),
        ("pieces", serde_json::json!(pieces.len())),
        ("plots", serde_json::json!(polygons.len())),
        (
            "replicates",
            serde_json::json!(if replicate_named {
                "from columns.replicate"
            } else {
                "from neighbouring strips"
            }),
        ),
    ] {
        details.insert(key.into(), value);
    }
    Ok(FieldBuilt {
        polygons,
        design,
        details,
    })
}

/// Runs joined into pieces: runs of one treatment (and strip name) joined where they lie
/// within 1.25 swaths (`w`) across and overlap or come within 2.5 steps along. Returns each
/// run's extent along (min, max) and median position across, and the pieces as lists of
/// runs.
fn joined_runs(
    runs: &[Vec<usize>],
    table: &[[String; 3]],
    labels: &[u32],
    uv: &dyn Fn(usize) -> (f64, f64),
    w: f64,
    step: f64,
) -> (Vec<(f64, f64, f64)>, Vec<Vec<usize>>) {
    let info: Vec<(f64, f64, f64)> = runs
        .iter()
        .map(|r| {
            let u: Vec<f64> = r.iter().map(|&i| uv(i).0).collect();
            let mut v: Vec<f64> = r.iter().map(|&i| uv(i).1).collect();
            v.sort_by(f64::total_cmp);
            (
                u.iter().cloned().fold(f64::MAX, f64::min),
                u.iter().cloned().fold(f64::MIN, f64::max),
                v[v.len() / 2],
            )
        })
        .collect();
    let key = |r: &Vec<usize>| {
        let t = &table[labels[r[0]] as usize];
        (t[0].as_str(), t[1].as_str())
    };
    let mut parent: Vec<usize> = (0..runs.len()).collect();
    let mut by_key: BTreeMap<(&str, &str), Vec<usize>> = BTreeMap::new();
    for (k, r) in runs.iter().enumerate() {
        by_key.entry(key(r)).or_default().push(k);
    }
    for ((_, strip_name), members) in &by_key {
        for (x, &a) in members.iter().enumerate() {
            for &b in &members[x + 1..] {
                let (p, q) = (info[a], info[b]);
                let near = !strip_name.is_empty()
                    || ((p.2 - q.2).abs() <= 1.25 * w && p.0.max(q.0) - p.1.min(q.1) <= 2.5 * step);
                if near {
                    let (ra, rb) = (find(&mut parent, a), find(&mut parent, b));
                    parent[ra.max(rb)] = ra.min(rb);
                }
            }
        }
    }
    let mut comps: BTreeMap<usize, Vec<usize>> = BTreeMap::new();
    for k in 0..runs.len() {
        let r = find(&mut parent, k);
        comps.entry(r).or_default().push(k);
    }
    (info, comps.into_values().collect())
}

/// The direction of travel (radians, an axis: passes either way agree) from consecutive
/// records of one label a step apart (under `step_cap`), and the median time step between
/// consecutive records; None when no two such records exist.
fn travel_axis(
    points: &[Point],
    labels: &[u32],
    idx: &[usize],
    step_cap: f64,
) -> Option<(f64, Vec<f64>)> {
    let (mut c2, mut s2) = (0.0, 0.0);
    let mut dts = Vec::new();
    for pair in idx.windows(2) {
        let (i, j) = (pair[0], pair[1]);
        if j != i + 1 || points[i].file != points[j].file {
            continue;
        }
        let dt = points[j].time_s - points[i].time_s;
        if dt > 0.0 {
            dts.push(dt);
        }
        if labels[i] != labels[j] {
            continue;
        }
        let (dx, dy) = (points[j].x_m - points[i].x_m, points[j].y_m - points[i].y_m);
        let l = dx.hypot(dy);
        if l > 0.2 && l < step_cap {
            let a = 2.0 * dy.atan2(dx);
            c2 += l * a.cos();
            s2 += l * a.sin();
        }
    }
    if c2 == 0.0 && s2 == 0.0 {
        return None;
    }
    Some((0.5 * s2.atan2(c2), dts))
}

/// Runs: consecutive records of one export with one label, split where the combine moves
/// more across travel than along it (a turn) or jumps along it (`uv`: a record's position
/// along and across travel). Returns the runs and the median step along travel.
fn runs_of(
    points: &[Point],
    labels: &[u32],
    idx: &[usize],
    uv: &dyn Fn(usize) -> (f64, f64),
) -> (Vec<Vec<usize>>, f64) {
    let steps: Vec<f64> = idx
        .windows(2)
        .filter(|p| p[1] == p[0] + 1 && labels[p[0]] == labels[p[1]])
        .filter(|p| points[p[0]].file == points[p[1]].file)
        .map(|p| (uv(p[1]).0 - uv(p[0]).0).abs())
        .filter(|d| *d > 0.05)
        .collect();
    let step = if steps.is_empty() {
        1.0
    } else {
        median(&steps)
    };
    let jump = 5.0 * step + 2.0;
    let mut runs: Vec<Vec<usize>> = Vec::new();
    for &i in idx {
        let joins = |r: &Vec<usize>| {
            let j = *r.last().unwrap();
            if j + 1 != i || points[i].file != points[j].file || labels[i] != labels[j] {
                return false;
            }
            let ((u0, v0), (u1, v1)) = (uv(j), uv(i));
            let (du, dv) = ((u1 - u0).abs(), (v1 - v0).abs());
            du <= jump && !(dv > du && dv.hypot(du) > 0.2)
        };
        match runs.last_mut() {
            Some(r) if joins(r) => r.push(i),
            _ => runs.push(vec![i]),
        }
    }
    (runs, step)
}

mod pieces;
#[cfg(test)]
mod tests;
