//! The plots' spacing (smallest and largest distance between two positions, and along each
//! axis the smallest separation above a quarter of the smallest distance) in O(n log n):
//! the pairwise scan it replaces took a sixth of a 10,000-plot field's fit. Every figure is
//! the one the pairwise scan gives, bit for bit: each is a distance or a difference of one
//! pair computed the same way, and the pair is found exactly.

use rstar::primitives::GeomWithData;
use rstar::RTree;

/// The distance between two positions, as every figure here computes it.
fn dist(a: (f64, f64), b: (f64, f64)) -> f64 {
    ((a.0 - b.0).powi(2) + (a.1 - b.1).powi(2)).sqrt()
}

/// (smallest distance between two different positions, largest distance, per axis the
/// smallest separation above a quarter of the smallest distance); infinite where there is
/// no such pair, 0 for the largest distance of fewer than two plots.
pub(crate) fn spacing(coords: &[(f64, f64)]) -> (f64, f64, [f64; 2]) {
    if coords.len() < 2 {
        return (f64::INFINITY, 0.0, [f64::INFINITY; 2]);
    }
    let dmin = smallest(coords);
    let dmax = largest(coords);
    let amin = [0, 1].map(|k| {
        let mut v: Vec<f64> = coords
            .iter()
            .map(|c| if k == 0 { c.0 } else { c.1 })
            .collect();
        v.sort_by(f64::total_cmp);
        axis_gap(&v, 0.25 * dmin)
    });
    (dmin, dmax, amin)
}

/// The smallest separation above `t` between two of the sorted values `v`: for each value the
/// first one beyond it by more than `t` (a difference grows with the later value, rounding
/// included, so that is the smallest above `t` from this value).
fn axis_gap(v: &[f64], t: f64) -> f64 {
    let mut best = f64::INFINITY;
    for (i, &a) in v.iter().enumerate() {
        let rest = &v[i + 1..];
        let j = rest.partition_point(|&b| (b - a).abs() <= t);
        if let Some(&b) = rest.get(j) {
            best = best.min((a - b).abs());
        }
    }
    best
}

/// The smallest distance between two different positions: each plot's nearest neighbours
/// from an R-tree, every neighbour within a hair of the nearest nonzero one measured as
/// [`dist`] measures it (the tree's own squared distance may round differently).
fn smallest(coords: &[(f64, f64)]) -> f64 {
    let tree = RTree::bulk_load(
        coords
            .iter()
            .enumerate()
            .map(|(i, c)| GeomWithData::new([c.0, c.1], i))
            .collect(),
    );
    let mut best = f64::INFINITY;
    for &c in coords {
        let mut first: Option<f64> = None;
        for (nb, d2) in tree.nearest_neighbor_iter_with_distance_2(&[c.0, c.1]) {
            if first.is_some_and(|f| d2 > f * (1.0 + 1e-9)) {
                break;
            }
            let d = dist(c, coords[nb.data]);
            if d > 0.0 {
                best = best.min(d);
                first.get_or_insert(d2);
            }
        }
    }
    best
}

/// The largest distance between two positions: both ends of the farthest pair are corners of
/// the positions' convex hull (Andrew's monotone chain, keeping points within rounding of an
/// edge, so no corner is lost to rounding), so only the hull's points are paired.
fn largest(coords: &[(f64, f64)]) -> f64 {
    let mut p: Vec<(f64, f64)> = coords.to_vec();
    p.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.total_cmp(&b.1)));
    p.dedup();
    if p.len() < 3 {
        return p.first().zip(p.last()).map_or(0.0, |(&a, &b)| dist(a, b));
    }
    let scale = p
        .iter()
        .map(|c| c.0.abs().max(c.1.abs()))
        .fold(0.0, f64::max)
        .max(1.0);
    // A turn counts as clockwise only beyond rounding (relative 1e-9 of the coordinates'
    // size squared): a point within rounding of an edge stays on the hull.
    let tol = 1e-9 * scale * scale;
    let cross = |o: (f64, f64), a: (f64, f64), b: (f64, f64)| {
        (a.0 - o.0) * (b.1 - o.1) - (a.1 - o.1) * (b.0 - o.0)
    };
    let mut hull: Vec<(f64, f64)> = Vec::new();
    for pass in 0..2 {
        let start = hull.len();
        let pts: Box<dyn Iterator<Item = &(f64, f64)>> = if pass == 0 {
            Box::new(p.iter())
        } else {
            Box::new(p.iter().rev())
        };
        for &c in pts {
            while hull.len() >= start + 2
                && cross(hull[hull.len() - 2], hull[hull.len() - 1], c) < -tol
            {
                hull.pop();
            }
            hull.push(c);
        }
    }
    let mut best: f64 = 0.0;
    for (i, &a) in hull.iter().enumerate() {
        for &b in &hull[i + 1..] {
            best = best.max(dist(a, b));
        }
    }
    best
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::util::Rng;

    /// The pairwise scan this module replaces.
    fn pairwise(coords: &[(f64, f64)]) -> (f64, f64, [f64; 2]) {
        let n = coords.len();
        let mut dmin = f64::INFINITY;
        let mut dmax: f64 = 0.0;
        let mut amin = [f64::INFINITY; 2];
        for i in 0..n {
            for j in i + 1..n {
                let d = dist(coords[i], coords[j]);
                if d > 0.0 {
                    dmin = dmin.min(d);
                }
                dmax = dmax.max(d);
            }
        }
        for i in 0..n {
            for j in i + 1..n {
                for (k, dk) in [
                    (coords[i].0 - coords[j].0).abs(),
                    (coords[i].1 - coords[j].1).abs(),
                ]
                .into_iter()
                .enumerate()
                {
                    if dk > 0.25 * dmin {
                        amin[k] = amin[k].min(dk);
                    }
                }
            }
        }
        (dmin, dmax, amin)
    }

    #[test]
    fn the_spacing_is_the_pairwise_scans_bit_for_bit() {
        // Plot grids (exact and jittered, rotated, with repeated positions), a single column,
        // a line, random scatter at projected-coordinate magnitudes, and tiny cases.
        let mut rng = Rng::new(31);
        let mut cases: Vec<Vec<(f64, f64)>> = vec![
            vec![],
            vec![(1.0, 2.0)],
            vec![(1.0, 2.0), (1.0, 2.0)],
            vec![(0.0, 0.0), (3.0, 4.0)],
            (0..40).map(|i| (5.0, 2.5 * i as f64)).collect(),
            (0..40).map(|i| (1.5 * i as f64, 0.5 * i as f64)).collect(),
        ];
        for jitter in [0.0, 0.05, 2.0] {
            for angle in [0.0f64, 0.3, 1.2] {
                let (s, c) = angle.sin_cos();
                let mut g = Vec::new();
                for i in 0..23 {
                    for j in 0..17 {
                        let (x, y) = (
                            18.0 * i as f64 + jitter * rng.normal(),
                            66.0 * j as f64 + jitter * rng.normal(),
                        );
                        g.push((612_345.0 + c * x - s * y, 5_712_345.0 + s * x + c * y));
                    }
                }
                g.push(g[7]);
                g.push(g[100]);
                cases.push(g);
            }
        }
        for n in [3, 10, 300] {
            cases.push(
                (0..n)
                    .map(|_| (rng.range(0.0, 1000.0), rng.range(-50.0, 50.0)))
                    .collect(),
            );
        }
        for (k, c) in cases.iter().enumerate() {
            let (a, b) = (spacing(c), pairwise(c));
            let bits = |x: (f64, f64, [f64; 2])| [x.0, x.1, x.2[0], x.2[1]].map(f64::to_bits);
            assert_eq!(bits(a), bits(b), "case {k}: {a:?} vs {b:?}");
        }
    }
}
