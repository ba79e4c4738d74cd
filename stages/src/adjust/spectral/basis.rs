//! The reduced-rank (Hilbert-space) form's basis: Phi and its products, built once per basis
//! and shared by the length scales that use it (see [`BasisCache`]), and [`Repr::hsgp`].

use super::{linalg, transposed, Design, Repr};
use faer::{Mat, Side};
use std::sync::{Arc, Mutex};

/// Phi and the products Phi'Phi, Phi'y and Phi'X of one reduced-rank basis: they depend on
/// the basis (its size and box), not on the length scale, and every length scale below the
/// one where the basis cap binds shares one basis. Built once per basis instead of once per
/// length scale (the n m^2 product Phi'Phi was most of a large field's fit); the same numbers
/// either way.
struct BasisProducts {
    /// (m0, m1, box half-widths' bits): the basis.
    key: (usize, usize, u64, u64),
    phi: Arc<Mat<f64>>,
    ptp: Mat<f64>,
    pty: Mat<f64>,
    ptx: Mat<f64>,
}

/// A design's last two [`BasisProducts`] used, the latest first: the capped basis is the one length
/// scales share, and a walk over the length scales that steps onto an uncapped node and back
/// (the fine walk looks at each neighbour of the best node) keeps it. Shared by the threads
/// that scan length scales; a clone starts empty.
#[derive(Default)]
pub struct BasisCache(Mutex<Vec<Arc<BasisProducts>>>);

/// How many bases a [`BasisCache`] keeps.
const CACHED_BASES: usize = 2;

impl Clone for BasisCache {
    fn clone(&self) -> Self {
        BasisCache::default()
    }
}

impl std::fmt::Debug for BasisCache {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("BasisCache")
    }
}

fn lock_cache(c: &BasisCache) -> std::sync::MutexGuard<'_, Vec<Arc<BasisProducts>>> {
    c.0.lock().unwrap_or_else(|e| e.into_inner())
}

/// Phi (n x m0 m1) of the basis `key` on the box centred at `centre`, and its products.
fn basis_products(d: &Design, key: (usize, usize, u64, u64), centre: (f64, f64)) -> BasisProducts {
    let n = d.n();
    let (m0, m1) = (key.0, key.1);
    let (big_l0, big_l1) = (f64::from_bits(key.2), f64::from_bits(key.3));
    let (c0, c1) = centre;
    let m = m0 * m1;
    let freq = |j: usize, big_l: f64| std::f64::consts::PI * j as f64 / (2.0 * big_l);
    // Phi's entries are products of one sine per axis: tabled per plot and frequency
    // (n (m0 + m1) sines instead of 2 n m0 m1), the same arithmetic otherwise.
    let s0: Vec<f64> = (0..n * m0)
        .map(|k| {
            let (i, j0) = (k / m0, k % m0 + 1);
            (freq(j0, big_l0) * ((d.coords[i].0 - c0) + big_l0)).sin() / big_l0.sqrt()
        })
        .collect();
    let s1: Vec<f64> = (0..n * m1)
        .map(|k| {
            let (i, j1) = (k / m1, k % m1 + 1);
            (freq(j1, big_l1) * ((d.coords[i].1 - c1) + big_l1)).sin()
        })
        .collect();
    let sq_l1 = big_l1.sqrt();
    let phi = Mat::from_fn(n, m, |i, k| {
        let (j0, j1) = (k / m1, k % m1);
        s0[i * m0 + j0] * s1[i * m1 + j1] / sq_l1
    });
    let y = Mat::from_fn(n, 1, |i, _| d.y[i]);
    let x = d.x_mat();
    let ptp = phi.transpose() * &phi;
    let pty = phi.transpose() * &y;
    let ptx = phi.transpose() * &x;
    linalg::after_faer();
    BasisProducts {
        key,
        phi: Arc::new(phi),
        ptp,
        pty,
        ptx,
    }
}

impl Repr {
    /// The reduced-rank (Hilbert-space) form at length scales `l`, with the box and basis
    /// size from the rules in the module notes, capped at `max_basis` functions.
    pub fn hsgp(d: &Design, l: (f64, f64), max_basis: usize, min_boundary: f64) -> Option<Repr> {
        let n = d.n();
        let p = d.p;
        let (k_rule, g_rule) = d.kernel.basis_rule();
        let axis = |f: &dyn Fn(&(f64, f64)) -> f64| {
            let lo = d.coords.iter().map(f).fold(f64::INFINITY, f64::min);
            let hi = d.coords.iter().map(f).fold(f64::NEG_INFINITY, f64::max);
            (0.5 * (lo + hi), (0.5 * (hi - lo)).max(1.0))
        };
        let (c0, s0) = axis(&|c| c.0);
        let (c1, s1) = axis(&|c| c.1);
        let bf0 = min_boundary.max(g_rule * l.0 / s0);
        let bf1 = min_boundary.max(g_rule * l.1 / s1);
        let mut m0 = ((k_rule * bf0 * s0 / l.0).ceil() as usize).max(2);
        let mut m1 = ((k_rule * bf1 * s1 / l.1).ceil() as usize).max(2);
        let mut capped = false;
        if m0 * m1 > max_basis {
            let f = (max_basis as f64 / (m0 * m1) as f64).sqrt();
            m0 = ((m0 as f64 * f).floor() as usize).max(2);
            m1 = ((m1 as f64 * f).floor() as usize).max(2);
            capped = true;
        }
        let (big_l0, big_l1) = (bf0 * s0, bf1 * s1);
        let m = m0 * m1;
        let freq = |j: usize, big_l: f64| std::f64::consts::PI * j as f64 / (2.0 * big_l);
        let key = (m0, m1, big_l0.to_bits(), big_l1.to_bits());
        // The latest used first: a hit moves to the front.
        let cached = {
            let mut cache = lock_cache(&d.basis_cache);
            cache.iter().position(|b| b.key == key).map(|i| {
                let b = cache.remove(i);
                cache.insert(0, b.clone());
                b
            })
        };
        let products = match cached {
            Some(b) => b,
            None => {
                let b = Arc::new(basis_products(d, key, (c0, c1)));
                let mut cache = lock_cache(&d.basis_cache);
                cache.insert(0, b.clone());
                cache.truncate(CACHED_BASES);
                b
            }
        };
        let sq: Vec<f64> = (0..m)
            .map(|k| {
                let (j0, j1) = (k / m1 + 1, k % m1 + 1);
                d.kernel
                    .spectral_density((freq(j0, big_l0), freq(j1, big_l1)), l)
                    .sqrt()
            })
            .collect();
        let ptp = &products.ptp;
        let wm = Mat::from_fn(m, m, |a, b| sq[a] * ptp[(a, b)] * sq[b]);
        let e = wm.self_adjoint_eigen(Side::Lower).ok()?;
        let s = e.S().column_vector();
        let wmax = (0..m).map(|i| s[i]).fold(0.0, f64::max);
        let keep: Vec<usize> = (0..m).filter(|&i| s[i] > 1e-12 * wmax).collect();
        let r = keep.len();
        let q = e.U();
        let bmat = Mat::from_fn(m, r, |a, k| sq[a] * q[(a, keep[k])] / s[keep[k]].sqrt());
        let y = Mat::from_fn(n, 1, |i, _| d.y[i]);
        let x = d.x_mat();
        let uy_m = bmat.transpose() * &products.pty;
        let ux_m = bmat.transpose() * &products.ptx;
        let uy: Vec<f64> = (0..r).map(|i| uy_m[(i, 0)]).collect();
        let ux: Vec<f64> = (0..r * p).map(|k| ux_m[(k / p, k % p)]).collect();
        let yy: f64 = d.y.iter().map(|v| v * v).sum();
        let xtx = x.transpose() * &x;
        let xty = x.transpose() * &y;
        linalg::after_faer();
        let mut xx_c = vec![0.0; p * p];
        let mut xy_c = vec![0.0; p];
        for a in 0..p {
            xy_c[a] = xty[(a, 0)] - (0..r).map(|i| ux[i * p + a] * uy[i]).sum::<f64>();
            for b in 0..p {
                xx_c[a * p + b] =
                    xtx[(a, b)] - (0..r).map(|i| ux[i * p + a] * ux[i * p + b]).sum::<f64>();
            }
        }
        Some(Repr {
            n,
            p,
            groups: d.groups.clone(),
            w: keep.iter().map(|&i| s[i]).collect(),
            yy_c: (yy - uy.iter().map(|v| v * v).sum::<f64>()).max(0.0),
            uy,
            uxt: transposed(&ux_m, p),
            ux,
            xx_c,
            xy_c,
            exact_l: None,
            full: Default::default(),
            u_made: Default::default(),
            phi_b: Some((products.phi.clone(), bmat)),
            basis: Some((m0, m1, capped)),
        })
    }
}
