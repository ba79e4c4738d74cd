//! Squared exponential: s^2 exp(-d^2 / (2 l^2)) (R&W 2006 eq. 4.9); spectral density
//! 2 pi exp(-r^2 / 2) in two dimensions at unit length scale (R&W 2006 eq. 4.20).
//! Basis-size rule constants (1.75, 3.2): Riutort-Mayol et al. 2023 (constants from memory, as in
//! `spectral`).

use super::Covariance;

pub struct SquaredExponential;

impl Covariance for SquaredExponential {
    fn name(&self) -> &'static str {
        "squared_exponential"
    }
    fn cov(&self, d: f64, range: f64, sd: f64) -> f64 {
        sd * sd * (-0.5 * (d / range).powi(2)).exp()
    }
    fn unit_density(&self, r2: f64) -> f64 {
        2.0 * std::f64::consts::PI * (-0.5 * r2).exp()
    }
    fn basis_rule(&self) -> (f64, f64) {
        (1.75, 3.2)
    }
}

#[cfg(test)]
mod tests {
    use super::super::{testing::integrated_density, Kernel};

    #[test]
    fn covariance_and_density_by_hand() {
        // exp(-1/2) = 0.606 530 7 at d = l.
        assert!((Kernel::SquaredExponential.cov(10.0, 10.0, 1.0) - 0.606_530_7).abs() < 1e-6);
        let v = integrated_density(Kernel::SquaredExponential);
        assert!((v - 1.0).abs() < 1e-5, "{v}");
    }
}
