//! Small dense symmetric matrices (row-major `Vec<f64>`) for the treatment-level equations:
//! Cholesky factorisation, solves, log-determinants. The matrices here are p x p with p the
//! number of mean parameters: a plain loop for small ones; from `LARGE` rows on (trials with
//! many entries or blocks) the inverse and products go through faer's blocked, vectorised
//! kernels, which agree with the loops to rounding (tested) but not bit for bit.

use faer::{Accum, MatMut, MatRef, Par};

/// From this size on, `inverse` and `matmul` use faer (below it the loops, whose results
/// earlier runs reproduce byte for byte).
pub const LARGE: usize = 16;

/// The lower triangle (with the diagonal) of C = A B, known to be symmetric, through faer
/// (half the work of the full product); the upper triangle is left as it was.
pub fn sym_product_lower(c: MatMut<'_, f64>, a: MatRef<'_, f64>, b: MatRef<'_, f64>) {
    use faer::linalg::matmul::triangular::{matmul, BlockStructure};
    matmul(
        c,
        BlockStructure::TriangularLower,
        Accum::Replace,
        a,
        BlockStructure::Rectangular,
        b,
        BlockStructure::Rectangular,
        1.0,
        Par::Seq,
    );
    after_faer();
}

/// Clears the upper halves of the vector registers after a call into faer.
///
/// faer's kernels (gemm's AVX-512 micro-kernels among them) can return with the upper halves
/// of the wide vector registers in use. On Intel cores every legacy SSE instruction after that
/// (the code here is built for baseline x86-64, SSE2) then pays a transition cost until
/// `vzeroupper` runs: measured on this project's machine, filling a 355-plot kernel matrix took
/// 9.8 ms after an eigendecomposition against 0.7 ms in a clean state, and the likelihood
/// loops slowed alike. Call it after each faer call on a hot path; it changes no value (only
/// the registers' upper halves, which SSE2 code never holds values in) and does nothing on
/// processors without AVX or off x86-64.
pub fn after_faer() {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx") {
        // SAFETY: the processor has AVX (checked above), all `zero_upper` needs.
        unsafe { zero_upper() }
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx")]
fn zero_upper() {
    std::arch::x86_64::_mm256_zeroupper();
}

/// x'y with four running sums (vectorises; the order differs from a plain loop's).
pub fn dot(x: &[f64], y: &[f64]) -> f64 {
    let mut acc = [0.0; 4];
    let (xc, yc) = (x.chunks_exact(4), y.chunks_exact(4));
    let tail: f64 = xc
        .remainder()
        .iter()
        .zip(yc.remainder())
        .map(|(a, b)| a * b)
        .sum();
    for (a, b) in xc.zip(yc) {
        for k in 0..4 {
            acc[k] += a[k] * b[k];
        }
    }
    (acc[0] + acc[1]) + (acc[2] + acc[3]) + tail
}

/// Lower Cholesky factor of the symmetric positive definite `a` (n x n, row major), or None.
pub fn chol(a: &[f64], n: usize) -> Option<Vec<f64>> {
    let mut l = vec![0.0; n * n];
    if n >= LARGE {
        let f = MatRef::from_row_major_slice(a, n, n).llt(faer::Side::Lower);
        after_faer();
        let f = f.ok()?;
        let lf = f.L();
        for i in 0..n {
            let d = lf[(i, i)];
            if !(d > 0.0) || !d.is_finite() {
                return None;
            }
            for j in 0..=i {
                l[i * n + j] = lf[(i, j)];
            }
        }
        return Some(l);
    }
    for i in 0..n {
        for j in 0..=i {
            let mut s = a[i * n + j];
            for k in 0..j {
                s -= l[i * n + k] * l[j * n + k];
            }
            if i == j {
                if !(s > 0.0) || !s.is_finite() {
                    return None;
                }
                l[i * n + i] = s.sqrt();
            } else {
                l[i * n + j] = s / l[j * n + j];
            }
        }
    }
    Some(l)
}

/// log |A| from its Cholesky factor.
pub fn logdet(l: &[f64], n: usize) -> f64 {
    (0..n).map(|i| 2.0 * l[i * n + i].ln()).sum()
}

/// Solves A x = b in place from the Cholesky factor of A.
pub fn solve(l: &[f64], n: usize, b: &mut [f64]) {
    for i in 0..n {
        let mut s = b[i];
        for k in 0..i {
            s -= l[i * n + k] * b[k];
        }
        b[i] = s / l[i * n + i];
    }
    for i in (0..n).rev() {
        let mut s = b[i];
        for k in i + 1..n {
            s -= l[k * n + i] * b[k];
        }
        b[i] = s / l[i * n + i];
    }
}

/// Solves A X = B in place for B n x m (row major) from the Cholesky factor of A.
pub fn solve_many(l: &[f64], n: usize, b: &mut [f64], m: usize) {
    if n < LARGE {
        let mut col = vec![0.0; n];
        for j in 0..m {
            for i in 0..n {
                col[i] = b[i * m + j];
            }
            solve(l, n, &mut col);
            for i in 0..n {
                b[i * m + j] = col[i];
            }
        }
        return;
    }
    let lm = MatRef::from_row_major_slice(l, n, n);
    let mut bm = MatMut::from_row_major_slice_mut(b, n, m);
    faer::linalg::triangular_solve::solve_lower_triangular_in_place(lm, bm.as_mut(), Par::Seq);
    faer::linalg::triangular_solve::solve_upper_triangular_in_place(lm.transpose(), bm, Par::Seq);
    after_faer();
}

/// A^-1 from the Cholesky factor of A.
pub fn inverse(l: &[f64], n: usize) -> Vec<f64> {
    if n >= LARGE {
        // A^-1 = L^-T L^-1, symmetric by construction (the lower half mirrored).
        let lm = MatRef::from_row_major_slice(l, n, n);
        let mut li = faer::Mat::<f64>::zeros(n, n);
        faer::linalg::triangular_inverse::invert_lower_triangular(li.as_mut(), lm, Par::Seq);
        let mut inv = faer::Mat::<f64>::zeros(n, n);
        faer::linalg::matmul::triangular::matmul(
            inv.as_mut(),
            faer::linalg::matmul::triangular::BlockStructure::TriangularLower,
            Accum::Replace,
            li.transpose(),
            faer::linalg::matmul::triangular::BlockStructure::TriangularUpper,
            li.as_ref(),
            faer::linalg::matmul::triangular::BlockStructure::TriangularLower,
            1.0,
            Par::Seq,
        );
        after_faer();
        let mut out = vec![0.0; n * n];
        for i in 0..n {
            for j in 0..=i {
                out[i * n + j] = inv[(i, j)];
                out[j * n + i] = inv[(i, j)];
            }
        }
        return out;
    }
    let mut inv = vec![0.0; n * n];
    let mut e = vec![0.0; n];
    for j in 0..n {
        e.iter_mut().for_each(|x| *x = 0.0);
        e[j] = 1.0;
        solve(l, n, &mut e);
        for i in 0..n {
            inv[i * n + j] = e[i];
        }
    }
    inv
}

/// The sub-matrix of `a` (n x n) on the index set `idx`.
pub fn sub(a: &[f64], n: usize, idx: &[usize]) -> Vec<f64> {
    let m = idx.len();
    let mut out = vec![0.0; m * m];
    for (i, &a_i) in idx.iter().enumerate() {
        for (j, &a_j) in idx.iter().enumerate() {
            out[i * m + j] = a[a_i * n + a_j];
        }
    }
    out
}

/// C = A B for row-major A (n x k) and B (k x m).
pub fn matmul(a: &[f64], b: &[f64], n: usize, k: usize, m: usize) -> Vec<f64> {
    let mut c = vec![0.0; n * m];
    if n.min(k) >= LARGE && m >= LARGE {
        let cm = faer::MatMut::from_row_major_slice_mut(&mut c, n, m);
        faer::linalg::matmul::matmul(
            cm,
            Accum::Replace,
            MatRef::from_row_major_slice(a, n, k),
            MatRef::from_row_major_slice(b, k, m),
            1.0,
            Par::Seq,
        );
        after_faer();
        return c;
    }
    for i in 0..n {
        for t in 0..k {
            let v = a[i * k + t];
            if v != 0.0 {
                for j in 0..m {
                    c[i * m + j] += v * b[t * m + j];
                }
            }
        }
    }
    c
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cholesky_solve_inverse_by_hand() {
        // A = [[4, 2], [2, 3]]: |A| = 8, A^-1 = [[3, -2], [-2, 4]] / 8 (arithmetic).
        let a = [4.0, 2.0, 2.0, 3.0];
        let l = chol(&a, 2).unwrap();
        assert!((logdet(&l, 2) - 8f64.ln()).abs() < 1e-12);
        let inv = inverse(&l, 2);
        for (x, e) in inv.iter().zip([0.375, -0.25, -0.25, 0.5]) {
            assert!((x - e).abs() < 1e-12);
        }
        let mut b = [1.0, 1.0];
        solve(&l, 2, &mut b);
        assert!((b[0] - 0.125).abs() < 1e-12 && (b[1] - 0.25).abs() < 1e-12);
        assert!(chol(&[1.0, 2.0, 2.0, 1.0], 2).is_none());
        assert_eq!(matmul(&[1.0, 2.0], &[3.0, 4.0], 1, 2, 1), vec![11.0]);
        assert_eq!(sub(&a, 2, &[1]), vec![3.0]);
    }

    #[test]
    fn blocked_paths_agree_with_plain_arithmetic() {
        // From LARGE rows on, chol, inverse, solve_many, matmul and dot go through faer or
        // reordered sums: checked against the defining identities and textbook loops on a
        // random symmetric positive definite 37 x 37 matrix (A = B B' + 37 I).
        let n = 37;
        let mut rng = crate::util::Rng::new(5);
        let bm: Vec<f64> = (0..n * n).map(|_| rng.normal()).collect();
        let mut a = vec![0.0; n * n];
        for i in 0..n {
            for j in 0..n {
                a[i * n + j] = (0..n).map(|k| bm[i * n + k] * bm[j * n + k]).sum::<f64>()
                    + if i == j { n as f64 } else { 0.0 };
            }
        }
        let l = chol(&a, n).unwrap();
        for i in 0..n {
            for j in 0..n {
                let llt: f64 = (0..n).map(|k| l[i * n + k] * l[j * n + k]).sum();
                assert!((llt - a[i * n + j]).abs() < 1e-10 * a[i * n + i], "{i},{j}");
                if j > i {
                    assert_eq!(l[i * n + j], 0.0);
                }
            }
        }
        let inv = inverse(&l, n);
        for i in 0..n {
            for j in 0..n {
                let e: f64 = (0..n).map(|k| inv[i * n + k] * a[k * n + j]).sum();
                assert!(
                    (e - if i == j { 1.0 } else { 0.0 }).abs() < 1e-10,
                    "{i},{j}"
                );
                assert_eq!(inv[i * n + j], inv[j * n + i]);
            }
        }
        // solve_many: A X = B for B 37 x 3 against one column at a time.
        let b: Vec<f64> = (0..n * 3).map(|_| rng.normal()).collect();
        let mut x = b.clone();
        solve_many(&l, n, &mut x, 3);
        for j in 0..3 {
            let mut col: Vec<f64> = (0..n).map(|i| b[i * 3 + j]).collect();
            solve(&l, n, &mut col);
            for i in 0..n {
                assert!((x[i * 3 + j] - col[i]).abs() < 1e-12, "{i},{j}");
            }
        }
        // matmul against the triple loop, dot against the plain sum.
        let c = matmul(&a, &bm, n, n, n);
        for i in 0..n {
            for j in 0..n {
                let e: f64 = (0..n).map(|k| a[i * n + k] * bm[k * n + j]).sum();
                assert!(
                    (c[i * n + j] - e).abs() < 1e-11 * (1.0 + e.abs()),
                    "{i},{j}"
                );
            }
        }
        let plain: f64 = a.iter().zip(&bm).map(|(x, y)| x * y).sum();
        assert!((dot(&a, &bm) - plain).abs() < 1e-11 * plain.abs());
        // Not positive definite: None on either path.
        let mut bad = a.clone();
        bad[(n - 1) * n + n - 1] = -1.0;
        assert!(chol(&bad, n).is_none());
        assert!(chol(&[1.0, 2.0, 2.0, 1.0], 2).is_none());
    }
}
