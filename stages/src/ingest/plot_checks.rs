//! Plot geometry checks, before anything is sized by a plot's coordinates: every polygon must
//! be a simple ring (no edge crossing another), have an area, and have an extent plausible
//! against the trial's other plots (a mistyped vertex otherwise makes one plot kilometres
//! long, and the coverage raster and the join follow its extent).
//!
//! Coordinates are WGS84 lon/lat, turned into local metres around each plot's first vertex
//! (equirectangular: 111,320 m per degree of longitude times cos(latitude), 110,574 m per
//! degree of latitude; accurate to well under 1 % over a plot, which is all a plausibility
//! check needs).

use crate::table::PlotPolygon;

/// A plot whose extent is more than this many times the median plot's is refused
/// (common practice, no source: plots of one trial differ by a factor of a few at most).
const MAX_EXTENT_RATIO: f64 = 20.0;
/// Area below which a plot is degenerate, m^2 (a sliver that catches no point).
const MIN_AREA_M2: f64 = 1.0;

/// Local metres of a ring around its first vertex.
fn local_m(ring: &[(f64, f64)]) -> Vec<(f64, f64)> {
    let (lon0, lat0) = ring[0];
    let kx = 111_320.0 * lat0.to_radians().cos();
    ring.iter()
        .map(|&(lon, lat)| ((lon - lon0) * kx, (lat - lat0) * 110_574.0))
        .collect()
}

fn orient(a: (f64, f64), b: (f64, f64), c: (f64, f64)) -> f64 {
    (b.0 - a.0) * (c.1 - a.1) - (b.1 - a.1) * (c.0 - a.0)
}

/// Whether segments ab and cd cross at a point inside both (touching ends do not count).
fn cross(a: (f64, f64), b: (f64, f64), c: (f64, f64), d: (f64, f64)) -> bool {
    let (d1, d2) = (orient(a, b, c), orient(a, b, d));
    let (d3, d4) = (orient(c, d, a), orient(c, d, b));
    d1 * d2 < 0.0 && d3 * d4 < 0.0
}

/// The first pair of edges (by index) of a closed ring that cross, if any.
pub fn self_crossing(ring: &[(f64, f64)]) -> Option<(usize, usize)> {
    let n = ring.len() - 1; // closed: the last position repeats the first
    for i in 0..n {
        for j in i + 2..n {
            if i == 0 && j == n - 1 {
                continue; // the ring's first and last edges meet at the start
            }
            if cross(ring[i], ring[i + 1], ring[j], ring[j + 1]) {
                return Some((i, j));
            }
        }
    }
    None
}

/// Problems with the plots' geometry, each naming the plot id and `file`.
pub fn problems(polys: &[PlotPolygon], file: &str) -> Vec<String> {
    let mut out = Vec::new();
    let mut extents = Vec::with_capacity(polys.len());
    for p in polys {
        let mut ring = p.exterior.clone();
        if ring.first() != ring.last() {
            ring.push(ring[0]);
        }
        if ring.iter().any(|(x, y)| !x.is_finite() || !y.is_finite()) {
            out.push(format!(
                "{file}: plot {}: a vertex is not a number",
                p.plot_id
            ));
            extents.push(f64::NAN);
            continue;
        }
        let m = local_m(&ring);
        let area = 0.5
            * m.windows(2)
                .map(|w| w[0].0 * w[1].1 - w[1].0 * w[0].1)
                .sum::<f64>()
                .abs();
        if let Some((i, j)) = self_crossing(&m) {
            out.push(format!(
                "{file}: plot {}: its boundary crosses itself (edge {} from vertex {i} and edge {} from vertex {j}); a plot must be a simple polygon",
                p.plot_id,
                i + 1,
                j + 1
            ));
        } else if !(area >= MIN_AREA_M2) {
            out.push(format!(
                "{file}: plot {}: area {area:.3} m^2; a plot needs at least {MIN_AREA_M2} m^2",
                p.plot_id
            ));
        }
        let (mut x0, mut y0, mut x1, mut y1) = (f64::MAX, f64::MAX, f64::MIN, f64::MIN);
        for (x, y) in &m {
            x0 = x0.min(*x);
            y0 = y0.min(*y);
            x1 = x1.max(*x);
            y1 = y1.max(*y);
        }
        extents.push(((x1 - x0).powi(2) + (y1 - y0).powi(2)).sqrt());
    }
    let finite: Vec<f64> = extents.iter().copied().filter(|e| e.is_finite()).collect();
    if finite.len() >= 3 {
        let median = crate::util::median(&finite);
        for (p, e) in polys.iter().zip(&extents) {
            if *e > MAX_EXTENT_RATIO * median {
                out.push(format!(
                    "{file}: plot {}: {:.0} m across, against {:.0} m for the median plot; a vertex is likely mistyped",
                    p.plot_id, e, median
                ));
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn square(id: &str, lon: f64, lat: f64, d: f64) -> PlotPolygon {
        PlotPolygon {
            plot_id: id.into(),
            exterior: vec![
                (lon, lat),
                (lon + d, lat),
                (lon + d, lat + d),
                (lon, lat + d),
                (lon, lat),
            ],
            holes: Vec::new(),
        }
    }

    #[test]
    fn crossing_degenerate_and_implausible_plots_are_named() {
        let d = 0.0003; // about 25 m x 33 m at 40 degrees north
        let mut polys: Vec<PlotPolygon> = (0..5)
            .map(|k| square(&format!("p{k}"), -97.0 + k as f64 * d, 40.0, d))
            .collect();
        assert!(problems(&polys, "plots.geojson").is_empty());
        // A bow tie: vertices 2 and 3 swapped.
        polys[1].exterior.swap(2, 3);
        // A sliver: all four corners on one line.
        polys[2].exterior = vec![
            (-97.0, 40.0),
            (-96.9997, 40.0),
            (-96.9994, 40.0),
            (-97.0, 40.0),
        ];
        // A mistyped longitude: -1 instead of -96.9988.
        polys[4].exterior[2].0 = -1.0;
        let p = problems(&polys, "plots.geojson");
        assert_eq!(p.len(), 3, "{p:#?}");
        assert!(
            p[0].starts_with("plots.geojson: plot p1: its boundary crosses itself"),
            "{}",
            p[0]
        );
        assert!(
            p[1].starts_with("plots.geojson: plot p2: area 0.000 m^2"),
            "{}",
            p[1]
        );
        assert!(
            p[2].starts_with("plots.geojson: plot p4:") && p[2].contains("likely mistyped"),
            "{}",
            p[2]
        );
    }

    #[test]
    fn rings_that_only_touch_do_not_cross() {
        let r = [(0.0, 0.0), (2.0, 0.0), (2.0, 2.0), (0.0, 2.0), (0.0, 0.0)];
        assert_eq!(self_crossing(&r), None);
        let bow = [(0.0, 0.0), (2.0, 2.0), (2.0, 0.0), (0.0, 2.0), (0.0, 0.0)];
        assert_eq!(self_crossing(&bow), Some((0, 2)));
    }
}
