//! Checks of how the design lies on the ground: blocks that repeat one treatment order, and
//! a treatment that sits toward one side of its blocks (confounded with position).
//!
//! In a randomised complete block design each block is randomised anew. When the blocks lay
//! out their treatments in one order (a common shortcut in strip trials: randomise the first
//! replicate, repeat it), each treatment sits at the same place in every block, so a
//! gradient running along the blocks is confounded with the treatments and the blocks give
//! no replication of position. The spatial model can separate part of a smooth gradient,
//! not all of it, so such a design is a warning (in `check`, the ingest summary and the
//! reports), never silent.
//!
//! A design need not repeat whole orders to tie a treatment to a place: the check put at the
//! west end of every block, say, with the other treatments randomised. [`confounded`] tests
//! each treatment's mean position within its blocks against what randomisation within blocks
//! gives (its exact mean and variance under every within-block permutation; normal tail,
//! Bonferroni over treatments and two axes).

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
    repeated_by_field(plots)
        .into_iter()
        .map(|(_, w)| w)
        .collect()
}

/// [`repeated_orders`] with the field each warning is about.
fn repeated_by_field<'a>(plots: &[Placed<'a>]) -> Vec<(&'a str, String)> {
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
            out.push((field, format!(
                "field {field}: blocks {} lay out their treatments in one order ({} across the block), so each treatment sits at the same place in every block and a gradient along the blocks is confounded with the treatments; the spatial model separates only part of it. Randomise each block anew",
                same.join(", "),
                order.join(", ")
            )));
        }
    }
    out
}

/// Every design warning: [`repeated_orders`], then [`confounded`] for the fields without one.
pub fn design_warnings(plots: &[Placed]) -> Vec<String> {
    let repeated = repeated_by_field(plots);
    let rest: Vec<&Placed> = plots
        .iter()
        .filter(|p| !repeated.iter().any(|(f, _)| *f == p.field))
        .collect();
    let mut out: Vec<String> = repeated.into_iter().map(|(_, w)| w).collect();
    out.extend(confounded(&rest));
    out
}

/// A design is confounded with position when a treatment's plots sit toward one side of
/// their blocks beyond what randomisation gives: adjusted p below this; common practice,
/// no source (1 % family-wise, so about one randomised field in a hundred is warned about).
pub const CONFOUNDED_P: f64 = 0.01;

/// A warning for each field (of three blocks or more) in which some treatment's plots lie
/// toward one side of their blocks, along the field's principal axis or across it. Blocks
/// of fewer than three plots (alternating check and product strips taken in pairs) are not
/// tested.
///
/// Each plot's position along an axis is taken from its block's mean; a treatment's statistic
/// is the sum over its plots. Under randomisation within blocks the sum has mean 0 and
/// variance sum over blocks of k s2 (n - k) / (n - 1) (k of the block's n plots, s2 the
/// variance of the block's positions: sampling without replacement), so z = sum / sd, the
/// two-sided normal p, times the number of tests (treatments x 2 axes), below
/// [`CONFOUNDED_P`] is a warning.
pub fn confounded(plots: &[&Placed]) -> Vec<String> {
    let mut fields: BTreeMap<&str, Vec<&Placed>> = BTreeMap::new();
    for p in plots {
        fields.entry(p.field).or_default().push(p);
    }
    let mut out = Vec::new();
    for (field, ps) in fields {
        let mut blocks: BTreeMap<&str, Vec<&Placed>> = BTreeMap::new();
        for p in &ps {
            blocks.entry(p.block).or_default().push(p);
        }
        let treatments: std::collections::BTreeSet<&str> = ps.iter().map(|p| p.treatment).collect();
        if blocks.len() < 3 || treatments.len() < 2 {
            continue;
        }
        let (ax, ay) = covariance_axis(&ps);
        let tests = 2 * treatments.len();
        let mut worst: Option<(f64, &str, &str, f64)> = None;
        for (axis, (ux, uy)) in [("along", (ax, ay)), ("across", (-ay, ax))] {
            // Per treatment: sum of centred positions, its variance, plot count.
            let mut stat: BTreeMap<&str, (f64, f64, f64)> = BTreeMap::new();
            for members in blocks.values() {
                let pos: Vec<f64> = members.iter().map(|p| p.x * ux + p.y * uy).collect();
                let n = pos.len() as f64;
                // Pairs (a check strip beside each product strip, alternating by design)
                // are not tested, as repeated orders do not compare them either.
                if n < 3.0 {
                    continue;
                }
                let m = pos.iter().sum::<f64>() / n;
                let s2 = pos.iter().map(|v| (v - m).powi(2)).sum::<f64>() / n;
                let mut k: BTreeMap<&str, f64> = BTreeMap::new();
                for (p, v) in members.iter().zip(&pos) {
                    let e = stat.entry(p.treatment).or_default();
                    e.0 += v - m;
                    e.2 += 1.0;
                    *k.entry(p.treatment).or_default() += 1.0;
                }
                for (t, k) in k {
                    stat.get_mut(t).expect("entered above").1 += k * s2 * (n - k) / (n - 1.0);
                }
            }
            for (t, (sum, var, count)) in stat {
                if var <= 0.0 {
                    continue;
                }
                let z = sum / var.sqrt();
                let p = (2.0 * crate::util::normal_cdf(-z.abs()) * tests as f64).min(1.0);
                if p < CONFOUNDED_P && worst.is_none_or(|w| p < w.0) {
                    worst = Some((p, t, axis, sum / count));
                }
            }
        }
        if let Some((p, t, axis, shift)) = worst {
            out.push(format!(
                "field {field}: treatment {t} lies toward one side of its blocks ({:.1} m from its blocks' centres on average, {axis} the field's longer axis; p = {p:.2e} under randomisation within blocks, {tests} tests), so a gradient there is confounded with it; the spatial model separates only part of it. Check that each block was randomised",
                shift.abs()
            ));
        }
    }
    out
}

/// The principal axis of the points' covariance (a unit vector; x when they do not spread).
fn covariance_axis(ps: &[&Placed]) -> (f64, f64) {
    let n = ps.len() as f64;
    let (mx, my) = ps
        .iter()
        .fold((0.0, 0.0), |a, p| (a.0 + p.x / n, a.1 + p.y / n));
    let (mut sxx, mut syy, mut sxy) = (0.0, 0.0, 0.0);
    for p in ps {
        let (dx, dy) = (p.x - mx, p.y - my);
        sxx += dx * dx;
        syy += dy * dy;
        sxy += dx * dy;
    }
    let t = 0.5 * (2.0 * sxy).atan2(sxx - syy);
    (t.cos(), t.sin())
}

/// [`design_warnings`] of a plot table's plots (their centres as given).
pub fn design_warnings_of_plots(plots: &[crate::table::PlotStats]) -> Vec<String> {
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
    design_warnings(&placed)
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

    /// An RCBD of `blocks` ranges of 6 plots (10 m wide, x across), stacked in y; `order`
    /// gives each block's treatments from west to east.
    fn rcbd(orders: &[Vec<String>]) -> Vec<(String, String, f64, f64)> {
        let mut v = Vec::new();
        for (b, o) in orders.iter().enumerate() {
            for (c, t) in o.iter().enumerate() {
                v.push((
                    format!("B{}", b + 1),
                    t.clone(),
                    10.0 * c as f64,
                    70.0 * b as f64,
                ));
            }
        }
        v
    }

    fn placed2(v: &[(String, String, f64, f64)]) -> Vec<Placed<'_>> {
        v.iter()
            .map(|(b, t, x, y)| Placed {
                field: "F",
                block: b,
                treatment: t,
                x: *x,
                y: *y,
            })
            .collect()
    }

    #[test]
    fn a_treatment_at_one_end_of_every_block_is_named_and_randomised_designs_seldom_are() {
        let names: Vec<String> = ["check", "a", "b", "c", "d", "e"]
            .iter()
            .map(|s| s.to_string())
            .collect();
        let mut rng = crate::util::Rng::new(11);
        // The check at the west end of each of 6 blocks, the rest randomised: z = -15 /
        // sqrt(6 x 35/12) = -3.59, p = 3.3e-4 x 12 tests = 4.0e-3.
        let orders: Vec<Vec<String>> = (0..6)
            .map(|_| {
                let mut rest = names[1..].to_vec();
                rng.shuffle(&mut rest);
                std::iter::once(names[0].clone()).chain(rest).collect()
            })
            .collect();
        let v = rcbd(&orders);
        let ps = placed2(&v);
        let w = design_warnings(&ps);
        assert_eq!(w.len(), 1, "{w:?}");
        assert!(
            w[0].starts_with("field F: treatment check lies toward one side of its blocks (25.0 m from its blocks' centres on average, across the field's longer axis; p = 4.0"),
            "{}",
            w[0]
        );
        // Randomised blocks: over 200 designs of 6 blocks, about 1 % warned (at most 4).
        let mut warned = 0;
        for _ in 0..200 {
            let orders: Vec<Vec<String>> = (0..6)
                .map(|_| {
                    let mut o = names.clone();
                    rng.shuffle(&mut o);
                    o
                })
                .collect();
            let v = rcbd(&orders);
            let ps: Vec<Placed> = placed2(&v);
            warned += design_warnings(&ps).len();
        }
        eprintln!("{warned} of 200 randomised designs warned");
        assert!(warned <= 4, "{warned} of 200 randomised designs warned");
        // Alternating check and product strips taken in pairs: not tested.
        let pairs: Vec<Vec<String>> = (0..8)
            .map(|_| vec!["check".to_string(), "a".to_string()])
            .collect();
        let v = rcbd(&pairs);
        assert!(design_warnings(&placed2(&v)).is_empty());
        // Blocks repeating one order are warned about once, as repeated orders.
        let same: Vec<Vec<String>> = (0..4).map(|_| names.clone()).collect();
        let v = rcbd(&same);
        let w = design_warnings(&placed2(&v));
        assert_eq!(w.len(), 1, "{w:?}");
        assert!(
            w[0].contains("lay out their treatments in one order"),
            "{}",
            w[0]
        );
    }
}
