//! Spatial cleaning rules: swath overlap with ground already harvested, and local yield
//! outliers.
//!
//! Swath overlap: each record's footprint is an oriented rectangle (logged width across the
//! heading, distance travelled since the previous record along it) centred on the point.
//! Records are taken in time order; the overlap fraction is estimated on a 5 x 3 grid of
//! sample points inside the footprint (cells' centres, so rectangles that only share an edge
//! do not overlap), each tested against the earlier footprints found through an R-tree
//! (rstar) of their bounding boxes. Footprints of the same pass within `skip_s` seconds are
//! ignored (consecutive footprints touch by construction).
//!
//! Local outlier: deviation from the neighbourhood median, |y - median(N)| > k x 1.4826 x
//! MAD(N), where N are the other points within `radius` (found through an R-tree) and at least
//! `min_neighbours` of them (the deviation-from-neighbourhood-median alternative to local
//! Moran's I named in Anselin 1995, Geographical Analysis 27:93).

use crate::util::median_mut;
use rstar::primitives::{GeomWithData, Rectangle};
use rstar::{RTree, AABB};

/// A record's swath footprint.
#[derive(Clone, Copy, Debug)]
pub struct Footprint {
    pub x: f64,
    pub y: f64,
    /// Unit vector of travel.
    pub ux: f64,
    pub uy: f64,
    pub width: f64,
    pub length: f64,
    pub time_s: f64,
    pub pass: u32,
}

impl Footprint {
    fn contains(&self, px: f64, py: f64) -> bool {
        let (dx, dy) = (px - self.x, py - self.y);
        let along = dx * self.ux + dy * self.uy;
        let across = -dx * self.uy + dy * self.ux;
        along.abs() <= 0.5 * self.length && across.abs() <= 0.5 * self.width
    }
    fn corners(&self) -> [(f64, f64); 4] {
        let (hl, hw) = (0.5 * self.length, 0.5 * self.width);
        let (ax, ay) = (self.ux * hl, self.uy * hl);
        let (cx, cy) = (-self.uy * hw, self.ux * hw);
        [
            (self.x + ax + cx, self.y + ay + cy),
            (self.x + ax - cx, self.y + ay - cy),
            (self.x - ax + cx, self.y - ay + cy),
            (self.x - ax - cx, self.y - ay - cy),
        ]
    }
    fn envelope(&self) -> Rectangle<[f64; 2]> {
        let c = self.corners();
        let (mut x0, mut y0, mut x1, mut y1) = (f64::MAX, f64::MAX, f64::MIN, f64::MIN);
        for (x, y) in c {
            x0 = x0.min(x);
            y0 = y0.min(y);
            x1 = x1.max(x);
            y1 = y1.max(y);
        }
        Rectangle::from_corners([x0, y0], [x1, y1])
    }
    fn samples(&self) -> impl Iterator<Item = (f64, f64)> + '_ {
        (0..5).flat_map(move |i| {
            (0..3).map(move |j| {
                let a = ((i as f64 + 0.5) / 5.0 - 0.5) * self.length;
                let c = ((j as f64 + 0.5) / 3.0 - 0.5) * self.width;
                (
                    self.x + a * self.ux - c * self.uy,
                    self.y + a * self.uy + c * self.ux,
                )
            })
        })
    }
}

/// Overlap fraction of each footprint (in the given time order) with the earlier ones.
///
/// The earlier footprints are found in one R-tree of every footprint's bounding box, built
/// at once (bulk loading), keeping those before the footprint in time order: the same
/// candidates as a tree grown footprint by footprint, and the sample test does not depend
/// on their order.
pub fn overlap_fractions(fp: &[Footprint], skip_s: f64) -> Vec<f64> {
    let envelopes: Vec<Rectangle<[f64; 2]>> = fp.iter().map(|f| f.envelope()).collect();
    let tree: RTree<GeomWithData<Rectangle<[f64; 2]>, usize>> = RTree::bulk_load(
        fp.iter()
            .enumerate()
            .filter(|(_, f)| f.length > 0.0 && f.width > 0.0)
            .map(|(i, _)| GeomWithData::new(envelopes[i], i))
            .collect(),
    );
    let mut candidates: Vec<usize> = Vec::new();
    fp.iter()
        .enumerate()
        .map(|(i, f)| {
            let env = &envelopes[i];
            candidates.clear();
            candidates.extend(
                tree.locate_in_envelope_intersecting(&AABB::from_corners(env.lower(), env.upper()))
                    .map(|g| g.data)
                    .filter(|&j| {
                        j < i && !(fp[j].pass == f.pass && f.time_s - fp[j].time_s <= skip_s)
                    }),
            );
            let covered = if candidates.is_empty() {
                0
            } else {
                f.samples()
                    .filter(|&(x, y)| candidates.iter().any(|&j| fp[j].contains(x, y)))
                    .count()
            };
            covered as f64 / 15.0
        })
        .collect()
}

/// Local outlier test for each point: Some((deviation, limit)) when it fails. A point's
/// neighbours are the other points of its own group within `radius` (found on a grid of
/// `radius` cells).
pub fn local_outliers(
    xy: &[(f64, f64)],
    y: &[f64],
    group: &[u32],
    radius: f64,
    k: f64,
    min_neighbours: usize,
) -> Vec<Option<(f64, f64)>> {
    let grid = super::grid::Grid::new(xy, radius);
    // Buffers reused from point to point.
    let mut nb: Vec<f64> = Vec::new();
    let mut dev: Vec<f64> = Vec::new();
    xy.iter()
        .enumerate()
        .map(|(i, p)| {
            nb.clear();
            nb.extend(
                grid.within(p.0, p.1, radius * radius)
                    .filter(|&g| g != i && group[g] == group[i])
                    .map(|g| y[g]),
            );
            if nb.len() < min_neighbours {
                return None;
            }
            let m = median_mut(&mut nb);
            dev.clear();
            dev.extend(nb.iter().map(|v| (v - m).abs()));
            // A floor of 1 % of the median keeps a neighbourhood of identical values (MAD 0)
            // from flagging every small difference.
            let limit = (k * 1.4826 * median_mut(&mut dev)).max(0.01 * m.abs());
            let dev = y[i] - m;
            (dev.abs() > limit).then_some((dev, limit))
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn fp(x: f64, y: f64, t: f64, pass: u32) -> Footprint {
        Footprint {
            x,
            y,
            ux: 1.0,
            uy: 0.0,
            width: 9.0,
            length: 2.0,
            time_s: t,
            pass,
        }
    }

    #[test]
    fn overlap_by_hand() {
        // Pass 0 east along y = 0; pass 1 west along y = 9 (touching: no overlap);
        // pass 2 along y = 4.5 (half over pass 0 and half over pass 1: full overlap).
        let mut v = Vec::new();
        for k in 0..10 {
            v.push(fp(2.0 * k as f64 + 1.0, 0.0, k as f64, 0));
        }
        for k in 0..10 {
            v.push(fp(19.0 - 2.0 * k as f64, 9.0, 10.0 + k as f64, 1));
        }
        v.push(fp(9.0, 4.5, 30.0, 2));
        v.push(fp(9.0, 3.0, 31.0, 3));
        let f = overlap_fractions(&v, 3.0);
        assert!(f[..20].iter().all(|&x| x == 0.0), "{:?}", &f[..20]);
        assert_eq!(f[20], 1.0);
        // Centre at y = 3: band -1.5..7.5 lies wholly over passes 0, 1 and 2.
        assert_eq!(f[21], 1.0);
    }

    #[test]
    fn local_outlier_by_hand() {
        // A 5 x 5 grid 2 m apart on a gentle gradient, and one point at 30.
        let mut xy = Vec::new();
        let mut y = Vec::new();
        for i in 0..5 {
            for j in 0..5 {
                xy.push((2.0 * i as f64, 2.0 * j as f64));
                y.push(10.0 + 0.1 * i as f64 + 0.05 * j as f64);
            }
        }
        y[12] = 30.0;
        let r = local_outliers(&xy, &y, &[0; 25], 4.5, 3.0, 8);
        assert!(r[12].is_some());
        assert_eq!(r.iter().filter(|x| x.is_some()).count(), 1);
    }
}
