//! How the combine moved: each record's heading and footprint from its neighbours in the
//! same export and pass, each export's logging interval, and each plot's direction of travel.

use super::geometry::oriented_rect;
use crate::table::CleanPoint;
use std::collections::HashMap;

/// Each record's heading and footprint, and each export's logging interval.
pub(super) struct Motion {
    /// Each export's logging interval (s).
    pub interval: HashMap<u32, f64>,
    /// Each record's footprint: the rectangle of ground its swath covered since the last.
    pub footprint: Vec<[(f64, f64); 4]>,
    /// Each record's heading as a unit vector, NaN where the pass gives none.
    pub heading: Vec<(f64, f64)>,
}

/// Headings and footprints from consecutive points of the same export and pass.
pub(super) fn of(points: &[CleanPoint]) -> Motion {
    let mut order: Vec<usize> = (0..points.len()).collect();
    order.sort_by(|&a, &b| {
        let (p, q) = (&points[a].base, &points[b].base);
        (p.file, points[a].pass)
            .cmp(&(q.file, points[b].pass))
            .then(p.time_s.total_cmp(&q.time_s))
    });
    // Each export's logging interval: the median time step between consecutive kept points
    // of a pass (1 s for a monitor logging every second, 3 s for one logging every 3 s).
    let mut steps: HashMap<u32, Vec<f64>> = HashMap::new();
    for w in order.windows(2) {
        let (p, q) = (&points[w[0]], &points[w[1]]);
        if p.base.file == q.base.file && p.pass == q.pass {
            let dt = q.base.time_s - p.base.time_s;
            if dt > 0.0 {
                steps.entry(p.base.file).or_default().push(dt);
            }
        }
    }
    let interval: HashMap<u32, f64> = steps
        .into_iter()
        .map(|(f, v)| (f, crate::util::median(&v)))
        .filter(|(_, m)| m.is_finite() && *m > 0.0)
        .collect();
    let mut footprint: Vec<[(f64, f64); 4]> = vec![[(0.0, 0.0); 4]; points.len()];
    // Each point's heading as a unit vector, NaN where the pass gives none.
    let mut heading: Vec<(f64, f64)> = vec![(f64::NAN, f64::NAN); points.len()];
    for (k, &i) in order.iter().enumerate() {
        let same = |j: usize| {
            points[j].base.file == points[i].base.file && points[j].pass == points[i].pass
        };
        let prev = (k > 0).then(|| order[k - 1]).filter(|&j| same(j));
        let next = order.get(k + 1).copied().filter(|&j| same(j));
        let (a, b) = (prev.unwrap_or(i), next.unwrap_or(i));
        let p = &points[i].base;
        let (dx, dy) = (
            points[b].base.x_m - points[a].base.x_m,
            points[b].base.y_m - points[a].base.y_m,
        );
        let d = dx.hypot(dy);
        let (ux, uy) = if d > 1e-9 {
            heading[i] = (dx / d, dy / d);
            (dx / d, dy / d)
        } else {
            (0.0, 1.0)
        };
        // Distance travelled since the previous record: at most two logging intervals (a
        // removed record between two kept ones), one interval for the first of a pass.
        let step = interval.get(&p.file).copied().unwrap_or(1.0);
        let dt = prev
            .map(|j| (p.time_s - points[j].base.time_s).clamp(0.0, 2.0 * step))
            .unwrap_or(step);
        // Without a logged speed (a yield-point export), the ground between the positions.
        let travel = if p.speed_m_s.is_finite() {
            p.speed_m_s * dt
        } else {
            prev.map(|j| {
                let q = &points[j].base;
                (p.x_m - q.x_m).hypot(p.y_m - q.y_m).min(dt * 10.0)
            })
            .unwrap_or(d * 0.5)
        };
        footprint[i] = oriented_rect(p.x_m, p.y_m, ux, uy, travel.max(0.1), p.width_m);
    }
    Motion {
        interval,
        footprint,
        heading,
    }
}

/// Each plot's direction of travel (a unit vector), from the headings of the records in it
/// (`gross`: each record's plot): the axial mean of its points' headings (doubled
///angles, so that passes in either sense agree), where they agree (mean resultant
///length of the doubled angles at least 0.5); else the plot's longer side is taken.
pub(super) fn plot_directions(
    gross: &[Option<usize>],
    heading: &[(f64, f64)],
    plots: usize,
) -> Vec<Option<(f64, f64)>> {
    let mut axial = vec![(0.0f64, 0.0f64, 0u32); plots];
    for (i, g) in gross.iter().enumerate() {
        let (hx, hy) = heading[i];
        if let (Some(k), true) = (g, hx.is_finite()) {
            let a = &mut axial[*k];
            a.0 += hx * hx - hy * hy;
            a.1 += 2.0 * hx * hy;
            a.2 += 1;
        }
    }
    axial
        .iter()
        .map(|&(c, sn, n)| {
            (n >= 3 && c.hypot(sn) >= 0.5 * n as f64).then(|| {
                let t = 0.5 * sn.atan2(c);
                (t.cos(), t.sin())
            })
        })
        .collect()
}
