//! Plane geometry for plot trimming and swath footprints, in projected metres.
//!
//! - [`clip_area`]: area of a simple polygon inside a convex polygon, by Sutherland-Hodgman
//!   clipping (Sutherland & Hodgman 1974, CACM 17:32) and the shoelace formula; exact for any
//!   simple subject polygon clipped by a convex one.
//! - [`Frame`]: a plot's own axes (along = direction of the longer side of its minimum
//!   rotated rectangle), with [`net_polygon`] shrinking the plot by an end trim along and a
//!   side trim across.
//! - [`coverage`]: the fraction of a polygon covered by the union of footprints, on a raster of
//!   `cell` metres (cell centres tested), so it is exact to about one cell along the edges.

use geo::{Contains, LineString, MinimumRotatedRect, Polygon};

pub use crate::table::signed_area;

/// Area of `subject` (a simple ring, any orientation, closing point optional) inside the
/// convex ring `clip`.
pub fn clip_area(subject: &[(f64, f64)], clip: &[(f64, f64)]) -> f64 {
    signed_area(&clip_ring(subject, clip)).abs()
}

/// A plot's own axes: origin, unit vector along (travel) and across.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Frame {
    pub ox: f64,
    pub oy: f64,
    pub ax: f64,
    pub ay: f64,
}

impl Frame {
    /// Along and across coordinates of a point.
    pub fn local(&self, x: f64, y: f64) -> (f64, f64) {
        let (dx, dy) = (x - self.ox, y - self.oy);
        (dx * self.ax + dy * self.ay, -dx * self.ay + dy * self.ax)
    }
    /// World coordinates of (along, across).
    pub fn world(&self, u: f64, v: f64) -> (f64, f64) {
        (
            self.ox + u * self.ax - v * self.ay,
            self.oy + u * self.ay + v * self.ax,
        )
    }
}

/// The frame of a polygon from its minimum rotated rectangle: origin at the rectangle's
/// centre, along its longer side (pointing into the half-plane of increasing x, or of
/// increasing y when the side runs north-south, so the result does not depend on vertex
/// order), and the rectangle's length and width.
pub fn frame_of(poly: &Polygon<f64>) -> Option<(Frame, f64, f64)> {
    frame_along(poly, None)
}

/// [`frame_of`], but along the rectangle's side closer in direction to `travel` (a unit
/// vector; either sense) where it is given: a plot wider than it is long (a short research
/// plot cut across its longer side) is trimmed at the ends the machine entered and left.
pub fn frame_along(poly: &Polygon<f64>, travel: Option<(f64, f64)>) -> Option<(Frame, f64, f64)> {
    let r = poly.minimum_rotated_rect()?;
    let c: Vec<(f64, f64)> = r.exterior().points().map(|p| (p.x(), p.y())).collect();
    if c.len() < 4 {
        return None;
    }
    let e1 = (c[1].0 - c[0].0, c[1].1 - c[0].1);
    let e2 = (c[2].0 - c[1].0, c[2].1 - c[1].1);
    let (l1, l2) = (e1.0.hypot(e1.1), e2.0.hypot(e2.1));
    let first = match travel {
        Some((tx, ty)) if l1 > 0.0 && l2 > 0.0 => {
            (e1.0 * tx + e1.1 * ty).abs() / l1 >= (e2.0 * tx + e2.1 * ty).abs() / l2
        }
        _ => l1 >= l2,
    };
    let (long, len, wid) = if first { (e1, l1, l2) } else { (e2, l2, l1) };
    let (mut ax, mut ay) = (long.0 / len, long.1 / len);
    if ax < -1e-9 || (ax.abs() <= 1e-9 && ay < 0.0) {
        ax = -ax;
        ay = -ay;
    }
    let ox = (c[0].0 + c[2].0) / 2.0;
    let oy = (c[0].1 + c[2].1) / 2.0;
    Some((Frame { ox, oy, ax, ay }, len, wid))
}

/// The net plot: the plot's rectangle shrunk by `end_trim` at each end (along the direction
/// of `travel` where given, else along the rectangle's longer side), but by no more than
/// `end_trim_max_fraction` of the plot's length, and `side_trim` at each side (across),
/// clipped to the plot polygon itself. `None` when the trims leave nothing.
pub fn net_polygon(
    poly: &Polygon<f64>,
    travel: Option<(f64, f64)>,
    end_trim: f64,
    end_trim_max_fraction: f64,
    side_trim: f64,
) -> Option<Vec<(f64, f64)>> {
    let (f, len, wid) = frame_along(poly, travel)?;
    let end_trim = end_trim.min(end_trim_max_fraction * len);
    let (hu, hv) = (0.5 * len - end_trim, 0.5 * wid - side_trim);
    if hu <= 0.0 || hv <= 0.0 {
        return None;
    }
    let rect: Vec<(f64, f64)> = [(-hu, -hv), (hu, -hv), (hu, hv), (-hu, hv)]
        .iter()
        .map(|&(u, v)| f.world(u, v))
        .collect();
    let ring: Vec<(f64, f64)> = poly.exterior().points().map(|p| (p.x(), p.y())).collect();
    // A plot that is (nearly) its own rectangle: the shrunk rectangle is the net plot.
    if (signed_area(&ring).abs() - len * wid).abs() <= 1e-6 * len * wid
        && poly.interiors().is_empty()
    {
        return Some(rect);
    }
    // Otherwise keep the rectangle only where it lies in the plot: clip the plot by it.
    let clipped = clip_ring(&ring, &rect);
    (clipped.len() >= 3).then_some(clipped)
}

/// Sutherland-Hodgman clip of a ring by a convex ring (returns the clipped ring, open).
pub fn clip_ring(subject: &[(f64, f64)], clip: &[(f64, f64)]) -> Vec<(f64, f64)> {
    // Work relative to the clip's first vertex (see `signed_area`).
    let Some(&o) = clip.first() else {
        return Vec::new();
    };
    let shift = |r: &[(f64, f64)]| -> Vec<(f64, f64)> {
        r.iter().map(|p| (p.0 - o.0, p.1 - o.1)).collect()
    };
    let (subject, clip) = (shift(subject), shift(clip));
    clip_local(&subject, &clip)
        .into_iter()
        .map(|p| (p.0 + o.0, p.1 + o.1))
        .collect()
}

fn clip_local(subject: &[(f64, f64)], clip: &[(f64, f64)]) -> Vec<(f64, f64)> {
    let mut c = clip.to_vec();
    if c.len() > 1 && c.first() == c.last() {
        c.pop();
    }
    if signed_area(&c) < 0.0 {
        c.reverse();
    }
    let mut out = subject.to_vec();
    if out.len() > 1 && out.first() == out.last() {
        out.pop();
    }
    for i in 0..c.len() {
        if out.is_empty() {
            break;
        }
        let (a, b) = (c[i], c[(i + 1) % c.len()]);
        let inside = |p: (f64, f64)| (b.0 - a.0) * (p.1 - a.1) - (b.1 - a.1) * (p.0 - a.0) >= 0.0;
        let cross = |p: (f64, f64), q: (f64, f64)| {
            let (dx, dy) = (q.0 - p.0, q.1 - p.1);
            let (ex, ey) = (b.0 - a.0, b.1 - a.1);
            let t = ((a.0 - p.0) * ey - (a.1 - p.1) * ex) / (dx * ey - dy * ex);
            (p.0 + t * dx, p.1 + t * dy)
        };
        let input = std::mem::take(&mut out);
        for j in 0..input.len() {
            let (p, q) = (input[j], input[(j + 1) % input.len()]);
            match (inside(p), inside(q)) {
                (true, true) => out.push(q),
                (true, false) => out.push(cross(p, q)),
                (false, true) => {
                    out.push(cross(p, q));
                    out.push(q);
                }
                (false, false) => {}
            }
        }
    }
    out
}

/// An oriented rectangle (a swath footprint): centre, unit heading, length along, width.
pub fn oriented_rect(x: f64, y: f64, ux: f64, uy: f64, length: f64, width: f64) -> [(f64, f64); 4] {
    let (hl, hw) = (0.5 * length, 0.5 * width);
    [(-hl, -hw), (hl, -hw), (hl, hw), (-hl, hw)]
        .map(|(a, c)| (x + a * ux - c * uy, y + a * uy + c * ux))
}

/// Fraction of `area_of` covered by the union of convex `footprints`, on a raster of `cell`
/// metres over the polygon's bounding box (cell centres inside the polygon are counted).
///
/// Row by row: a row's cells inside the polygon lie between its edge crossings (even-odd),
/// and a convex footprint covers the cells between two bounds, one from each side of its
/// edges. A cell centre within [`EXACT_BAND_M`] of a crossing or bound, in a row through a
/// vertex, or against a nearly horizontal edge is decided by the exact point-in-polygon and
/// half-plane tests instead, so the result is the same as testing every cell exactly
/// (checked against that in the tests).
pub fn coverage(polygon: &[(f64, f64)], footprints: &[&[(f64, f64)]], cell: f64) -> f64 {
    let mut ring = polygon.to_vec();
    if ring.first() != ring.last() {
        ring.push(ring[0]);
    }
    let (mut x0, mut y0, mut x1, mut y1) = (f64::MAX, f64::MAX, f64::MIN, f64::MIN);
    for &(x, y) in &ring {
        x0 = x0.min(x);
        y0 = y0.min(y);
        x1 = x1.max(x);
        y1 = y1.max(y);
    }
    let r = Raster {
        x0,
        y0,
        cell,
        nx: ((x1 - x0) / cell).ceil().max(1.0) as usize,
        ny: ((y1 - y0) / cell).ceil().max(1.0) as usize,
    };
    let inside = r.inside(&ring);
    let mut covered = vec![false; r.nx * r.ny];
    let mut c: Vec<(f64, f64)> = Vec::new();
    for fp in footprints {
        c.clear();
        c.extend_from_slice(fp);
        if signed_area(&c) < 0.0 {
            c.reverse();
        }
        r.cover(&c, &inside, &mut covered);
    }
    let n_in = inside.iter().filter(|&&b| b).count();
    if n_in == 0 {
        return 0.0;
    }
    covered.iter().filter(|&&b| b).count() as f64 / n_in as f64
}

/// The coverage raster: `nx` x `ny` cells of `cell` metres from (`x0`, `y0`), by rows.
struct Raster {
    x0: f64,
    y0: f64,
    cell: f64,
    nx: usize,
    ny: usize,
}

impl Raster {
    fn cx(&self, i: usize) -> f64 {
        self.x0 + (i as f64 + 0.5) * self.cell
    }

    fn cy(&self, j: usize) -> f64 {
        self.y0 + (j as f64 + 0.5) * self.cell
    }

    /// The cells whose centres lie inside the closed ring.
    fn inside(&self, ring: &[(f64, f64)]) -> Vec<bool> {
        let (nx, band) = (self.nx, EXACT_BAND_M);
        let poly = Polygon::new(LineString::from(ring.to_vec()), vec![]);
        let mut inside = vec![false; nx * self.ny];
        let mut xs: Vec<f64> = Vec::new();
        for j in 0..self.ny {
            let y = self.cy(j);
            // A row through (or next to) a vertex, or crossing a nearly horizontal edge: exact.
            let mut exact = false;
            xs.clear();
            for e in ring.windows(2) {
                let (a, b) = (e[0], e[1]);
                if (a.1 - y).abs() < band || (b.1 - y).abs() < band {
                    exact = true;
                }
                if (a.1 > y) != (b.1 > y) {
                    if (b.1 - a.1).abs() < FLAT_M {
                        exact = true;
                    }
                    xs.push(a.0 + (y - a.1) * (b.0 - a.0) / (b.1 - a.1));
                }
            }
            let row = &mut inside[j * nx..(j + 1) * nx];
            if exact {
                for (i, v) in row.iter_mut().enumerate() {
                    *v = poly.contains(&geo::Point::new(self.cx(i), y));
                }
                continue;
            }
            // Between each pair of sorted crossings (even-odd); centres next to one, exactly.
            xs.sort_by(f64::total_cmp);
            for pair in xs.chunks_exact(2) {
                let (a, b) = (pair[0], pair[1]);
                let mut one = |i: usize| {
                    let x = self.cx(i);
                    row[i] = if (x - a).abs() < band || (x - b).abs() < band {
                        poly.contains(&geo::Point::new(x, y))
                    } else {
                        x > a && x < b
                    };
                };
                // Cells whose centres lie at least the band inside both crossings are inside
                // (one run, the centres growing with i); the others are decided one by one.
                let cells = cells_between(a - band, b + band, self.x0, self.cell, 0, nx);
                let (mut lo, mut hi) = (cells.start, cells.end);
                while lo < hi && self.cx(lo) - a < band {
                    one(lo);
                    lo += 1;
                }
                while hi > lo && b - self.cx(hi - 1) < band {
                    one(hi - 1);
                    hi -= 1;
                }
                if lo < hi {
                    row[lo..hi].fill(true);
                }
            }
        }
        inside
    }

    /// Mark the cells inside the plot that the convex footprint `c` (counterclockwise)
    /// covers.
    fn cover(&self, c: &[(f64, f64)], inside: &[bool], covered: &mut [bool]) {
        let (nx, band) = (self.nx, EXACT_BAND_M);
        let (mut fx0, mut fy0, mut fx1, mut fy1) = (f64::MAX, f64::MAX, f64::MIN, f64::MIN);
        for &(x, y) in c {
            fx0 = fx0.min(x);
            fy0 = fy0.min(y);
            fx1 = fx1.max(x);
            fy1 = fy1.max(y);
        }
        let i0 = (((fx0 - self.x0) / self.cell).floor().max(0.0)) as usize;
        let j0 = (((fy0 - self.y0) / self.cell).floor().max(0.0)) as usize;
        let i1 = (((fx1 - self.x0) / self.cell).ceil().max(0.0) as usize).min(nx);
        let j1 = (((fy1 - self.y0) / self.cell).ceil().max(0.0) as usize).min(self.ny);
        let n = c.len();
        // The exact test of a cell centre against every edge (counterclockwise: inside is
        // to the left of each).
        let hit = |x: f64, y: f64| {
            (0..n).all(|e| {
                let (a, b) = (c[e], c[(e + 1) % n]);
                (b.0 - a.0) * (y - a.1) - (b.1 - a.1) * (x - a.0) >= 0.0
            })
        };
        for j in j0..j1 {
            let y = self.cy(j);
            // Bounds on x from the edges that are not nearly horizontal; those that are
            // decide every cell exactly.
            let (mut lo, mut hi) = (f64::NEG_INFINITY, f64::INFINITY);
            let mut flat = false;
            for e in 0..n {
                let (a, b) = (c[e], c[(e + 1) % n]);
                let dy = b.1 - a.1;
                if dy.abs() < FLAT_M {
                    flat = true;
                    continue;
                }
                // Left of a -> b: x below the crossing when going up, above it going down.
                let xc = a.0 + (b.0 - a.0) * (y - a.1) / dy;
                if dy > 0.0 {
                    hi = hi.min(xc);
                } else {
                    lo = lo.max(xc);
                }
            }
            let cells = cells_between(lo - band, hi + band, self.x0, self.cell, i0, i1);
            // A cell not certainly inside the footprint: tested exactly.
            let mut edge = |i: usize| {
                let k = j * nx + i;
                let x = self.cx(i);
                if !covered[k] && inside[k] && x >= lo - band && x <= hi + band {
                    covered[k] = hit(x, y);
                }
            };
            if flat {
                cells.for_each(&mut edge);
                continue;
            }
            // The centres strictly within the bounds less the band are certainly inside and
            // make one run of cells (the centres grow with i): the cells before and after
            // it are tested one by one, the run is covered wherever the plot is.
            let (mut a, mut b) = (cells.start, cells.end);
            while a < b && self.cx(a) <= lo + band {
                edge(a);
                a += 1;
            }
            while b > a && self.cx(b - 1) >= hi - band {
                edge(b - 1);
                b -= 1;
            }
            if a >= b {
                continue;
            }
            let (s, e) = (j * nx + a, j * nx + b);
            for (c, &ins) in covered[s..e].iter_mut().zip(&inside[s..e]) {
                *c |= ins;
            }
        }
    }
}

/// The cells of a row, within `i0..i1`, whose centres (`x0 + (i + 0.5) cell`) may lie in
/// `a..=b` (one cell of margin each side; the caller tests the centres).
fn cells_between(
    a: f64,
    b: f64,
    x0: f64,
    cell: f64,
    i0: usize,
    i1: usize,
) -> std::ops::Range<usize> {
    let first = if a.is_finite() {
        ((a - x0) / cell - 1.5).floor().max(0.0) as usize
    } else {
        0
    };
    let last = if b.is_finite() {
        ((b - x0) / cell + 0.5).ceil().max(0.0) as usize
    } else {
        usize::MAX
    };
    first.max(i0)..last.min(i1).max(first.max(i0))
}

/// Cell centres nearer than this (metres) to a polygon crossing or footprint bound found by
/// the row formulas are tested exactly: far above the formulas' rounding (about 1e-9 m at
/// UTM coordinates for edges steeper than [`FLAT_M`]), far below a raster cell.
const EXACT_BAND_M: f64 = 1e-6;
/// Edges rising less than this (metres) over their length are tested exactly per cell (the
/// row formulas divide by the rise).
const FLAT_M: f64 = 0.1;

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn clip_area_by_hand() {
        // Unit square half inside a square from (0.5, -1) to (2, 2): overlap 0.5.
        let a = [(0.0, 0.0), (1.0, 0.0), (1.0, 1.0), (0.0, 1.0)];
        let b = [(0.5, -1.0), (2.0, -1.0), (2.0, 2.0), (0.5, 2.0)];
        assert!((clip_area(&a, &b) - 0.5).abs() < 1e-12);
        // Disjoint.
        let c = [(5.0, 5.0), (6.0, 5.0), (6.0, 6.0)];
        assert_eq!(clip_area(&a, &c), 0.0);
    }

    #[test]
    fn net_plot_of_a_rotated_rectangle() {
        // 60 x 18 m rectangle along bearing 30 degrees; trims 15 m and 1 m leave 30 x 16 m.
        let f = Frame {
            ox: 1000.0,
            oy: 2000.0,
            ax: 30f64.to_radians().sin(),
            ay: 30f64.to_radians().cos(),
        };
        let ring: Vec<(f64, f64)> = [
            (-30.0, -9.0),
            (30.0, -9.0),
            (30.0, 9.0),
            (-30.0, 9.0),
            (-30.0, -9.0),
        ]
        .iter()
        .map(|&(u, v)| f.world(u, v))
        .collect();
        let poly = Polygon::new(LineString::from(ring), vec![]);
        let net = net_polygon(&poly, None, 15.0, 0.5, 1.0).unwrap();
        assert!((signed_area(&net).abs() - 30.0 * 16.0).abs() < 1e-6);
        let (g, len, wid) = frame_of(&poly).unwrap();
        assert!((len - 60.0).abs() < 1e-9 && (wid - 18.0).abs() < 1e-9);
        assert!((g.ax - f.ax).abs() < 1e-9 && (g.ay - f.ay).abs() < 1e-9);
        assert!(net_polygon(&poly, None, 31.0, 0.5, 1.0).is_none());
        // Capped at a quarter of the length, a 31 m trim leaves the middle half: 30 x 16 m.
        let net = net_polygon(&poly, None, 31.0, 0.25, 1.0).unwrap();
        assert!((signed_area(&net).abs() - 30.0 * 16.0).abs() < 1e-6);
        // A 10 m research plot keeps its middle 5 m with trims of 15 m capped at a quarter
        // of its length (4 m with the default 0.3), where before it kept nothing.
        let short: Vec<(f64, f64)> = [
            (-5.0, -0.75),
            (5.0, -0.75),
            (5.0, 0.75),
            (-5.0, 0.75),
            (-5.0, -0.75),
        ]
        .iter()
        .map(|&(v, u)| f.world(u, v))
        .collect();
        let short = Polygon::new(LineString::from(short), vec![]);
        assert!(net_polygon(&short, None, 15.0, 0.5, 0.25).is_none());
        let net = net_polygon(&short, None, 15.0, 0.25, 0.25).unwrap();
        assert!((signed_area(&net).abs() - 5.0 * 1.0).abs() < 1e-6);
    }

    #[test]
    fn a_plot_wider_than_long_is_trimmed_along_the_direction_of_travel() {
        // A research plot 8 m along travel (x) and 18 m across, cut along x.
        let ring = vec![(0.0, 0.0), (8.0, 0.0), (8.0, 18.0), (0.0, 18.0), (0.0, 0.0)];
        let poly = Polygon::new(LineString::from(ring), vec![]);
        // By its longer side, the "ends" would be across travel: 18 - 2 x 5.4 by 8 - 2 x 0.5.
        let by_side = net_polygon(&poly, None, 15.0, 0.3, 0.5).unwrap();
        assert!((signed_area(&by_side).abs() - 7.2 * 7.0).abs() < 1e-6);
        // Along travel (either sense): 8 - 2 x 2.4 = 3.2 m by 18 - 2 x 0.5 = 17 m, x in 2.4-5.6.
        for t in [(1.0, 0.0), (-1.0, 0.0), (0.96, 0.28)] {
            let net = net_polygon(&poly, Some(t), 15.0, 0.3, 0.5).unwrap();
            assert!((signed_area(&net).abs() - 3.2 * 17.0).abs() < 1e-6, "{t:?}");
            assert!(net.iter().all(|p| (2.4 - 1e-9..=5.6 + 1e-9).contains(&p.0)));
        }
        // Travel along the longer side gives the same net plot as no travel at all.
        let along_y = net_polygon(&poly, Some((0.0, 1.0)), 15.0, 0.3, 0.5).unwrap();
        assert_eq!(along_y, by_side);
    }

    #[test]
    fn coverage_of_half_a_square() {
        let sq = [(0.0, 0.0), (10.0, 0.0), (10.0, 10.0), (0.0, 10.0)];
        let half = [(-1.0, -1.0), (5.0, -1.0), (5.0, 11.0), (-1.0, 11.0)];
        assert!((coverage(&sq, &[&half[..]], 0.25) - 0.5).abs() < 1e-9);
    }

    /// The coverage raster as first written: every cell centre tested exactly (the reference
    /// [`coverage`] must equal).
    fn coverage_every_cell(polygon: &[(f64, f64)], footprints: &[&[(f64, f64)]], cell: f64) -> f64 {
        let mut ring = polygon.to_vec();
        if ring.first() != ring.last() {
            ring.push(ring[0]);
        }
        let poly = Polygon::new(LineString::from(ring.clone()), vec![]);
        let (mut x0, mut y0, mut x1, mut y1) = (f64::MAX, f64::MAX, f64::MIN, f64::MIN);
        for &(x, y) in &ring {
            x0 = x0.min(x);
            y0 = y0.min(y);
            x1 = x1.max(x);
            y1 = y1.max(y);
        }
        let nx = ((x1 - x0) / cell).ceil().max(1.0) as usize;
        let ny = ((y1 - y0) / cell).ceil().max(1.0) as usize;
        let mut inside = vec![false; nx * ny];
        let mut covered = vec![false; nx * ny];
        let centre =
            |i: usize, j: usize| (x0 + (i as f64 + 0.5) * cell, y0 + (j as f64 + 0.5) * cell);
        for j in 0..ny {
            for i in 0..nx {
                let (x, y) = centre(i, j);
                inside[j * nx + i] = poly.contains(&geo::Point::new(x, y));
            }
        }
        for fp in footprints {
            let (mut fx0, mut fy0, mut fx1, mut fy1) = (f64::MAX, f64::MAX, f64::MIN, f64::MIN);
            for &(x, y) in fp.iter() {
                fx0 = fx0.min(x);
                fy0 = fy0.min(y);
                fx1 = fx1.max(x);
                fy1 = fy1.max(y);
            }
            let i0 = (((fx0 - x0) / cell).floor().max(0.0)) as usize;
            let j0 = (((fy0 - y0) / cell).floor().max(0.0)) as usize;
            let i1 = (((fx1 - x0) / cell).ceil().max(0.0) as usize).min(nx);
            let j1 = (((fy1 - y0) / cell).ceil().max(0.0) as usize).min(ny);
            let mut c = fp.to_vec();
            if signed_area(&c) < 0.0 {
                c.reverse();
            }
            for j in j0..j1 {
                for i in i0..i1 {
                    let k = j * nx + i;
                    if covered[k] || !inside[k] {
                        continue;
                    }
                    let (x, y) = centre(i, j);
                    let hit = (0..c.len()).all(|e| {
                        let (a, b) = (c[e], c[(e + 1) % c.len()]);
                        (b.0 - a.0) * (y - a.1) - (b.1 - a.1) * (x - a.0) >= 0.0
                    });
                    covered[k] = hit;
                }
            }
        }
        let n_in = inside.iter().filter(|&&b| b).count();
        if n_in == 0 {
            return 0.0;
        }
        covered.iter().filter(|&&b| b).count() as f64 / n_in as f64
    }

    /// The row-by-row raster equals testing every cell exactly, bit for bit, on plots and
    /// footprints at UTM-sized coordinates in every direction (axis-aligned ones too, whose
    /// edges fall near cell rows), with footprints across the plot edges.
    #[test]
    fn coverage_by_rows_equals_every_cell_tested() {
        let mut r = crate::util::Rng::new(11);
        let mut partial = 0;
        for case in 0..400 {
            let (ox, oy) = (
                400_000.0 + r.range(0.0, 1e5),
                4_000_000.0 + r.range(0.0, 1e5),
            );
            let bearing: f64 = match case % 4 {
                0 => 0.0,
                1 => 90.0,
                _ => r.range(0.0, 360.0),
            };
            let (ux, uy) = (bearing.to_radians().sin(), bearing.to_radians().cos());
            let rect = |cx: f64, cy: f64, l: f64, w: f64, ux: f64, uy: f64| {
                let (hl, hw) = (0.5 * l, 0.5 * w);
                vec![
                    (cx - ux * hl + uy * hw, cy - uy * hl - ux * hw),
                    (cx + ux * hl + uy * hw, cy + uy * hl - ux * hw),
                    (cx + ux * hl - uy * hw, cy + uy * hl + ux * hw),
                    (cx - ux * hl - uy * hw, cy - uy * hl + ux * hw),
                ]
            };
            let (len, wid) = (r.range(10.0, 40.0), r.range(5.0, 20.0));
            let plot = rect(ox, oy, len, wid, ux, uy);
            let fps: Vec<Vec<(f64, f64)>> = (0..r.below(30) + 1)
                .map(|_| {
                    let a = r.range(-0.7, 0.7) * len;
                    let b = r.range(-0.7, 0.7) * wid;
                    let turn = if r.uniform() < 0.3 {
                        0.0
                    } else {
                        r.range(-0.3, 0.3)
                    };
                    let (vx, vy) = (
                        ux * turn.cos() - uy * turn.sin(),
                        ux * turn.sin() + uy * turn.cos(),
                    );
                    let mut f = rect(
                        ox + a * ux + b * uy,
                        oy + a * uy - b * ux,
                        r.range(0.5, 6.0),
                        r.range(2.0, 12.0),
                        vx,
                        vy,
                    );
                    if r.uniform() < 0.5 {
                        f.reverse();
                    }
                    f
                })
                .collect();
            let refs: Vec<&[(f64, f64)]> = fps.iter().map(|f| f.as_slice()).collect();
            let cell = if case % 3 == 0 { 0.5 } else { 0.25 };
            let fast = coverage(&plot, &refs, cell);
            let every = coverage_every_cell(&plot, &refs, cell);
            assert_eq!(
                fast.to_bits(),
                every.to_bits(),
                "case {case}: {fast} vs {every}"
            );
            if fast > 0.0 && fast < 1.0 {
                partial += 1;
            }
        }
        // Most cases cover part of the plot (not a test that passes on empty rasters).
        assert!(partial > 300, "{partial} of 400 partly covered");
    }
}
