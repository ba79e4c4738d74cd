//! Matern 1/2 (exponential): s^2 exp(-d/l) (R&W 2006 eq. 4.9 with nu = 1/2).
//! Basis-size rule: no published constants for nu = 1/2; (6.0, 5.0) is an own, generous
//! choice (the reduced-rank form needs many functions for this rough kernel).

use super::{matern_density, Covariance};

pub struct Matern12;

impl Covariance for Matern12 {
    fn name(&self) -> &'static str {
        "matern12"
    }
    fn cov(&self, d: f64, range: f64, sd: f64) -> f64 {
        sd * sd * (-d / range).exp()
    }
    fn unit_density(&self, r2: f64) -> f64 {
        matern_density(0.5, r2)
    }
    fn basis_rule(&self) -> (f64, f64) {
        (6.0, 5.0)
    }
}

#[cfg(test)]
mod tests {
    use super::super::{testing::integrated_density, Kernel};

    #[test]
    fn covariance_and_density_by_hand() {
        // exp(-1) = 0.367 879 4 at d = l.
        assert!((Kernel::Matern12.cov(10.0, 10.0, 1.0) - 0.367_879_4).abs() < 1e-6);
        // The density's slow tail (r^-3) leaves about 2 % beyond |w| = 60 at l = 1.7.
        let v = integrated_density(Kernel::Matern12);
        assert!((v - 1.0).abs() < 0.03, "{v}");
    }
}
