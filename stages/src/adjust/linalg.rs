//! Small dense symmetric matrices (row-major `Vec<f64>`) for the treatment-level equations:
//! Cholesky factorisation, solves, log-determinants. The matrices here are p x p with p the
//! number of mean parameters (a few dozen at most), where a plain loop beats a library call.

/// Lower Cholesky factor of the symmetric positive definite `a` (n x n, row major), or None.
pub fn chol(a: &[f64], n: usize) -> Option<Vec<f64>> {
    let mut l = vec![0.0; n * n];
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

/// A^-1 from the Cholesky factor of A.
pub fn inverse(l: &[f64], n: usize) -> Vec<f64> {
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
}
