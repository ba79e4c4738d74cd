//! Spatial covariance functions: one file per kernel, one list ([`KERNELS`]).
//!
//! A kernel gives its covariance at a distance (Rasmussen & Williams 2006, eq. 4.9 and
//! 4.16-4.17), its isotropic spectral density at unit length scale (R&W 2006 eq. 4.15 and
//! 4.20), used by the reduced-rank form in `spectral`, and the constants of its basis-size
//! rule (Riutort-Mayol et al. 2023). [`Kernel`] is the choice `adjust.kernel` names.
//!
//! To add a kernel: write `kernel/<name>.rs` with a unit struct implementing [`Covariance`]
//! and a test of its covariance against a hand value and of its density (integrating to the
//! variance), then add one line to [`KERNELS`].

mod matern12;
mod matern32;
mod matern52;
mod squared_exponential;

pub use matern52::matern52;

/// Every kernel `adjust.kernel` can name. Register a new kernel here (one line).
pub static KERNELS: &[&dyn Covariance] = &[
    &matern12::Matern12,
    &matern32::Matern32,
    &matern52::Matern52,
    &squared_exponential::SquaredExponential,
];

/// A stationary isotropic covariance function.
pub trait Covariance: Sync {
    /// The name used in `adjust.kernel`.
    fn name(&self) -> &'static str;
    /// Covariance at distance `d` for length scale `range` and SD `sd`.
    fn cov(&self, d: f64, range: f64, sd: f64) -> f64;
    /// Unit-variance spectral density in two dimensions at unit length scale, as a function
    /// of the squared angular frequency r^2.
    fn unit_density(&self, r2: f64) -> f64;
    /// (k, g) of the basis-size rule for the reduced-rank form (see `spectral`).
    fn basis_rule(&self) -> (f64, f64);
}

/// Matern nu spectral density in two dimensions at unit length scale:
/// 4 pi nu (2 nu)^nu (2 nu + r^2)^-(nu + 1) (R&W 2006 eq. 4.15 with D = 2).
pub fn matern_density(nu: f64, r2: f64) -> f64 {
    4.0 * std::f64::consts::PI * nu * (2.0 * nu).powf(nu) * (2.0 * nu + r2).powf(-(nu + 1.0))
}

/// The kernel chosen by `adjust.kernel` (one of [`KERNELS`]).
#[derive(Clone, Copy)]
pub struct Kernel(&'static dyn Covariance);

#[allow(non_upper_case_globals)]
impl Kernel {
    /// Matern 1/2 (exponential).
    pub const Matern12: Kernel = Kernel(&matern12::Matern12);
    /// Matern 3/2.
    pub const Matern32: Kernel = Kernel(&matern32::Matern32);
    /// Matern 5/2.
    pub const Matern52: Kernel = Kernel(&matern52::Matern52);
    /// Squared exponential.
    pub const SquaredExponential: Kernel = Kernel(&squared_exponential::SquaredExponential);

    /// The kernel named `name` in [`KERNELS`].
    pub fn from_name(name: &str) -> Option<Kernel> {
        KERNELS
            .iter()
            .find(|k| k.name() == name)
            .map(|k| Kernel(*k))
    }
    /// Its name in `adjust.kernel`.
    pub fn name(self) -> &'static str {
        self.0.name()
    }
    /// Covariance at distance `d`.
    pub fn cov(self, d: f64, range: f64, sd: f64) -> f64 {
        self.0.cov(d, range, sd)
    }
    /// Unit-variance spectral density in two dimensions at angular frequency (w0, w1) with
    /// length scales (l0, l1), anisotropy by scaling each axis: l0 l1 S_1(|(l0 w0, l1 w1)|).
    pub fn spectral_density(self, w: (f64, f64), l: (f64, f64)) -> f64 {
        let r2 = (l.0 * w.0).powi(2) + (l.1 * w.1).powi(2);
        l.0 * l.1 * self.0.unit_density(r2)
    }
    /// (k, g) of its basis-size rule.
    pub fn basis_rule(self) -> (f64, f64) {
        self.0.basis_rule()
    }
}

impl PartialEq for Kernel {
    fn eq(&self, other: &Kernel) -> bool {
        self.name() == other.name()
    }
}

impl std::fmt::Debug for Kernel {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "Kernel({})", self.name())
    }
}

impl serde::Serialize for Kernel {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(self.name())
    }
}

impl<'de> serde::Deserialize<'de> for Kernel {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        let text = <String as serde::Deserialize>::deserialize(d)?;
        Kernel::from_name(&text).ok_or_else(|| {
            let names: Vec<&str> = KERNELS.iter().map(|k| k.name()).collect();
            <D::Error as serde::de::Error>::custom(crate::choice::refusal(&names, &text))
        })
    }
}

#[cfg(test)]
pub(crate) mod testing {
    use super::Kernel;

    /// The kernel's unit-variance spectral density integrated over the plane at length
    /// scale 1.7 (midpoint rule out to |w| = 60 in polar form), divided by (2 pi)^2: the
    /// variance, 1 (R&W 2006 eq. 4.6 at d = 0).
    pub fn integrated_density(k: Kernel) -> f64 {
        let (n_r, w_max, l) = (20_000, 60.0, 1.7);
        let h = w_max / n_r as f64;
        let mut s = 0.0;
        for i in 0..n_r {
            let r = (i as f64 + 0.5) * h;
            s += k.spectral_density((r, 0.0), (l, l)) * 2.0 * std::f64::consts::PI * r * h;
        }
        s / (2.0 * std::f64::consts::PI).powi(2)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_are_unique_and_round_trip() {
        for k in KERNELS {
            assert_eq!(Kernel::from_name(k.name()).unwrap().name(), k.name());
        }
        let mut n: Vec<&str> = KERNELS.iter().map(|k| k.name()).collect();
        n.sort();
        n.dedup();
        assert_eq!(n.len(), KERNELS.len());
        let e = toml::Value::String("rbf".into())
            .try_into::<Kernel>()
            .unwrap_err()
            .to_string();
        assert!(
            e.starts_with("must be \"matern12\", \"matern32\", \"matern52\" or"),
            "{e}"
        );
    }
}
