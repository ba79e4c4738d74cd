//! The spatial model against the same mean model without the spatial field, and the
//! residual Moran's I (Moran 1950, Biometrika 37:17) of both.

use super::*;

/// Moran's I of values at points, with binary weights for pairs closer than `cutoff`
/// (Moran 1950): I = n / W x sum_ij w_ij z_i z_j / sum_i z_i^2, z centred.
pub fn morans_i(xy: &[(f64, f64)], v: &[f64], cutoff: f64) -> f64 {
    morans_i_with(&neighbours(xy, cutoff), v)
}

/// Each point's neighbours within `cutoff` (distance `sqrt(dx^2 + dy^2) <= cutoff`, itself
/// left out), in increasing order: candidates from a grid, then the exact test.
pub fn neighbours(xy: &[(f64, f64)], cutoff: f64) -> Vec<Vec<usize>> {
    if !(cutoff > 0.0) || !cutoff.is_finite() {
        return vec![Vec::new(); xy.len()];
    }
    // A looser grid radius than the test, so rounding never loses a neighbour.
    let grid = crate::clean::grid::Grid::new(xy, 1.01 * cutoff);
    let r2 = (1.001 * cutoff).powi(2);
    (0..xy.len())
        .map(|i| {
            let mut nb: Vec<usize> = grid
                .within(xy[i].0, xy[i].1, r2)
                .filter(|&j| {
                    j != i && {
                        let d = ((xy[i].0 - xy[j].0).powi(2) + (xy[i].1 - xy[j].1).powi(2)).sqrt();
                        d <= cutoff
                    }
                })
                .collect();
            nb.sort_unstable();
            nb
        })
        .collect()
}

/// Moran's I of `v` with binary weights on the pairs of `nb` (see [`neighbours`]); the sums
/// run over i and then j in increasing order, as over all pairs.
pub fn morans_i_with(nb: &[Vec<usize>], v: &[f64]) -> f64 {
    let n = v.len();
    let m = v.iter().sum::<f64>() / n as f64;
    let z: Vec<f64> = v.iter().map(|x| x - m).collect();
    let (mut num, mut w) = (0.0, 0.0);
    for (i, js) in nb.iter().enumerate() {
        for &j in js {
            num += z[i] * z[j];
            w += 1.0;
        }
    }
    let den: f64 = z.iter().map(|x| x * x).sum();
    if w == 0.0 || den == 0.0 {
        return f64::NAN;
    }
    n as f64 / w * num / den
}

#[cfg(test)]
#[test]
fn neighbour_lists_give_the_all_pairs_sum() {
    // Against the sum over all pairs, on a lattice (many pairs at exactly the cutoff) and on
    // scattered points, bit for bit.
    let mut r = crate::util::Rng::new(9);
    let lattice: Vec<(f64, f64)> = (0..400)
        .map(|i| {
            (
                500_000.0 + 3.0 * (i % 20) as f64,
                4_400_000.0 + 4.0 * (i / 20) as f64,
            )
        })
        .collect();
    let scattered: Vec<(f64, f64)> = (0..400)
        .map(|_| (r.range(0.0, 90.0), r.range(0.0, 90.0)))
        .collect();
    for (xy, cutoff) in [(&lattice, 4.0), (&lattice, 5.0), (&scattered, 7.5)] {
        let v: Vec<f64> = (0..xy.len()).map(|_| r.normal()).collect();
        let n = v.len();
        let m = v.iter().sum::<f64>() / n as f64;
        let z: Vec<f64> = v.iter().map(|x| x - m).collect();
        let (mut num, mut w) = (0.0, 0.0);
        for i in 0..n {
            for j in 0..n {
                let d = ((xy[i].0 - xy[j].0).powi(2) + (xy[i].1 - xy[j].1).powi(2)).sqrt();
                if i != j && d <= cutoff {
                    num += z[i] * z[j];
                    w += 1.0;
                }
            }
        }
        let den: f64 = z.iter().map(|x| x * x).sum();
        let all_pairs = n as f64 / w * num / den;
        assert!(w > n as f64);
        assert_eq!(morans_i(xy, &v, cutoff).to_bits(), all_pairs.to_bits());
    }
}

/// The spatial fit at the mode against the same mean model without the spatial field.
pub(crate) fn compare(
    prep: &Prepared,
    fit: &spectral::Inner,
    effect: &[f64],
) -> Result<Comparison, String> {
    let m = &prep.model;
    let d = &m.design;
    let (n, p) = (d.n(), d.p);
    let field = &m.name;
    let nt = m.treatments.len();
    // The model without the spatial field: its estimates, the variances of the contrasts
    // and its REML log marginal likelihood.
    let (b, var_c, reml_rcbd) = if d.groups.is_empty() {
        let mut xtx = vec![0.0; p * p];
        let mut xty = vec![0.0; p];
        for i in 0..n {
            for a in 0..p {
                xty[a] += d.x[i * p + a] * d.y[i];
                for b in 0..p {
                    xtx[a * p + b] += d.x[i * p + a] * d.x[i * p + b];
                }
            }
        }
        let l = linalg::chol(&xtx, p)
            .ok_or_else(|| format!("field {field}: the design matrix is singular"))?;
        let mut b = xty.clone();
        linalg::solve(&l, p, &mut b);
        let rss: f64 = (0..n)
            .map(|i| d.y[i] - (0..p).map(|j| d.x[i * p + j] * b[j]).sum::<f64>())
            .map(|r| r * r)
            .sum();
        let s2 = (rss / (n - p) as f64).max(1e-18);
        let inv = linalg::inverse(&l, p);
        let reml = -0.5
            * ((n - p) as f64 * (2.0 * std::f64::consts::PI).ln()
                + n as f64 * s2.ln()
                + linalg::logdet(&l, p)
                - p as f64 * s2.ln()
                + rss / s2);
        let var_c: Vec<f64> = (0..nt).map(|t| s2 * inv[t * p + t]).collect();
        (b, var_c, reml)
    } else {
        let f = random::fit_without_spatial(d, m.sy).ok_or_else(|| {
            format!("field {field}: the model without the spatial field could not be fitted")
        })?;
        let var_c: Vec<f64> = (0..nt).map(|t| f.cov[t * p + t]).collect();
        (f.b, var_c, f.reml)
    };
    let resid_rcbd: Vec<f64> = (0..n)
        .map(|i| d.y[i] - (0..p).map(|j| d.x[i * p + j] * b[j]).sum::<f64>())
        .collect();
    let efficiency = (1..nt).map(|t| var_c[t] / fit.cov[t * p + t]).sum::<f64>() / (nt - 1) as f64;
    let rank = |b: &[f64]| -> Vec<usize> {
        let mut idx: Vec<usize> = (1..nt).collect();
        idx.sort_by(|&a, &c| b[c].total_cmp(&b[a]));
        let mut r = vec![0; nt];
        for (k, &i) in idx.iter().enumerate() {
            r[i] = k + 1;
        }
        r
    };
    let (rs, rr) = (rank(&fit.b), rank(&b));
    let (rank_correlation, top_overlap) = rank_agreement(&rs[1..], &rr[1..]);
    // `effect` holds the random factors' effects with the spatial one (see
    // `Repr::spatial_parts`), so only the fixed columns are taken off here.
    let p0 = d.p_fixed();
    let resid_sp: Vec<f64> = (0..n)
        .map(|i| d.y[i] - (0..p0).map(|j| d.x[i * p + j] * fit.b[j]).sum::<f64>() - effect[i])
        .collect();
    let xy: Vec<(f64, f64)> = prep
        .plots
        .iter()
        .map(|p| (p.centroid_x_m, p.centroid_y_m))
        .collect();
    let nb = neighbours(&xy, 1.5 * m.dmin);
    Ok(Comparison {
        field: field.clone(),
        log_ml_spatial: fit.reml,
        log_ml_without_spatial: reml_rcbd,
        efficiency,
        moran_without_spatial: morans_i_with(&nb, &resid_rcbd),
        moran_spatial: morans_i_with(&nb, &resid_sp),
        rank_correlation,
        top_overlap,
    })
}

/// How far two rankings of the same products (rank 1 = largest uplift) agree: Spearman's
/// rank correlation, rho = 1 - 6 sum d^2 / (n (n^2 - 1)) (Spearman 1904, Am. J. Psychol.
/// 15:72; no ties, uplifts being continuous; NaN for fewer than 2 products), and the share
/// of the top quarter of products (at least one) that both rankings put there. In a trial of
/// 56 entries this says how much the spatial adjustment reorders them, where a list of the
/// entries whose rank moved names nearly all of them.
pub(crate) fn rank_agreement(a: &[usize], b: &[usize]) -> (f64, f64) {
    let n = a.len();
    let rho = if n < 2 {
        f64::NAN
    } else {
        let d2: f64 = a
            .iter()
            .zip(b)
            .map(|(x, y)| (*x as f64 - *y as f64).powi(2))
            .sum();
        let n = n as f64;
        1.0 - 6.0 * d2 / (n * (n * n - 1.0))
    };
    let k = n.div_ceil(4).max(1);
    let both = a
        .iter()
        .zip(b)
        .filter(|(x, y)| **x <= k && **y <= k)
        .count();
    (
        rho,
        if n == 0 {
            f64::NAN
        } else {
            both as f64 / k as f64
        },
    )
}

#[cfg(test)]
mod tests {
    use super::rank_agreement;

    #[test]
    fn rank_agreement_by_hand() {
        // Identical rankings; reversed (rho = -1); one swap of 1 and 2 among 4:
        // sum d^2 = 2, rho = 1 - 12 / 60 = 0.8, top quarter (1 product) not shared.
        assert_eq!(rank_agreement(&[1, 2, 3, 4], &[1, 2, 3, 4]), (1.0, 1.0));
        assert_eq!(rank_agreement(&[1, 2, 3, 4], &[4, 3, 2, 1]), (-1.0, 0.0));
        let (rho, top) = rank_agreement(&[1, 2, 3, 4], &[2, 1, 3, 4]);
        assert!((rho - 0.8).abs() < 1e-12 && top == 0.0);
        // Eight products: the top quarter is two; one of them shared.
        let (_, top) = rank_agreement(&[1, 2, 3, 4, 5, 6, 7, 8], &[1, 3, 2, 4, 5, 6, 7, 8]);
        assert_eq!(top, 0.5);
        assert!(rank_agreement(&[1], &[1]).0.is_nan());
    }
}
