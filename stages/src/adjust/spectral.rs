//! The spatial covariance at one length scale, in spectral form, and the likelihood of the
//! plot yields at any spatial and noise SD from it.
//!
//! For a fixed length scale the unit-variance kernel matrix is written K1 = U diag(w) U'
//! with orthonormal U (n x r). Then K_y = s_f^2 K1 + s_n^2 I has eigenvalues s_f^2 w_i + s_n^2
//! on U and s_n^2 on its complement, so every likelihood evaluation over (s_f, s_n) costs
//! O(r p^2) once U'y and U'X are known, instead of a new O(n^3) factorisation.
//!
//! - Exact: U and w from the symmetric eigendecomposition of K1 (r = n).
//! - Reduced rank (Hilbert-space GP, Solin & Sarkka 2020, Statistics and Computing 30:419):
//!   K1 ~ Phi S Phi' with Phi the Laplacian eigenfunctions of a box around the plots and S the
//!   kernel's spectral density at their frequencies. With W = S^1/2 Phi'Phi S^1/2 = Q diag(w) Q',
//!   U = Phi S^1/2 Q diag(w)^-1/2 is orthonormal, so the same algebra applies with r = the
//!   number of basis functions. The box's boundary factor c and the basis size m per axis
//!   follow the rules of Riutort-Mayol et al. 2023 (Statistics and Computing 33:17), constants
//!   from memory: m >= k c S / l and c >= g l / S with (k, g) = (1.75, 3.2) squared exponential,
//!   (3.42, 4.5) Matern 3/2, (2.65, 4.1) Matern 5/2; Matern 1/2 is outside their tables and
//!   uses (6, 5) (own choice; its accuracy is measured in the tests).

use super::linalg;
use super::Kernel;
pub use basis::BasisCache;
use faer::Mat;
use std::sync::Arc;

/// How the kernel matrix is represented.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Method {
    Exact,
    /// Reduced rank with at most this many basis functions and this minimum boundary factor.
    Hsgp {
        max_basis: usize,
        min_boundary: f64,
    },
}

/// A field's yields, design and coordinates, as the spectral algebra needs them.
#[derive(Clone, Debug)]
pub struct Design {
    pub y: Vec<f64>,
    /// n x p, row major.
    pub x: Vec<f64>,
    pub p: usize,
    /// Plot positions in the kernel's axes (metres).
    pub coords: Vec<(f64, f64)>,
    pub kernel: Kernel,
    /// Random design effects (rows, columns, incomplete blocks): each a run of indicator
    /// columns at the end of X, (first column, number of levels), with a Gaussian prior
    /// N(0, s_g^2) on its levels. The columns before them have flat priors.
    pub groups: Vec<(usize, usize)>,
    /// The last reduced-rank basis's products that do not depend on the length scale (see
    /// [`BasisCache`]); empty in a new design and in a clone.
    pub basis_cache: BasisCache,
}

impl Design {
    pub fn n(&self) -> usize {
        self.y.len()
    }
    /// Mean parameters with flat priors (the columns before the random groups).
    pub fn p_fixed(&self) -> usize {
        self.groups.first().map_or(self.p, |g| g.0)
    }
    fn x_mat(&self) -> Mat<f64> {
        Mat::from_fn(self.n(), self.p, |i, j| self.x[i * self.p + j])
    }
}

/// The kernel at one length scale in spectral form (see the module notes).
pub struct Repr {
    pub n: usize,
    pub p: usize,
    /// Random groups of the design (see [`Design::groups`]).
    pub groups: Vec<(usize, usize)>,
    /// Eigenvalues of the unit-variance kernel on U.
    pub w: Vec<f64>,
    /// U' y and U' X (r x p, row major).
    pub uy: Vec<f64>,
    pub ux: Vec<f64>,
    /// U' X column by column (p x r, row major), for designs with many mean parameters.
    uxt: Vec<f64>,
    /// y'y - |U'y|^2, X'X - (U'X)'(U'X), X'y - (U'X)'U'y (zero for the exact form).
    pub yy_c: f64,
    pub xx_c: Vec<f64>,
    pub xy_c: Vec<f64>,
    /// Exact: the length scales; U and the eigenvalues and U'X that go with it are made from
    /// the design when first asked for (see [`Full`]). Reduced rank: Phi (n x m) and
    /// S^1/2 Q diag(w)^-1/2 (m x r); U = Phi B, made when first asked for (the spatial effects
    /// at every lattice point of this length scale share it; an n m r product each time was
    /// most of a large field's fit).
    exact_l: Option<(f64, f64)>,
    full: std::sync::OnceLock<Option<Full>>,
    phi_b: Option<(Arc<Mat<f64>>, Mat<f64>)>,
    u_made: std::sync::OnceLock<Mat<f64>>,
    /// Reduced rank: basis functions per axis and whether the size cap bound.
    pub basis: Option<(usize, usize, bool)>,
}

/// An exact form's eigendecomposition with its eigenvectors: U, its eigenvalues and U'X (r x p,
/// row major), from one decomposition (the likelihood's w and U'X come from the projections
/// of [`projected::eigen_projected`], equal to these up to rounding; the spatial effects take
/// all three from here, so that they are consistent with each other).
struct Full {
    u: Mat<f64>,
    w: Vec<f64>,
    ux: Vec<f64>,
}

/// Everything at one (s_f, s_n) given the length scale.
#[derive(Clone, Debug)]
pub struct Inner {
    /// REML log marginal likelihood (flat prior on the mean parameters).
    pub reml: f64,
    /// GLS estimate of the mean parameters and its covariance (p x p, row major).
    pub b: Vec<f64>,
    pub cov: Vec<f64>,
}

/// U'X column by column (p x r, row major).
fn transposed(ux: &Mat<f64>, p: usize) -> Vec<f64> {
    let r = ux.nrows();
    (0..p * r).map(|k| ux[(k % r, k / r)]).collect()
}

/// How many eigendecompositions, likelihood evaluations and of those evaluations without the
/// covariance (the mode searches) this process has made (for the benchmarks: the work an
/// integration needs, whatever each step costs).
static WORK: [std::sync::atomic::AtomicU64; 3] = [
    std::sync::atomic::AtomicU64::new(0),
    std::sync::atomic::AtomicU64::new(0),
    std::sync::atomic::AtomicU64::new(0),
];

/// Work made so far by this process: exact spectral forms, likelihood evaluations and the
/// evaluations of those in mode searches.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct WorkCounts {
    pub eigendecompositions: u64,
    pub evaluations: u64,
    /// Evaluations without the covariance: the mode searches (Nelder-Mead and its curvature).
    pub searches: u64,
}

/// The work this process has made so far.
pub fn work_counts() -> WorkCounts {
    use std::sync::atomic::Ordering::Relaxed;
    WorkCounts {
        eigendecompositions: WORK[0].load(Relaxed),
        evaluations: WORK[1].load(Relaxed),
        searches: WORK[2].load(Relaxed),
    }
}

/// Runs `f` on this thread's n x n scratch matrix (made once per thread and size: an exact
/// kernel matrix is built for every length scale of every field).
fn with_kernel_buffer<R>(n: usize, f: impl FnOnce(&mut Mat<f64>) -> R) -> R {
    use std::cell::RefCell;
    thread_local! {
        static KERNEL: RefCell<Mat<f64>> = RefCell::new(Mat::new());
    }
    KERNEL.with(|cell| {
        let mut m = cell.borrow_mut();
        if m.nrows() != n {
            *m = Mat::zeros(n, n);
        }
        f(&mut m)
    })
}

/// The unit-variance kernel matrix of `d`'s plots at length scales `l`, its lower triangle
/// only (the eigendecompositions read no other; the upper one of the reused matrix keeps
/// whatever an earlier length scale left there).
fn fill_kernel(k1: &mut Mat<f64>, d: &Design, l: (f64, f64)) {
    let n = d.n();
    for j in 0..n {
        let b = d.coords[j];
        for (i, v) in k1.col_mut(j).iter_mut().enumerate().skip(j) {
            let a = d.coords[i];
            let h = (((a.0 - b.0) / l.0).powi(2) + ((a.1 - b.1) / l.1).powi(2)).sqrt();
            *v = d.kernel.cov(h, 1.0, 1.0);
        }
    }
}

/// Runs `f` on this thread's faer scratch buffer, made (or made larger) when it is not large
/// and aligned enough for `req`: the eigendecompositions of every length scale share it
/// instead of allocating afresh.
pub(crate) fn with_scratch<R>(
    req: faer::dyn_stack::StackReq,
    f: impl FnOnce(&mut faer::dyn_stack::MemBuffer) -> R,
) -> R {
    use faer::dyn_stack::MemBuffer;
    use std::cell::RefCell;
    thread_local! {
        static SCRATCH: RefCell<Option<MemBuffer>> = const { RefCell::new(None) };
    }
    SCRATCH.with(|cell| {
        let mut cell = cell.borrow_mut();
        let fits = |b: &MemBuffer| {
            b.len() >= req.size_bytes() && (b.as_ptr() as usize) % req.align_bytes() == 0
        };
        if !cell.as_ref().is_some_and(fits) {
            *cell = Some(MemBuffer::new(req));
        }
        f(cell.as_mut().expect("scratch was just made"))
    })
}

/// The symmetric eigendecomposition of `a` from its lower triangle, as faer's
/// `self_adjoint_eigen` computes it (same routine, parameters and parallelism), with its
/// scratch memory kept per thread ([`with_scratch`]). Returns U and the eigenvalues clamped
/// at zero.
fn eigen_lower(a: faer::MatRef<'_, f64>) -> Option<(Mat<f64>, Vec<f64>)> {
    use faer::dyn_stack::MemStack;
    use faer::linalg::evd;
    let n = a.nrows();
    let par = faer::get_global_parallelism();
    let req = evd::self_adjoint_evd_scratch::<f64>(
        n,
        evd::ComputeEigenvectors::Yes,
        par,
        Default::default(),
    );
    let mut u = Mat::<f64>::zeros(n, n);
    let mut s = faer::diag::Diag::<f64>::zeros(n);
    let ev = with_scratch(req, |buf| {
        evd::self_adjoint_evd(
            a,
            s.as_mut(),
            Some(u.as_mut()),
            par,
            MemStack::new(buf),
            Default::default(),
        )
        .ok()
    });
    linalg::after_faer();
    ev?;
    let sv = s.column_vector();
    let w = (0..n).map(|i| sv[i].max(0.0)).collect();
    Some((u, w))
}

impl Repr {
    /// The exact spectral form of the kernel at length scales `l`: its eigenvalues and the
    /// projections U'y, U'X, without U (see [`projected`]); U is made when the spatial effects
    /// first ask for it.
    pub fn exact(d: &Design, l: (f64, f64)) -> Option<Repr> {
        let (n, p) = (d.n(), d.p);
        let z = Mat::from_fn(
            n,
            p + 1,
            |i, j| {
                if j == 0 {
                    d.y[i]
                } else {
                    d.x[i * p + j - 1]
                }
            },
        );
        WORK[0].fetch_add(1, std::sync::atomic::Ordering::Relaxed);
        let (w, proj) = with_kernel_buffer(n, |k1| {
            fill_kernel(k1, d, l);
            projected::eigen_projected(k1.as_mut(), z.as_ref())
        })?;
        let k = p + 1;
        let ux_m = Mat::from_fn(n, p, |i, j| proj[i * k + 1 + j]);
        Some(Repr {
            n,
            p,
            groups: d.groups.clone(),
            w: w.into_iter().map(|v: f64| v.max(0.0)).collect(),
            uy: (0..n).map(|i| proj[i * k]).collect(),
            ux: (0..n * p).map(|t| ux_m[(t / p, t % p)]).collect(),
            uxt: transposed(&ux_m, p),
            yy_c: 0.0,
            xx_c: vec![0.0; p * p],
            xy_c: vec![0.0; p],
            exact_l: Some(l),
            full: Default::default(),
            u_made: Default::default(),
            phi_b: None,
            basis: None,
        })
    }

    /// The exact form's eigendecomposition with U (see [`Full`]), made on first use.
    fn full(&self, d: &Design) -> Option<&Full> {
        let l = self.exact_l?;
        self.full
            .get_or_init(|| {
                let n = d.n();
                let (u, w) = with_kernel_buffer(n, |k1| {
                    fill_kernel(k1, d, l);
                    eigen_lower(k1.as_ref())
                })?;
                let ux_m = u.transpose() * d.x_mat();
                linalg::after_faer();
                let ux = (0..n * d.p).map(|k| ux_m[(k / d.p, k % d.p)]).collect();
                Some(Full { u, w, ux })
            })
            .as_ref()
    }

    /// No spatial field (rank 0): K_y = s_n^2 I, for the model without it.
    pub fn white(d: &Design) -> Repr {
        let (n, p) = (d.n(), d.p);
        let mut xx_c = vec![0.0; p * p];
        let mut xy_c = vec![0.0; p];
        for i in 0..n {
            let row = &d.x[i * p..(i + 1) * p];
            for a in 0..p {
                xy_c[a] += row[a] * d.y[i];
                for b in 0..p {
                    xx_c[a * p + b] += row[a] * row[b];
                }
            }
        }
        Repr {
            n,
            p,
            groups: d.groups.clone(),
            w: Vec::new(),
            uy: Vec::new(),
            ux: Vec::new(),
            uxt: Vec::new(),
            yy_c: d.y.iter().map(|v| v * v).sum(),
            xx_c,
            xy_c,
            exact_l: None,
            full: Default::default(),
            u_made: Default::default(),
            phi_b: None,
            basis: None,
        }
    }

    /// REML and the GLS fit at spatial SD `sf` and noise SD `sn` (see the module notes).
    /// None when a matrix is not positive definite.
    pub fn evaluate(&self, sf: f64, sn: f64) -> Option<Inner> {
        self.evaluate_groups(sf, sn, &[])
    }

    /// [`Repr::evaluate`] with random groups at SDs `sg` (one per group; none without).
    /// With u ~ N(0, D) on the group columns Z and flat priors on the others (X0), the
    /// restricted likelihood of y ~ N(X0 b, K_y + Z D Z') follows from the mixed-model
    /// equations (Henderson 1975, Biometrics 31:423; Harville 1977, JASA 72:320): with
    /// C = X'K_y^-1 X + diag(0, D^-1) and X = [X0 Z],
    ///   -2 REML = (n - p0) ln 2 pi + ln|K_y| + ln|D| + ln|C| + y'K_y^-1 y - c'C^-1 c,
    /// c = X'K_y^-1 y; C^-1 c holds the GLS estimates of b and the BLUPs of u, and C^-1
    /// their joint posterior covariance given the hyperparameters.
    pub fn evaluate_groups(&self, sf: f64, sn: f64, sg: &[f64]) -> Option<Inner> {
        self.evaluate_with(sf, sn, sg, true)
    }

    /// The REML log marginal likelihood alone (no covariance): for searches.
    pub fn reml_groups(&self, sf: f64, sn: f64, sg: &[f64]) -> Option<f64> {
        self.evaluate_with(sf, sn, sg, false).map(|e| e.reml)
    }

    fn evaluate_with(&self, sf: f64, sn: f64, sg: &[f64], want_cov: bool) -> Option<Inner> {
        WORK[1].fetch_add(1, std::sync::atomic::Ordering::Relaxed);
        if !want_cov {
            WORK[2].fetch_add(1, std::sync::atomic::Ordering::Relaxed);
        }
        let (n, p, r) = (self.n, self.p, self.w.len());
        let (vf, vn) = (sf * sf, sn * sn);
        if !(vn > 0.0) {
            return None;
        }
        let e = 1.0 / vn;
        let mut a: Vec<f64> = self.xx_c.iter().map(|v| v * e).collect();
        let mut c: Vec<f64> = self.xy_c.iter().map(|v| v * e).collect();
        let mut q = self.yy_c * e;
        let mut logdet_ky = (n - r) as f64 * vn.ln();
        let mut logs = LogSum::default();
        let mut dv = vec![0.0; r];
        for i in 0..r {
            let lam = vf * self.w[i] + vn;
            let d = 1.0 / lam;
            logs.add(lam);
            q += d * self.uy[i] * self.uy[i];
            dv[i] = d;
        }
        let du: Vec<f64> = dv.iter().zip(&self.uy).map(|(d, u)| d * u).collect();
        if p >= linalg::LARGE && r > 0 {
            // Many mean parameters: X'K_y^-1 X = (U'X)' D (U'X) as one blocked product, from
            // D U'X built column by column.
            let mut wx = Vec::with_capacity(r * p);
            for (aa, src) in self.uxt.chunks_exact(r).enumerate() {
                wx.extend(src.iter().zip(&dv).map(|(x, d)| x * d));
                c[aa] += linalg::dot(src, &du);
            }
            let mut am = faer::Mat::<f64>::zeros(p, p);
            linalg::sym_product_lower(
                am.as_mut(),
                faer::MatRef::from_column_major_slice(&self.uxt, r, p).transpose(),
                faer::MatRef::from_column_major_slice(&wx, r, p),
            );
            for aa in 0..p {
                for bb in 0..=aa {
                    a[aa * p + bb] += am[(aa, bb)];
                }
            }
        } else if r > 0 {
            // Few mean parameters: the same sums column by column, each a dot product of
            // length r (vectorised, four running sums; a row-by-row loop over p-long rows
            // was most of an evaluation's time).
            let mut wa = vec![0.0; r];
            for (aa, xa) in self.uxt.chunks_exact(r).enumerate() {
                c[aa] += linalg::dot(xa, &du);
                for (w, (x, d)) in wa.iter_mut().zip(xa.iter().zip(&dv)) {
                    *w = x * d;
                }
                for (bb, xb) in self.uxt.chunks_exact(r).take(aa + 1).enumerate() {
                    a[aa * p + bb] += linalg::dot(&wa, xb);
                }
            }
        }
        logdet_ky += logs.total();
        for aa in 0..p {
            for bb in 0..aa {
                a[bb * p + aa] = a[aa * p + bb];
            }
        }
        let mut logdet_d = 0.0;
        for (&(start, len), &s) in self.groups.iter().zip(sg) {
            let v = s * s;
            if !(v > 0.0) {
                return None;
            }
            logdet_d += len as f64 * v.ln();
            for j in start..start + len {
                a[j * p + j] += 1.0 / v;
            }
        }
        let p0 = self.groups.first().map_or(p, |g| g.0);
        let l = linalg::chol(&a, p)?;
        let mut b = c.clone();
        linalg::solve(&l, p, &mut b);
        let quad = q - c.iter().zip(&b).map(|(x, y)| x * y).sum::<f64>();
        let reml = -0.5
            * ((n - p0) as f64 * (2.0 * std::f64::consts::PI).ln()
                + logdet_ky
                + logdet_d
                + linalg::logdet(&l, p)
                + quad.max(0.0));
        Some(Inner {
            reml,
            b,
            cov: if want_cov {
                linalg::inverse(&l, p)
            } else {
                Vec::new()
            },
        })
    }

    /// U, the eigenvalues and U'X (r x p, row major) the spatial effects use: an exact form's
    /// full eigendecomposition, or a reduced-rank form's own w and U'X with U = Phi B. None
    /// when the exact form's eigendecomposition fails.
    fn parts(&self, d: &Design) -> Option<(&Mat<f64>, &[f64], &[f64])> {
        if self.exact_l.is_some() {
            return self.full(d).map(|f| (&f.u, &f.w[..], &f.ux[..]));
        }
        let (phi, b) = self.phi_b.as_ref()?;
        let u = self.u_made.get_or_init(|| {
            let u = &**phi * b;
            linalg::after_faer();
            u
        });
        Some((u, &self.w, &self.ux))
    }

    /// U (n x r), made on first use (tests).
    #[cfg(test)]
    fn u(&self, d: &Design) -> &Mat<f64> {
        self.parts(d).expect("a representation with U").0
    }

    /// Posterior mean and variance of the spatial effect at the plots given (s_f, s_n) and
    /// the GLS fit `fit`, including the uncertainty of the mean parameters (R&W 2006 eq. 2.42):
    /// mean K Ky^-1 r; variance diag(K - K Ky^-1 K + R' cov(b) R), R = X' Ky^-1 K.
    /// None when U cannot be made (an exact form's eigendecomposition fails).
    pub fn spatial(
        &self,
        d: &Design,
        sf: f64,
        sn: f64,
        fit: &Inner,
    ) -> Option<(Vec<f64>, Vec<f64>)> {
        let parts = self.spatial_parts(d, sf, sn, fit)?;
        let quad = parts.quads(&fit.cov);
        let var = (0..self.n).map(|i| parts.cond_var[i] + quad[i]).collect();
        Some((parts.mean, var))
    }

    /// The pieces of [`Repr::spatial`]: the mean at the GLS fit, the variance with the mean
    /// parameters known, and R' = K Ky^-1 X (n x p), so that other mean-parameter moments
    /// (from a joint fit) give mean + R'(b_hat - E b) and cond + diag(R' Cov b R).
    pub fn spatial_parts(&self, d: &Design, sf: f64, sn: f64, fit: &Inner) -> Option<SpatialParts> {
        let (u, w, ux) = self.parts(d)?;
        let (n, p, r) = (self.n, self.p, w.len());
        let (vf, vn) = (sf * sf, sn * sn);
        let g: Vec<f64> = w.iter().map(|w| vf * w / (vf * w + vn)).collect();
        let resid = Mat::from_fn(n, 1, |i, _| {
            d.y[i] - (0..p).map(|j| d.x[i * p + j] * fit.b[j]).sum::<f64>()
        });
        let ur = u.transpose() * &resid;
        let gur = Mat::from_fn(r, 1, |i, _| g[i] * ur[(i, 0)]);
        let mean_m = u * &gur;
        let gux = Mat::from_fn(r, p, |i, j| g[i] * ux[i * p + j]);
        let rt_m = u * &gux;
        linalg::after_faer();
        // Random groups belong to the position too: the effect at plot i is g_i + z_i'u,
        // whose mean adds z_i'u_hat and whose dependence on the mean parameters is R_i - z_i.
        let p0 = d.p_fixed();
        let mut rt: Vec<f64> = (0..n * p).map(|k| rt_m[(k / p, k % p)]).collect();
        let mut mean: Vec<f64> = (0..n).map(|i| mean_m[(i, 0)]).collect();
        if p0 < p {
            for i in 0..n {
                for j in p0..p {
                    let z = d.x[i * p + j];
                    mean[i] += z * fit.b[j];
                    rt[i * p + j] -= z;
                }
            }
        }
        Some(SpatialParts {
            p,
            mean,
            cond_var: {
                // Column by column through U (stored by columns): plot i's sum takes its terms
                // in the order k = 0, 1, ... as a row-wise sum would, from -0.0 as `Sum` does.
                let mut acc = vec![-0.0f64; n];
                for (k, gk) in g.iter().enumerate() {
                    for (a, x) in acc.iter_mut().zip(u.col(k).iter()) {
                        *a += x.powi(2) * gk * vn;
                    }
                }
                acc
            },
            rt,
        })
    }
}

/// See [`Repr::spatial_parts`].
pub struct SpatialParts {
    pub p: usize,
    pub mean: Vec<f64>,
    pub cond_var: Vec<f64>,
    /// K Ky^-1 X, n x p, row major.
    pub rt: Vec<f64>,
}

impl SpatialParts {
    /// R'_i Cov R_i for plot i and a p x p covariance of the mean parameters.
    pub fn quad(&self, i: usize, cov: &[f64]) -> f64 {
        let p = self.p;
        let row = &self.rt[i * p..(i + 1) * p];
        let mut s = 0.0;
        for a in 0..p {
            for b in 0..p {
                s += row[a] * cov[a * p + b] * row[b];
            }
        }
        s.max(0.0)
    }
    /// [`SpatialParts::quad`] for every plot (one blocked product with many parameters).
    pub fn quads(&self, cov: &[f64]) -> Vec<f64> {
        let p = self.p;
        let n = self.rt.len() / p.max(1);
        if p < linalg::LARGE {
            return (0..n).map(|i| self.quad(i, cov)).collect();
        }
        let mut rc = faer::Mat::<f64>::zeros(n, p);
        let rt = faer::MatRef::from_row_major_slice(&self.rt, n, p);
        faer::linalg::matmul::matmul(
            rc.as_mut(),
            faer::Accum::Replace,
            rt,
            faer::MatRef::from_row_major_slice(cov, p, p),
            1.0,
            faer::Par::Seq,
        );
        linalg::after_faer();
        (0..n)
            .map(|i| {
                let row = &self.rt[i * p..(i + 1) * p];
                let s: f64 = (0..p).map(|a| rc[(i, a)] * row[a]).sum();
                s.max(0.0)
            })
            .collect()
    }
    /// R'_i (b_hat - E b): the mean's shift for other mean-parameter means.
    pub fn shift(&self, i: usize, b_hat: &[f64], mean_b: &[f64]) -> f64 {
        let p = self.p;
        (0..p)
            .map(|a| self.rt[i * p + a] * (b_hat[a] - mean_b[a]))
            .sum()
    }
}

/// A sum of logarithms of positive numbers, taken as the logarithm of their products eight at
/// a time: one logarithm per eight numbers instead of one each (the likelihood's log
/// determinant takes one per eigenvalue at every evaluation, the largest single cost of a
/// fit). A product of eight numbers between 1e-38 and 1e38 stays a normal number; a chunk
/// whose product is not (0, subnormal or infinite) is summed one logarithm at a time. The sum
/// differs from the plain sum of logarithms only in rounding.
#[derive(Default)]
pub(crate) struct LogSum {
    sum: f64,
    chunk: [f64; 8],
    k: usize,
}

impl LogSum {
    /// Add ln(x), x > 0.
    pub(crate) fn add(&mut self, x: f64) {
        self.chunk[self.k] = x;
        self.k += 1;
        if self.k == 8 {
            self.flush();
        }
    }

    fn flush(&mut self) {
        let part = &self.chunk[..self.k];
        let prod: f64 = part.iter().product();
        self.sum += if prod.is_normal() {
            prod.ln()
        } else {
            part.iter().map(|x| x.ln()).sum()
        };
        self.k = 0;
    }

    /// The sum of the logarithms added.
    pub(crate) fn total(mut self) -> f64 {
        self.flush();
        self.sum
    }
}

mod basis;
mod projected;

#[cfg(test)]
mod tests;
