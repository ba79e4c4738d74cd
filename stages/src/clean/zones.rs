//! Treatment zones: which treatment's plot each record lies in, once the plots are known.
//!
//! A rule that compares a record with its neighbours (`yield_local_outlier`) must not compare
//! across plots of different treatments: in a strip trial the neighbours within its radius lie
//! mostly in the strips beside it, under other products, and a product's real difference
//! from them looks like an outlier. With zones, a record's neighbours are only the records
//! in plots of the same treatment (or, for a record outside every plot, the other records
//! outside every plot).

use crate::table::{DesignRow, PlotPolygon};
use geo::{Contains, LineString, Polygon};
use rstar::primitives::{GeomWithData, Rectangle};
use rstar::{RTree, AABB};
use std::collections::{BTreeMap, BTreeSet};

/// Zone of a record outside every plot.
pub const OUTSIDE: u32 = 0;

/// The plots of a trial by treatment, for labelling records.
pub struct Zones {
    polygons: Vec<(Polygon<f64>, u32)>,
    tree: RTree<GeomWithData<Rectangle<[f64; 2]>, usize>>,
    /// Treatment names; zone k (from 1) is `treatments[k - 1]`.
    pub treatments: Vec<String>,
}

impl Zones {
    /// Zones from the projected plot polygons and the design (plots missing from the design
    /// are left out: they belong to no treatment).
    pub fn new(polygons: &[PlotPolygon], design: &[DesignRow]) -> Zones {
        let by_plot: BTreeMap<&str, &str> = design
            .iter()
            .map(|d| (d.plot_id.as_str(), d.treatment.as_str()))
            .collect();
        let treatments: Vec<String> = design
            .iter()
            .map(|d| d.treatment.clone())
            .collect::<BTreeSet<_>>()
            .into_iter()
            .collect();
        let mut out = Vec::new();
        for p in polygons {
            let Some(t) = by_plot.get(p.plot_id.as_str()) else {
                continue;
            };
            let zone = 1 + treatments.iter().position(|x| x == t).unwrap_or(0) as u32;
            let ring = |r: &Vec<(f64, f64)>| LineString::from(r.clone());
            let poly = Polygon::new(ring(&p.exterior), p.holes.iter().map(ring).collect());
            out.push((poly, zone));
        }
        let tree = RTree::bulk_load(
            out.iter()
                .enumerate()
                .filter_map(|(i, (poly, _))| {
                    let ext = poly.exterior();
                    let (mut x0, mut y0, mut x1, mut y1) = (f64::MAX, f64::MAX, f64::MIN, f64::MIN);
                    for c in ext.coords() {
                        x0 = x0.min(c.x);
                        y0 = y0.min(c.y);
                        x1 = x1.max(c.x);
                        y1 = y1.max(c.y);
                    }
                    (x0 <= x1 && y0 <= y1)
                        .then(|| GeomWithData::new(Rectangle::from_corners([x0, y0], [x1, y1]), i))
                })
                .collect(),
        );
        Zones {
            polygons: out,
            tree,
            treatments,
        }
    }

    /// The zone of a position: 1 + the treatment's index for the first plot (in the order
    /// given) that contains it, else [`OUTSIDE`].
    pub fn label(&self, x: f64, y: f64) -> u32 {
        if !(x.is_finite() && y.is_finite()) {
            return OUTSIDE;
        }
        let pt = geo::Point::new(x, y);
        self.tree
            .locate_in_envelope_intersecting(&AABB::from_point([x, y]))
            .map(|g| g.data)
            .filter(|&i| self.polygons[i].0.contains(&pt))
            .min()
            .map(|i| self.polygons[i].1)
            .unwrap_or(OUTSIDE)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn square(id: &str, x0: f64, y0: f64, side: f64) -> PlotPolygon {
        PlotPolygon {
            plot_id: id.into(),
            exterior: vec![
                (x0, y0),
                (x0 + side, y0),
                (x0 + side, y0 + side),
                (x0, y0 + side),
                (x0, y0),
            ],
            holes: Vec::new(),
        }
    }

    fn row(plot: &str, treatment: &str) -> DesignRow {
        DesignRow {
            plot_id: plot.into(),
            treatment: treatment.into(),
            block: "1".into(),
            field: "A".into(),
            row: 2,
        }
    }

    #[test]
    fn records_get_the_treatment_of_the_plot_they_lie_in() {
        let polys = [
            square("p1", 0.0, 0.0, 10.0),
            square("p2", 10.0, 0.0, 10.0),
            square("p3", 20.0, 0.0, 10.0),
            square("stray", 40.0, 0.0, 10.0),
        ];
        let design = [row("p1", "check"), row("p2", "prod-a"), row("p3", "check")];
        let z = Zones::new(&polys, &design);
        assert_eq!(z.treatments, vec!["check", "prod-a"]);
        assert_eq!(z.label(5.0, 5.0), 1);
        assert_eq!(z.label(15.0, 5.0), 2);
        assert_eq!(z.label(25.0, 5.0), 1);
        // Outside every plot, in a plot not in the design, or not a position.
        assert_eq!(z.label(5.0, 15.0), OUTSIDE);
        assert_eq!(z.label(45.0, 5.0), OUTSIDE);
        assert_eq!(z.label(f64::NAN, 5.0), OUTSIDE);
    }
}
