//! A uniform grid of points for fixed-radius neighbour queries: the same neighbours as an
//! R-tree's `locate_within_distance` (squared distance `dx*dx + dy*dy <= r2`, computed as
//! rstar computes it), found by looking in the 3 x 3 cells around the query, which is
//! cheaper when every query has the same radius.

use std::collections::HashMap;

/// Points bucketed by cells of `cell` metres (at least the query radius).
pub struct Grid {
    cell: f64,
    cells: HashMap<(i64, i64), Vec<usize>>,
}

impl Grid {
    pub fn new(xy: &[(f64, f64)], cell: f64) -> Grid {
        // A hair wider than asked, so that a neighbour at exactly the radius never lands two
        // cells away through the rounding of x / cell.
        let cell = cell * (1.0 + 1e-9);
        let mut cells: HashMap<(i64, i64), Vec<usize>> = HashMap::new();
        for (i, &(x, y)) in xy.iter().enumerate() {
            cells
                .entry(((x / cell).floor() as i64, (y / cell).floor() as i64))
                .or_default()
                .push(i);
        }
        Grid { cell, cells }
    }

    /// Indices of the points within squared distance `r2` (`r2 <= cell^2`) of (x, y).
    pub fn within<'a>(
        &'a self,
        xy: &'a [(f64, f64)],
        x: f64,
        y: f64,
        r2: f64,
    ) -> impl Iterator<Item = usize> + 'a {
        let (cx, cy) = (
            (x / self.cell).floor() as i64,
            (y / self.cell).floor() as i64,
        );
        (cx - 1..=cx + 1)
            .flat_map(move |a| (cy - 1..=cy + 1).map(move |b| (a, b)))
            .filter_map(|k| self.cells.get(&k))
            .flatten()
            .copied()
            .filter(move |&i| {
                let (dx, dy) = (xy[i].0 - x, xy[i].1 - y);
                dy * dy + (dx * dx + 0.0) <= r2
            })
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
                let mut b: Vec<usize> = g.within(&xy, p.0, p.1, radius * radius).collect();
                a.sort_unstable();
                b.sort_unstable();
                assert_eq!(a, b, "point {i}, radius {radius}");
                found += a.len() - 1;
            }
        }
        // Not a test of empty sets: about 25 neighbours per query on average.
        assert!(found > 10_000, "{found}");
    }
}
