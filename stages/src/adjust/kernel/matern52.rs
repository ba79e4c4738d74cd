//! Matern 5/2: s^2 (1 + sqrt5 d/l + 5 d^2/(3 l^2)) exp(-sqrt5 d/l) (R&W 2006 eq. 4.17).
//! Basis-size rule constants (2.65, 4.1): Riutort-Mayol et al. 2023 (constants from memory, as in
//! `spectral`).

use super::{matern_density, Covariance};

pub struct Matern52;

/// Matern 5/2 covariance at distance `d` (R&W 2006 eq. 4.17).
pub fn matern52(d: f64, range: f64, sd: f64) -> f64 {
    let r = 5f64.sqrt() * d / range;
    sd * sd * (1.0 + r + r * r / 3.0) * (-r).exp()
}

impl Covariance for Matern52 {
    fn name(&self) -> &'static str {
        "matern52"
    }
    fn cov(&self, d: f64, range: f64, sd: f64) -> f64 {
        matern52(d, range, sd)
    }
    fn unit_density(&self, r2: f64) -> f64 {
        matern_density(2.5, r2)
    }
    fn basis_rule(&self) -> (f64, f64) {
        (2.65, 4.1)
    }
}

#[cfg(test)]
mod tests {
    use super::super::{testing::integrated_density, Kernel};

    #[test]
    fn density_integrates_to_the_variance() {
        let v = integrated_density(Kernel::Matern52);
        assert!((v - 1.0).abs() < 0.01, "{v}");
    }
}
