//! A strip trial's pieces after they are found: numbered into strips across travel, given
//! their replicates, and cut into plots.

use super::{Piece, StripSettings};
use crate::table::{DesignRow, PlotPolygon};
use std::collections::BTreeMap;

/// Strips across travel: pieces whose centres lie within half a swath `w` of the first of
/// the strip, numbered from 1 across; neighbouring pieces that overlap across travel meet
/// in the middle of the overlap. Returns the number of strips.
pub(super) fn number_strips(pieces: &mut [Piece], w: f64) -> usize {
    pieces.sort_by(|a, b| {
        (a.v0 + a.v1)
            .total_cmp(&(b.v0 + b.v1))
            .then(a.u0.total_cmp(&b.u0))
    });
    let mut nstrips = 0;
    let mut first = f64::NEG_INFINITY;
    for p in pieces.iter_mut() {
        let c = 0.5 * (p.v0 + p.v1);
        if c - first > 0.5 * w {
            nstrips += 1;
            first = c;
        }
        p.strip = nstrips;
    }
    // Neighbouring pieces that overlap across travel meet in the middle of the overlap.
    for a in 0..pieces.len() {
        for b in a + 1..pieces.len() {
            let (p, q) = (&pieces[a], &pieces[b]);
            let along = p.u1.min(q.u1) - p.u0.max(q.u0);
            let across = p.v1.min(q.v1) - p.v0.max(q.v0);
            if along <= 0.0 || across <= 0.0 || p.strip == q.strip {
                continue;
            }
            let mid = 0.5 * (p.v0.max(q.v0) + p.v1.min(q.v1));
            let (lo, hi) = if p.v0 + p.v1 <= q.v0 + q.v1 {
                (a, b)
            } else {
                (b, a)
            };
            pieces[lo].v1 = pieces[lo].v1.min(mid);
            pieces[hi].v0 = pieces[hi].v0.max(mid);
        }
    }
    nstrips
}

/// Each piece's replicate (block): the one its records name most (columns.replicate), else
/// counted along travel, a new one wherever a treatment repeats across the strips of a
/// range. Returns whether the records name them.
pub(super) fn assign_replicates(
    pieces: &mut [Piece],
    table: &[[String; 3]],
    labels: &[u32],
) -> bool {
    let replicate_named = pieces.iter().any(|p| {
        p.members
            .iter()
            .any(|&i| !table[labels[i] as usize][2].is_empty())
    });
    if replicate_named {
        for p in pieces.iter_mut() {
            let mut n: BTreeMap<&str, u64> = BTreeMap::new();
            for &i in &p.members {
                *n.entry(table[labels[i] as usize][2].as_str()).or_default() += 1;
            }
            let best = n
                .iter()
                .max_by_key(|(_, c)| **c)
                .map(|(r, _)| r.to_string());
            p.block = best.unwrap_or_default();
        }
    } else {
        let mut order: Vec<usize> = (0..pieces.len()).collect();
        order.sort_by(|&a, &b| pieces[a].u0.total_cmp(&pieces[b].u0));
        let mut ranges: Vec<(f64, f64, Vec<usize>)> = Vec::new();
        for &j in &order {
            let p = &pieces[j];
            let fits = ranges.iter().position(|r| {
                let shorter = (r.1 - r.0).min(p.u1 - p.u0);
                p.u1.min(r.1) - p.u0.max(r.0) > 0.5 * shorter
            });
            match fits {
                Some(r) => ranges[r].2.push(j),
                None => ranges.push((p.u0, p.u1, vec![j])),
            }
        }
        let mut n = 0;
        for (_, _, mut members) in ranges {
            members.sort_by(|&a, &b| {
                (pieces[a].v0 + pieces[a].v1).total_cmp(&(pieces[b].v0 + pieces[b].v1))
            });
            let mut seen: Vec<String> = Vec::new();
            n += 1;
            for j in members {
                if seen.contains(&pieces[j].treatment) {
                    seen.clear();
                    n += 1;
                }
                seen.push(pieces[j].treatment.clone());
                pieces[j].block = n.to_string();
            }
        }
    }
    replicate_named
}

/// The field's frame: origin and the unit vectors along and across travel.
pub(super) struct Frame {
    pub origin: (f64, f64),
    pub along: (f64, f64),
    pub across: (f64, f64),
}

/// The plots of the pieces (in strip order across and along), each piece cut into plots
/// about `plot_length_m` long, with their design rows.
pub(super) fn plots_of(
    pieces: &[Piece],
    frame: &Frame,
    fname: &str,
    s: &StripSettings,
) -> (Vec<PlotPolygon>, Vec<DesignRow>) {
    let ((ox, oy), (ax, ay), (cx, cy)) = (frame.origin, frame.along, frame.across);
    let at = |u: f64, v: f64| (ox + u * ax + v * cx, oy + u * ay + v * cy);
    let mut polygons = Vec::new();
    let mut design = Vec::new();
    let mut along_no: BTreeMap<usize, usize> = BTreeMap::new();
    for p in pieces {
        let len = p.u1 - p.u0;
        let n = if s.plot_length_m > 0.0 && len >= 1.5 * s.plot_length_m {
            (len / s.plot_length_m).round() as usize
        } else {
            1
        };
        for c in 0..n {
            let (a0, a1) = (
                p.u0 + len * c as f64 / n as f64,
                p.u0 + len * (c + 1) as f64 / n as f64,
            );
            let no = along_no.entry(p.strip).or_default();
            *no += 1;
            let id = format!("{fname}-S{:02}-P{:02}", p.strip, no);
            let mut ring: Vec<(f64, f64)> = [(a0, p.v0), (a1, p.v0), (a1, p.v1), (a0, p.v1)]
                .iter()
                .map(|&(u, v)| at(u, v))
                .collect();
            let area2: f64 = (0..4)
                .map(|k| {
                    let (a, b) = (ring[k], ring[(k + 1) % 4]);
                    a.0 * b.1 - b.0 * a.1
                })
                .sum();
            if area2 < 0.0 {
                ring.reverse();
            }
            ring.push(ring[0]);
            polygons.push(PlotPolygon {
                plot_id: id.clone(),
                exterior: ring,
                holes: Vec::new(),
            });
            design.push(DesignRow {
                plot_id: id,
                treatment: p.treatment.clone(),
                block: p.block.clone(),
                field: fname.to_string(),
                row: 0,
            });
        }
    }
    (polygons, design)
}
