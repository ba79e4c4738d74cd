//! Matern 3/2: s^2 (1 + sqrt3 d/l) exp(-sqrt3 d/l) (R&W 2006 eq. 4.17).
//! Basis-size rule constants (3.42, 4.5): Riutort-Mayol et al. 2023 (constants from memory, as in
//! `spectral`).

use super::{matern_density, Covariance};

pub struct Matern32;

impl Covariance for Matern32 {
    fn name(&self) -> &'static str {
        "matern32"
    }
    fn cov(&self, d: f64, range: f64, sd: f64) -> f64 {
        let r = 3f64.sqrt() * d / range;
        sd * sd * (1.0 + r) * (-r).exp()
    }
    fn unit_density(&self, r2: f64) -> f64 {
        matern_density(1.5, r2)
    }
    fn basis_rule(&self) -> (f64, f64) {
        (3.42, 4.5)
    }
}

#[cfg(test)]
mod tests {
    use super::super::{testing::integrated_density, Kernel};

    #[test]
    fn covariance_and_density_by_hand() {
        // (1 + sqrt 3) exp(-sqrt 3) = 0.483 357 7 at d = l.
        assert!((Kernel::Matern32.cov(10.0, 10.0, 1.0) - 0.483_357_7).abs() < 1e-6);
        let v = integrated_density(Kernel::Matern32);
        assert!((v - 1.0).abs() < 0.01, "{v}");
    }
}
