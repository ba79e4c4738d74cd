//! The eigenvalues of a symmetric matrix A = U diag(w) U' and the projections U'z of a few
//! vectors, without U.
//!
//! The likelihood over (s_f, s_n) at one length scale needs only w, U'y and U'X; U itself
//! (n x n) is needed only where spatial effects are drawn. A is reduced to tridiagonal form
//! T = Q'AQ by Householder reflections (faer's `tridiag_in_place`, the first step of its own
//! eigendecomposition), Q' is applied to the vectors, and T = V diag(w) V' is diagonalised by
//! the implicit QL algorithm with Wilkinson-type shifts (Bowdler, Martin, Reinsch & Wilkinson
//! 1968, Numerische Mathematik 11:293, "tql2"), its plane rotations applied to the vectors
//! instead of accumulated into V: then U'z = V'Q'z at O(n^2 k) beyond the reduction, where
//! the eigenvectors cost O(n^3) more.

use faer::dyn_stack::{MemStack, StackReq};
use faer::linalg::evd::tridiag;
use faer::linalg::householder;
use faer::{Mat, MatMut, MatRef};

/// The eigenvalues of the symmetric matrix whose lower triangle `a` holds (the rest of `a` is
/// not read; all of it is overwritten), ascending, and U'z for each column z of `z` (n x k):
/// row i of the result (row major, n x k) is eigenvector i's projections. None when the QL
/// iterations do not converge.
pub(crate) fn eigen_projected(
    mut a: MatMut<'_, f64>,
    z: MatRef<'_, f64>,
) -> Option<(Vec<f64>, Vec<f64>)> {
    let n = a.nrows();
    let k = z.ncols();
    if n <= 1 {
        let w = (0..n).map(|i| a[(i, i)]).collect();
        return Some((w, (0..n * k).map(|t| z[(t / k, t % k)]).collect()));
    }
    let par = faer::get_global_parallelism();
    let bs = faer::linalg::qr::no_pivoting::factor::recommended_block_size::<f64>(n, n);
    let req =
        StackReq::any_of(&[
            tridiag::tridiag_in_place_scratch::<f64>(n, par, Default::default()),
            householder::apply_block_householder_sequence_transpose_on_the_left_in_place_scratch::<
                f64,
            >(n - 1, bs, k),
        ]);
    let mut hh = Mat::<f64>::zeros(bs, n - 1);
    let mut zq = z.to_owned();
    super::with_scratch(req, |buf| {
        tridiag::tridiag_in_place(
            a.as_mut(),
            hh.as_mut(),
            par,
            MemStack::new(buf),
            Default::default(),
        );
        householder::apply_block_householder_sequence_transpose_on_the_left_in_place_with_conj(
            a.as_ref().submatrix(1, 0, n - 1, n - 1),
            hh.as_ref(),
            faer::Conj::No,
            zq.as_mut().subrows_mut(1, n - 1),
            par,
            MemStack::new(buf),
        );
    });
    super::linalg::after_faer();
    let mut d: Vec<f64> = (0..n).map(|i| a[(i, i)]).collect();
    let mut e: Vec<f64> = (0..n)
        .map(|i| if i + 1 < n { a[(i + 1, i)] } else { 0.0 })
        .collect();
    let mut zr: Vec<f64> = (0..n * k).map(|t| zq[(t / k, t % k)]).collect();
    ql_implicit(&mut d, &mut e, &mut zr, k)?;
    // Ascending, as faer's eigendecomposition orders them.
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&i, &j| d[i].total_cmp(&d[j]).then(i.cmp(&j)));
    let w = order.iter().map(|&i| d[i]).collect();
    let proj = order
        .iter()
        .flat_map(|&i| zr[i * k..(i + 1) * k].iter().copied())
        .collect();
    Some((w, proj))
}

/// sqrt(a^2 + b^2) without overflow or underflow, as the larger magnitude times
/// sqrt(1 + t^2), t the ratio of the smaller to it: one division and one square root (the
/// C library's `hypot`, exact to the last bit, was a third of the rotations' time). Differs
/// from it in the last bits only.
fn hypot(a: f64, b: f64) -> f64 {
    if a.is_nan() || b.is_nan() {
        return f64::NAN;
    }
    let (a, b) = (a.abs(), b.abs());
    let (big, small) = if a >= b { (a, b) } else { (b, a) };
    if big == 0.0 || big.is_infinite() {
        return big;
    }
    let t = small / big;
    big * (1.0 + t * t).sqrt()
}

/// The implicit QL algorithm on the symmetric tridiagonal matrix with diagonal `d` and
/// subdiagonal `e` (e[i] couples i and i + 1; e[n - 1] is not read): `d` becomes the
/// eigenvalues (unordered) and each of the k vectors held in `z` (row major n x k: row i holds
/// coordinate i of every vector) becomes its coordinates in the eigenvectors, row i paired
/// with d[i]. None after 60 iterations on one eigenvalue without convergence.
pub(crate) fn ql_implicit(d: &mut [f64], e: &mut [f64], z: &mut [f64], k: usize) -> Option<()> {
    let n = d.len();
    if n <= 1 {
        return Some(());
    }
    e[n - 1] = 0.0;
    // A subdiagonal below eps times the matrix's norm is negligible however small the
    // diagonal beside it: an eigenvalue is then found to eps |T| absolutely (the likelihood
    // adds the noise variance to every eigenvalue, so no more is needed), and the many tiny
    // eigenvalues of a smooth kernel do not take iterations to resolve relatively.
    let norm = (0..n)
        .map(|i| d[i].abs() + e[i].abs() + if i > 0 { e[i - 1].abs() } else { 0.0 })
        .fold(0.0, f64::max);
    if !(norm > 0.0 && norm.is_finite()) {
        return (norm == 0.0).then_some(());
    }
    // Scaled by a power of two (exactly) to a norm in (1/2, 1], so that the rotations'
    // sqrt(f^2 + g^2) neither overflows nor, for any value not negligible against the
    // norm, underflows: one square root and one division a rotation, where a careful
    // hypot and two divisions were half of the QL's time.
    let scale = 2f64.powi(-(norm.log2().ceil() as i32));
    for v in d.iter_mut().chain(e.iter_mut()) {
        *v *= scale;
    }
    let small = f64::EPSILON * norm * scale;
    for l in 0..n {
        let mut iter = 0;
        loop {
            // The first negligible subdiagonal at or after l splits the matrix.
            let mut m = l;
            while m + 1 < n {
                let dd = d[m].abs() + d[m + 1].abs();
                if e[m].abs() <= f64::EPSILON * dd || e[m].abs() <= small {
                    break;
                }
                m += 1;
            }
            if m == l {
                break;
            }
            iter += 1;
            if iter > 60 {
                return None;
            }
            // Shift from the leading 2 x 2 block.
            let mut g = (d[l + 1] - d[l]) / (2.0 * e[l]);
            let mut r = hypot(g, 1.0);
            g = d[m] - d[l] + e[l] / (g + r.copysign(g));
            let (mut s, mut c, mut p) = (1.0, 1.0, 0.0);
            let mut i = m;
            let mut underflow = false;
            while i > l {
                i -= 1;
                let f = s * e[i];
                let b = c * e[i];
                r = (f * f + g * g).sqrt();
                e[i + 1] = r;
                if r == 0.0 {
                    // Recover from underflow: the matrix splits here.
                    d[i + 1] -= p;
                    e[m] = 0.0;
                    underflow = true;
                    break;
                }
                let inv = 1.0 / r;
                s = f * inv;
                c = g * inv;
                g = d[i + 1] - p;
                r = (d[i] - g) * s + 2.0 * c * b;
                p = s * r;
                d[i + 1] = g + p;
                g = c * r - b;
                let (lo, hi) = z.split_at_mut((i + 1) * k);
                for (zi, zj) in lo[i * k..].iter_mut().zip(&mut hi[..k]) {
                    let f = *zj;
                    *zj = s * *zi + c * f;
                    *zi = c * *zi - s * f;
                }
            }
            if underflow {
                continue;
            }
            d[l] -= p;
            e[l] = g;
            e[m] = 0.0;
        }
    }
    for v in d.iter_mut() {
        *v /= scale;
    }
    Some(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::util::Rng;

    /// A symmetric n x n matrix with a kernel's spectrum (many eigenvalues near zero, a few
    /// large, some nearly equal): Matern 5/2 covariances of random points in a square.
    fn kernel_like(n: usize, seed: u64) -> Mat<f64> {
        let mut rng = Rng::new(seed);
        let pts: Vec<(f64, f64)> = (0..n)
            .map(|_| (rng.range(0.0, 100.0), rng.range(0.0, 100.0)))
            .collect();
        Mat::from_fn(n, n, |i, j| {
            let h = ((pts[i].0 - pts[j].0).powi(2) + (pts[i].1 - pts[j].1).powi(2)).sqrt() / 30.0;
            let t = 5f64.sqrt() * h;
            (1.0 + t + t * t / 3.0) * (-t).exp()
        })
    }

    #[test]
    fn eigenvalues_and_projections_match_the_full_eigendecomposition() {
        // Against faer's eigendecomposition with eigenvectors: the eigenvalues agree to 1e-12
        // of the largest, and every function of the matrix the likelihood takes agrees:
        // z_a'f(A)z_b for f(w) = 1 / (s w + 1) at several s (s = 0: the plain inner
        // products, U being orthogonal).
        for (n, seed) in [(2usize, 1u64), (3, 2), (17, 3), (120, 4), (361, 5)] {
            let a = kernel_like(n, seed);
            let mut rng = Rng::new(seed + 100);
            let k = 4;
            let z = Mat::from_fn(n, k, |_, _| rng.normal());
            let mut work = a.clone();
            let (w, proj) = eigen_projected(work.as_mut(), z.as_ref()).unwrap();
            let evd = a.self_adjoint_eigen(faer::Side::Lower).unwrap();
            let (u, s) = (evd.U(), evd.S().column_vector());
            let top = s[n - 1].abs();
            for i in 0..n {
                assert!(
                    (w[i] - s[i]).abs() < 1e-12 * top,
                    "n {n}, eigenvalue {i}: {} vs {}",
                    w[i],
                    s[i]
                );
            }
            let uz = u.transpose() * &z;
            let norm = |c: usize| (0..n).map(|i| z[(i, c)].powi(2)).sum::<f64>().sqrt();
            for sc in [0.0, 0.1, 3.0, 100.0] {
                for ca in 0..k {
                    for cb in 0..k {
                        let f = |x: f64| 1.0 / (sc * x.max(0.0) + 1.0);
                        let mine: f64 = (0..n)
                            .map(|i| proj[i * k + ca] * proj[i * k + cb] * f(w[i]))
                            .sum();
                        let full: f64 = (0..n).map(|i| uz[(i, ca)] * uz[(i, cb)] * f(s[i])).sum();
                        assert!(
                            (mine - full).abs() < 1e-10 * norm(ca) * norm(cb),
                            "n {n}, s {sc}, columns {ca} {cb}: {mine} vs {full}"
                        );
                    }
                }
            }
        }
    }

    #[test]
    fn hypot_agrees_with_the_library_s_to_the_last_bits() {
        let mut rng = Rng::new(9);
        let mut worst: f64 = 0.0;
        for _ in 0..100_000 {
            let a = rng.normal() * 10f64.powf(rng.range(-300.0, 300.0));
            let b = rng.normal() * 10f64.powf(rng.range(-300.0, 300.0));
            let (mine, lib) = (hypot(a, b), a.hypot(b));
            worst = worst.max((mine - lib).abs() / lib);
        }
        assert!(worst < 4.0 * f64::EPSILON, "{worst}");
        assert_eq!(hypot(0.0, -0.0), 0.0);
        assert_eq!(hypot(3.0, -4.0), 5.0);
        assert_eq!(hypot(f64::INFINITY, 1.0), f64::INFINITY);
        assert!(hypot(f64::NAN, 0.0).is_nan());
    }

    #[test]
    fn ql_on_a_known_tridiagonal_matrix() {
        // The n x n tridiagonal matrix with 2 on the diagonal and -1 beside it has eigenvalues
        // 2 - 2 cos(j pi / (n + 1)), j = 1..n (the discrete Laplacian; any linear-algebra text).
        let n = 50;
        let mut d = vec![2.0; n];
        let mut e = vec![-1.0; n];
        let mut z = vec![0.0; n];
        z[0] = 1.0;
        ql_implicit(&mut d, &mut e, &mut z, 1).unwrap();
        d.sort_by(f64::total_cmp);
        for (j, v) in d.iter().enumerate() {
            let want = 2.0 - 2.0 * ((j + 1) as f64 * std::f64::consts::PI / (n + 1) as f64).cos();
            assert!((v - want).abs() < 1e-13, "{j}: {v} vs {want}");
        }
        // The first unit vector's coordinates keep its length.
        let len: f64 = z.iter().map(|x| x * x).sum();
        assert!((len - 1.0).abs() < 1e-13);
    }
}
