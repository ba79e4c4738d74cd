//! A uniform grid of points for fixed-radius neighbour queries: the same neighbours as an
//! R-tree's `locate_within_distance` (squared distance `dx*dx + dy*dy <= r2`, computed as
//! rstar computes it), found by looking in the 3 x 3 cells around the query, which is
//! cheaper when every query has the same radius.

use std::collections::HashMap;

/// Points bucketed by cells of `cell` metres (at least the query radius), stored cell by
/// cell (within a cell in index order, with their coordinates beside them) so that a query
/// reads nine short runs of memory. Cells are found in a dense table over the points'
/// bounding box, or, when the points are spread so thinly that such a table would be large
/// (a stray GPS fix far from the field), in a hash map; both give the same runs.
pub struct Grid {
    cell: f64,
    /// The lowest cell indices and the dense table's height, when dense.
    k0: (i64, i64),
    ny: i64,
    nx: i64,
    /// Dense: `starts[c]..starts[c + 1]` is cell c's run (c = (kx - k0.0) * ny + ky - k0.1).
    starts: Vec<u32>,
    /// Sparse: each occupied cell's run.
    runs: HashMap<(i64, i64), (u32, u32)>,
    dense: bool,
    /// Point indices and coordinates, cell by cell.
    idx: Vec<u32>,
    xy: Vec<(f64, f64)>,
}

impl Grid {
    pub fn new(xy: &[(f64, f64)], cell: f64) -> Grid {
        // A hair wider than asked, so that a neighbour at exactly the radius never lands two
        // cells away through the rounding of x / cell.
        let cell = cell * (1.0 + 1e-9);
        let keys: Vec<(i64, i64)> = xy
            .iter()
            .map(|&(x, y)| ((x / cell).floor() as i64, (y / cell).floor() as i64))
            .collect();
        let (mut lo, mut hi) = ((i64::MAX, i64::MAX), (i64::MIN, i64::MIN));
        for &(a, b) in &keys {
            lo = (lo.0.min(a), lo.1.min(b));
            hi = (hi.0.max(a), hi.1.max(b));
        }
        let (nx, ny) = if keys.is_empty() {
            (0, 0)
        } else {
            (
                hi.0.saturating_sub(lo.0).saturating_add(1),
                hi.1.saturating_sub(lo.1).saturating_add(1),
            )
        };
        let dense = nx
            .checked_mul(ny)
            .is_some_and(|c| c <= 4 * keys.len() as i64 + 4096);
        let n = keys.len();
        let mut idx: Vec<u32> = Vec::with_capacity(n);
        let mut starts = Vec::new();
        let mut runs = HashMap::new();
        if dense {
            // Counting sort by cell: within a cell the points stay in index order.
            let ncell = (nx * ny) as usize;
            let cell_of = |k: (i64, i64)| ((k.0 - lo.0) * ny + (k.1 - lo.1)) as usize;
            starts = vec![0u32; ncell + 1];
            for &k in &keys {
                starts[cell_of(k) + 1] += 1;
            }
            for c in 0..ncell {
                starts[c + 1] += starts[c];
            }
            let mut next = starts.clone();
            idx.resize(n, 0);
            for (i, &k) in keys.iter().enumerate() {
                let c = cell_of(k);
                idx[next[c] as usize] = i as u32;
                next[c] += 1;
            }
        } else {
            idx = (0..n as u32).collect();
            idx.sort_by_key(|&i| (keys[i as usize], i));
            let mut a = 0;
            while a < n {
                let k = keys[idx[a] as usize];
                let mut b = a;
                while b < n && keys[idx[b] as usize] == k {
                    b += 1;
                }
                runs.insert(k, (a as u32, b as u32));
                a = b;
            }
        }
        let sorted_xy = idx.iter().map(|&i| xy[i as usize]).collect();
        Grid {
            cell,
            k0: lo,
            ny,
            nx,
            starts,
            runs,
            dense,
            idx,
            xy: sorted_xy,
        }
    }

    /// The run of cell (a, b) in `idx` / `xy`.
    fn run(&self, a: i64, b: i64) -> std::ops::Range<usize> {
        if self.dense {
            let (u, v) = (a - self.k0.0, b - self.k0.1);
            if u < 0 || v < 0 || u >= self.nx || v >= self.ny {
                return 0..0;
            }
            let c = (u * self.ny + v) as usize;
            self.starts[c] as usize..self.starts[c + 1] as usize
        } else {
            self.runs
                .get(&(a, b))
                .map_or(0..0, |&(s, e)| s as usize..e as usize)
        }
    }

    /// Indices of the points within squared distance `r2` (`r2 <= cell^2`) of (x, y): the
    /// cells around (x, y) column by column, each cell's points in index order.
    pub fn within(&self, x: f64, y: f64, r2: f64) -> impl Iterator<Item = usize> + '_ {
        let (cx, cy) = (
            (x / self.cell).floor() as i64,
            (y / self.cell).floor() as i64,
        );
        (cx - 1..=cx + 1)
            .flat_map(move |a| (cy - 1..=cy + 1).map(move |b| self.run(a, b)))
            .flatten()
            .filter(move |&k| {
                let (dx, dy) = (self.xy[k].0 - x, self.xy[k].1 - y);
                dy * dy + (dx * dx + 0.0) <= r2
            })
            .map(|k| self.idx[k] as usize)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rstar::primitives::GeomWithData;
    use rstar::RTree;

    /// The same neighbour sets as rstar's `locate_within_distance`, including points at
    /// exactly the radius, on scattered and on lattice points.
    #[test]
    fn the_same_neighbours_as_the_r_tree() {
        let mut r = crate::util::Rng::new(5);
        let mut xy: Vec<(f64, f64)> = (0..3000)
            .map(|_| {
                (
                    500_000.0 + r.range(0.0, 300.0),
                    4_400_000.0 + r.range(0.0, 300.0),
                )
            })
            .collect();
        for i in 0..30 {
            for j in 0..30 {
                xy.push((500_000.0 + 3.0 * i as f64, 4_400_000.0 + 4.0 * j as f64));
            }
        }
        let tree = RTree::bulk_load(
            xy.iter()
                .enumerate()
                .map(|(i, p)| GeomWithData::new([p.0, p.1], i))
                .collect(),
        );
        let mut found = 0;
        for radius in [5.0, 12.0, 15.0] {
            let g = Grid::new(&xy, radius);
            for (i, p) in xy.iter().enumerate().step_by(7) {
                let mut a: Vec<usize> = tree
                    .locate_within_distance([p.0, p.1], radius * radius)
                    .map(|g| g.data)
                    .collect();
                let mut b: Vec<usize> = g.within(p.0, p.1, radius * radius).collect();
                a.sort_unstable();
                b.sort_unstable();
                assert_eq!(a, b, "point {i}, radius {radius}");
                found += a.len() - 1;
            }
        }
        // Not a test of empty sets: about 25 neighbours per query on average.
        assert!(found > 10_000, "{found}");
    }

    /// A stray point far away makes the cell table sparse (a hash map of runs); the
    /// neighbours come out in the same order as from the dense table.
    #[test]
    fn sparse_and_dense_cells_give_the_same_sequence() {
        let mut r = crate::util::Rng::new(9);
        let xy: Vec<(f64, f64)> = (0..2000)
            .map(|_| (r.range(0.0, 200.0), r.range(-50.0, 150.0)))
            .collect();
        let mut far = xy.clone();
        far.push((1.0e7, -3.0e6));
        let (d, s) = (Grid::new(&xy, 12.0), Grid::new(&far, 12.0));
        assert!(d.dense && !s.dense);
        for p in xy.iter().step_by(3) {
            let a: Vec<usize> = d.within(p.0, p.1, 144.0).collect();
            let b: Vec<usize> = s.within(p.0, p.1, 144.0).collect();
            assert!(!a.is_empty());
            assert_eq!(a, b);
        }
        assert_eq!(s.within(1.0e7, -3.0e6, 1.0).collect::<Vec<_>>(), vec![2000]);
    }

    #[test]
    fn angle_difference_matches_the_remainder() {
        // The fast path of `delay::angle_diff` is exact: compare with rem_euclid directly.
        let mut r = crate::util::Rng::new(4);
        for _ in 0..20_000 {
            let (a, b) = (r.range(-400.0, 760.0), r.range(-10.0, 370.0));
            let d = (a - b).rem_euclid(360.0);
            let want = if d > 180.0 { 360.0 - d } else { d };
            assert_eq!(
                super::super::delay::angle_diff(a, b).to_bits(),
                want.to_bits()
            );
        }
    }
}
