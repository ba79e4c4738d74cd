//! Checks of how the design lies on the ground: blocks that repeat one treatment order.
//!
//! In a randomised complete block design each block is randomised anew. When the blocks lay
//! out their treatments in one order (a common shortcut in strip trials: randomise the first
//! replicate, repeat it), each treatment sits at the same place in every block, so a
//! gradient running along the blocks is confounded with the treatments and the blocks give
//! no replication of position. The spatial model can separate part of a smooth gradient,
//! not all of it, so such a design is a warning (in `check`, the ingest summary and the
//! reports), never silent.

use std::collections::BTreeMap;

/// One plot's place in the design: field, block, treatment and centre (projected metres).
pub struct Placed<'a> {
    pub field: &'a str,
    pub block: &'a str,
    pub treatment: &'a str,
    pub x: f64,
    pub y: f64,
}

/// A warning for each field in which two or more blocks, and at least half of its blocks,
/// lay out their treatments in one order across the block.
///
/// Each block's order is the sequence of its treatments along the block's principal axis
/// (the direction in which the treatments' centres spread most; a treatment's centre is the
/// mean of its plots' in the block); the axes of a field's blocks are pointed one way (along the
/// first block's), so the same order read from the other end counts as another order.
/// Blocks of fewer than three plots are not compared.
pub fn repeated_orders(plots: &[Placed]) -> Vec<String> {
    let mut fields: BTreeMap<&str, BTreeMap<&str, Vec<&Placed>>> = BTreeMap::new();
    for p in plots {
        fields
            .entry(p.field)
            .or_default()
            .entry(p.block)
            .or_default()
            .push(p);
    }
    let mut out = Vec::new();
    for (field, blocks) in fields {
        let mut reference: Option<(f64, f64)> = None;
        let mut orders: BTreeMap<Vec<&str>, Vec<&str>> = BTreeMap::new();
        let mut compared = 0;
        for (block, plots) in &blocks {
            // Each treatment once, at the mean centre of its plots in the block (a strip
            // cut into pieces along travel stays one place across the block).
            let mut by_t: BTreeMap<&str, (f64, f64, f64)> = BTreeMap::new();
            for p in plots {
                let e = by_t.entry(p.treatment).or_insert((0.0, 0.0, 0.0));
                *e = (e.0 + p.x, e.1 + p.y, e.2 + 1.0);
            }
            let centres: Vec<Placed> = by_t
                .iter()
                .map(|(t, (x, y, n))| Placed {
                    field,
                    block,
                    treatment: t,
                    x: x / n,
                    y: y / n,
                })
                .collect();
            let ps: Vec<&Placed> = centres.iter().collect();
            if ps.len() < 3 {
                continue;
            }
            compared += 1;
            let (mut ax, mut ay) = principal_axis(&ps);
            match reference {
                None => reference = Some((ax, ay)),
                Some((rx, ry)) if ax * rx + ay * ry < 0.0 => {
                    ax = -ax;
                    ay = -ay;
                }
                _ => {}
            }
            let mut along: Vec<(f64, &str)> = ps
                .iter()
                .map(|p| (p.x * ax + p.y * ay, p.treatment))
                .collect();
            along.sort_by(|a, b| a.0.total_cmp(&b.0));
            let order: Vec<&str> = along.into_iter().map(|(_, t)| t).collect();
            orders.entry(order).or_default().push(block);
        }
        let Some((order, same)) = orders.iter().max_by_key(|(_, b)| b.len()) else {
            continue;
        };
        if same.len() >= 2 && 2 * same.len() >= compared {
            out.push(format!(
                "field {field}: blocks {} lay out their treatments in one order ({} across the block), so each treatment sits at the same place in every block and a gradient along the blocks is confounded with the treatments; the spatial model separates only part of it. Randomise each block anew",
                same.join(", "),
                order.join(", ")
            ));
        }
    }
    out
}

/// [`repeated_orders`] of a plot table's plots (their centres as given).
pub fn repeated_orders_of_plots(plots: &[crate::plots::PlotStats]) -> Vec<String> {
    let placed: Vec<Placed> = plots
        .iter()
        .map(|p| Placed {
            field: &p.field,
            block: &p.block,
            treatment: &p.treatment,
            x: p.centroid_x_m,
            y: p.centroid_y_m,
        })
        .collect();
    repeated_orders(&placed)
}

/// The direction along which the points lie: the circular median of the directions between
/// every pair of them (each taken modulo 180 degrees; the median is the pair direction with
/// the least summed angular distance to all others). Unlike the covariance's principal axis
/// it is not turned by one point off the line (a treatment whose plots lie further along
/// travel than the others'). Returned as a unit vector.
fn principal_axis(ps: &[&Placed]) -> (f64, f64) {
    use std::f64::consts::PI;
    let mut angles = Vec::new();
    for (i, p) in ps.iter().enumerate() {
        for q in &ps[i + 1..] {
            let (dx, dy) = (q.x - p.x, q.y - p.y);
            if dx.hypot(dy) > 1e-9 {
                angles.push(dy.atan2(dx).rem_euclid(PI));
            }
        }
    }
    let apart = |a: f64, b: f64| {
        let d = (a - b).rem_euclid(PI);
        d.min(PI - d)
    };
    let best = angles
        .iter()
        .map(|&a| (angles.iter().map(|&b| apart(a, b)).sum::<f64>(), a))
        .min_by(|x, y| x.0.total_cmp(&y.0))
        .map_or(0.0, |(_, a)| a);
    (best.cos(), best.sin())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn strips(orders: &[&[&str]]) -> Vec<(String, String, f64)> {
        // Blocks side by side along x, each a row of strips 6 m apart.
        let mut v = Vec::new();
        let mut x = 0.0;
        for (b, o) in orders.iter().enumerate() {
            for t in o.iter() {
                v.push((format!("R{}", b + 1), t.to_string(), x));
                x += 6.0;
            }
        }
        v
    }

    fn placed(v: &[(String, String, f64)]) -> Vec<Placed<'_>> {
        v.iter()
            .map(|(b, t, x)| Placed {
                field: "A",
                block: b,
                treatment: t,
                x: *x,
                y: 0.3 * x, // a slanted row: the axis is found, not assumed
            })
            .collect()
    }

    #[test]
    fn blocks_repeating_one_order_are_named_and_randomised_blocks_pass() {
        let same = strips(&[
            &["N5", "N3", "N0"],
            &["N5", "N3", "N0"],
            &["N5", "N3", "N0"],
        ]);
        let w = repeated_orders(&placed(&same));
        assert_eq!(w.len(), 1, "{w:?}");
        assert!(w[0].starts_with("field A: blocks R1, R2, R3 lay out their treatments in one order (N5, N3, N0 across the block)"), "{}", w[0]);
        let random = strips(&[
            &["N5", "N3", "N0"],
            &["N0", "N5", "N3"],
            &["N3", "N0", "N5"],
        ]);
        assert!(repeated_orders(&placed(&random)).is_empty());
        // Two of four blocks alike is half: still a warning; one pair among six is not.
        let half = strips(&[
            &["a", "b", "c"],
            &["a", "b", "c"],
            &["c", "a", "b"],
            &["b", "c", "a"],
        ]);
        assert_eq!(repeated_orders(&placed(&half)).len(), 1);
        let few = strips(&[
            &["a", "b", "c"],
            &["a", "b", "c"],
            &["c", "a", "b"],
            &["b", "c", "a"],
            &["c", "b", "a"],
            &["b", "a", "c"],
        ]);
        assert!(repeated_orders(&placed(&few)).is_empty());
    }
}
