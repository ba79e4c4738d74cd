//! Plot polygons from a grid layout, for trials without a boundary file.
//!
//! A layout is a grid of `columns` x `ranges` plots of `plot_width_m` (across the direction
//! of travel) by `plot_length_m` (along it), with `alley_m` between ranges, its corner at the
//! origin and its along axis at `bearing_deg` (clockwise from grid north of the projection).
//! Plot (range r, column c), both from 0, spans across c x width .. (c + 1) x width and along
//! r x (length + alley) .. r x (length + alley) + length. Plot ids are `id_prefix` followed by
//! the range number and the two-digit column number (`A-101`, `A-102`, ...); with
//! `numbering = "serpentine"` the column numbers run backwards in every second range, as a
//! planter or combine driving back and forth would meet them.

use crate::table::PlotPolygon;
use serde::{Deserialize, Serialize};

crate::choice! {
    /// `numbering` of a `[[layout]]`: how plot ids run through the grid.
    pub enum Numbering {
        /// Column by column within each range, every range the same way.
        RowMajor = "row_major",
        /// Every second range backwards.
        Serpentine = "serpentine",
    }
}

/// One field's grid, as written in the trial file under `[[layout]]`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GridLayout {
    /// Field name, as in the design table.
    pub field: String,
    /// Corner of the grid (first range, first column), WGS84 degrees.
    pub origin_lon: f64,
    pub origin_lat: f64,
    /// Direction of the along (travel) axis, degrees clockwise from north.
    pub bearing_deg: f64,
    pub plot_width_m: f64,
    pub plot_length_m: f64,
    pub alley_m: f64,
    pub columns: u32,
    pub ranges: u32,
    /// "row_major" or "serpentine".
    pub numbering: Numbering,
    pub id_prefix: String,
}

impl GridLayout {
    /// Problems with the layout, naming the key.
    pub fn problems(&self, i: usize) -> Vec<String> {
        let mut p = Vec::new();
        for (k, v) in [
            ("plot_width_m", self.plot_width_m),
            ("plot_length_m", self.plot_length_m),
        ] {
            if !(v > 0.0) {
                p.push(format!("layout[{i}].{k} must be above 0 (got {v})"));
            }
        }
        if !(self.alley_m >= 0.0) {
            p.push(format!(
                "layout[{i}].alley_m must be >= 0 (got {})",
                self.alley_m
            ));
        }
        if self.columns == 0 || self.ranges == 0 || self.columns > 99 {
            p.push(format!(
                "layout[{i}]: columns must be 1-99 and ranges at least 1 (got {} and {})",
                self.columns, self.ranges
            ));
        }
        p
    }

    /// The plots in projected metres, given the projected origin.
    pub fn polygons(&self, ox: f64, oy: f64) -> Vec<PlotPolygon> {
        let b = self.bearing_deg.to_radians();
        let (ax, ay) = (b.sin(), b.cos()); // along
        let (cx, cy) = (ay, -ax); // across: 90 degrees clockwise from along
        let at = |u: f64, v: f64| (ox + u * ax + v * cx, oy + u * ay + v * cy);
        let mut out = Vec::new();
        for r in 0..self.ranges {
            for c in 0..self.columns {
                let u0 = r as f64 * (self.plot_length_m + self.alley_m);
                let u1 = u0 + self.plot_length_m;
                let v0 = c as f64 * self.plot_width_m;
                let v1 = v0 + self.plot_width_m;
                let mut ring: Vec<(f64, f64)> = [(u0, v0), (u1, v0), (u1, v1), (u0, v1), (u0, v0)]
                    .iter()
                    .map(|&(u, v)| at(u, v))
                    .collect();
                if crate::table::signed_area(&ring) < 0.0 {
                    ring.reverse();
                }
                let number = if self.numbering == Numbering::Serpentine && r % 2 == 1 {
                    self.columns - c
                } else {
                    c + 1
                };
                out.push(PlotPolygon {
                    plot_id: format!("{}{}{:02}", self.id_prefix, r + 1, number),
                    exterior: ring,
                    holes: Vec::new(),
                });
            }
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn layout(numbering: Numbering, bearing: f64) -> GridLayout {
        GridLayout {
            field: "F".into(),
            origin_lon: 0.0,
            origin_lat: 0.0,
            bearing_deg: bearing,
            plot_width_m: 3.0,
            plot_length_m: 10.0,
            alley_m: 2.0,
            columns: 2,
            ranges: 2,
            numbering,
            id_prefix: "F-".into(),
        }
    }

    #[test]
    fn corners_by_hand_bearing_east() {
        // Bearing 90: along = east, across = south. Origin (1000, 5000).
        // Plot 1 (range 1, col 1): east 0..10, south 0..3 -> x 1000..1010, y 4997..5000.
        // Plot F-202 (range 2, col 2): along 12..22, across 3..6 -> x 1012..1022, y 4994..4997.
        let p = layout(Numbering::RowMajor, 90.0).polygons(1000.0, 5000.0);
        let bbox = |i: usize| {
            let xs: Vec<f64> = p[i].exterior.iter().map(|c| c.0).collect();
            let ys: Vec<f64> = p[i].exterior.iter().map(|c| c.1).collect();
            let f = |v: &[f64], m: fn(f64, f64) -> f64| v.iter().copied().fold(v[0], m);
            [
                f(&xs, f64::min),
                f(&xs, f64::max),
                f(&ys, f64::min),
                f(&ys, f64::max),
            ]
            .map(|v| (v * 1e9).round() / 1e9)
        };
        assert_eq!(p[0].plot_id, "F-101");
        assert_eq!(bbox(0), [1000.0, 1010.0, 4997.0, 5000.0]);
        assert_eq!(p[3].plot_id, "F-202");
        assert_eq!(bbox(3), [1012.0, 1022.0, 4994.0, 4997.0]);
        assert!(
            p.iter()
                .all(|q| crate::table::signed_area(&q.exterior) > 0.0),
            "counterclockwise"
        );
    }

    #[test]
    fn serpentine_numbering_reverses_every_second_range() {
        let ids: Vec<String> = layout(Numbering::Serpentine, 0.0)
            .polygons(0.0, 0.0)
            .into_iter()
            .map(|p| p.plot_id)
            .collect();
        assert_eq!(ids, ["F-101", "F-102", "F-202", "F-201"]);
        // Bearing 0: along = north, across = east; plot F-101 corner (0,0), far corner (3, 10).
        let p = layout(Numbering::RowMajor, 0.0).polygons(0.0, 0.0);
        assert!(p[0]
            .exterior
            .iter()
            .any(|c| (c.0 - 3.0).abs() < 1e-9 && (c.1 - 10.0).abs() < 1e-9));
    }
}

#[cfg(test)]
mod readme {
    /// The README's `[[layout]]` example is a valid layout with every key.
    #[test]
    fn the_readme_lists_every_layout_key() {
        let readme = include_str!("../../../README.md");
        let start = readme
            .find("```toml\n[[layout]]")
            .expect("README has a [[layout]] example");
        let block = &readme[start + "```toml\n".len()..];
        let block = &block[..block.find("```").unwrap()];
        let t: toml::Table = toml::from_str(block).unwrap();
        let l: super::GridLayout = t["layout"][0].clone().try_into().unwrap();
        assert!(l.problems(0).is_empty(), "{:?}", l.problems(0));
        assert_eq!(l.id_prefix, "A-");
    }
}
