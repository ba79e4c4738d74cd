//! Small numerical helpers shared by the stages: a seeded random number generator, robust
//! statistics and the normal distribution function.
//!
//! The generator is implemented here (SplitMix64 seeding xoshiro256++, Blackman & Vigna
//! 2018) rather than taken from a crate so that a seed gives the same simulated trial on
//! every platform and every future build.

/// Seeded pseudo-random generator (xoshiro256++), reproducible across platforms.
#[derive(Clone, Debug)]
pub struct Rng {
    s: [u64; 4],
}

impl Rng {
    /// A generator whose whole stream is fixed by `seed`.
    pub fn new(seed: u64) -> Self {
        let mut z = seed;
        let mut next = || {
            // SplitMix64 (Steele, Lea & Flood 2014), the seeding recommended for xoshiro.
            z = z.wrapping_add(0x9E37_79B9_7F4A_7C15);
            let mut x = z;
            x = (x ^ (x >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
            x = (x ^ (x >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
            x ^ (x >> 31)
        };
        Rng {
            s: [next(), next(), next(), next()],
        }
    }

    /// Next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        let s = &mut self.s;
        let result = (s[0].wrapping_add(s[3])).rotate_left(23).wrapping_add(s[0]);
        let t = s[1] << 17;
        s[2] ^= s[0];
        s[3] ^= s[1];
        s[1] ^= s[2];
        s[0] ^= s[3];
        s[2] ^= t;
        s[3] = s[3].rotate_left(45);
        result
    }

    /// Uniform on [0, 1).
    pub fn uniform(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }

    /// Uniform on [lo, hi).
    pub fn range(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * self.uniform()
    }

    /// Uniform integer in 0..n.
    pub fn below(&mut self, n: usize) -> usize {
        ((self.uniform() * n as f64) as usize).min(n.saturating_sub(1))
    }

    /// Standard normal draw (Box-Muller).
    pub fn normal(&mut self) -> f64 {
        let u1 = 1.0 - self.uniform();
        let u2 = self.uniform();
        (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
    }

    /// Fisher-Yates shuffle.
    pub fn shuffle<T>(&mut self, v: &mut [T]) {
        for i in (1..v.len()).rev() {
            let j = self.below(i + 1);
            v.swap(i, j);
        }
    }
}

/// Median of a slice (NaNs must be removed first). Empty gives NaN.
pub fn median(values: &[f64]) -> f64 {
    median_mut(&mut values.to_vec())
}

/// [`median`] of values that may be reordered (no copy): the same value as sorting them by
/// `total_cmp` and taking the middle (or the mean of the two middle values), found by
/// selection in linear time.
pub fn median_mut(v: &mut [f64]) -> f64 {
    let n = v.len();
    if n == 0 {
        return f64::NAN;
    }
    let (lower, mid, _) = v.select_nth_unstable_by(n / 2, |a, b| a.total_cmp(b));
    let mid = *mid;
    if n % 2 == 1 {
        mid
    } else {
        // The largest of the lower half is the sorted (n/2 - 1)-th value.
        let below = lower
            .iter()
            .copied()
            .max_by(|a, b| a.total_cmp(b))
            .expect("n >= 2");
        0.5 * (below + mid)
    }
}

/// Median absolute deviation from the median (unscaled).
pub fn mad(values: &[f64], center: f64) -> f64 {
    let mut dev: Vec<f64> = values.iter().map(|v| (v - center).abs()).collect();
    median_mut(&mut dev)
}

/// Arithmetic mean; empty gives NaN.
pub fn mean(values: &[f64]) -> f64 {
    if values.is_empty() {
        return f64::NAN;
    }
    values.iter().sum::<f64>() / values.len() as f64
}

/// Sample standard deviation (n - 1); fewer than two values give NaN.
pub fn sd(values: &[f64]) -> f64 {
    if values.len() < 2 {
        return f64::NAN;
    }
    let m = mean(values);
    (values.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (values.len() - 1) as f64).sqrt()
}

/// Pearson correlation of two equally long slices.
pub fn correlation(a: &[f64], b: &[f64]) -> f64 {
    let (ma, mb) = (mean(a), mean(b));
    let mut sab = 0.0;
    let mut saa = 0.0;
    let mut sbb = 0.0;
    for (x, y) in a.iter().zip(b) {
        sab += (x - ma) * (y - mb);
        saa += (x - ma).powi(2);
        sbb += (y - mb).powi(2);
    }
    sab / (saa * sbb).sqrt()
}

/// Complementary error function. Chebyshev fit with fractional error below 1.2e-7
/// everywhere (Press et al., Numerical Recipes, 2nd ed., section 6.2, `erfcc`).
pub fn erfc(x: f64) -> f64 {
    let z = x.abs();
    let t = 1.0 / (1.0 + 0.5 * z);
    let ans = t
        * (-z * z - 1.26551223
            + t * (1.00002368
                + t * (0.37409196
                    + t * (0.09678418
                        + t * (-0.18628806
                            + t * (0.27886807
                                + t * (-1.13520398
                                    + t * (1.48851587 + t * (-0.82215223 + t * 0.17087277)))))))))
            .exp();
    if x >= 0.0 {
        ans
    } else {
        2.0 - ans
    }
}

/// Standard normal distribution function Phi(x).
pub fn normal_cdf(x: f64) -> f64 {
    0.5 * erfc(-x / std::f64::consts::SQRT_2)
}

/// Upper-tail normal quantile z with P(Z > z) = p, to about 4.5e-4 (Abramowitz & Stegun
/// 1964, 26.2.23): a starting point for exact solvers, not a result.
pub fn normal_quantile_approx(p: f64) -> f64 {
    let (pp, sign) = if p > 0.5 { (1.0 - p, -1.0) } else { (p, 1.0) };
    let t = (-2.0 * pp.max(1e-300).ln()).sqrt();
    let z = t
        - (2.515_517 + 0.802_853 * t + 0.010_328 * t * t)
            / (1.0 + 1.432_788 * t + 0.189_269 * t * t + 0.001_308 * t * t * t);
    sign * z
}

/// Format a float for tables: fixed decimals, so that reruns give identical bytes.
pub fn fmt(v: f64, decimals: usize) -> String {
    if v.is_nan() {
        String::new()
    } else {
        format!("{:.*}", decimals, v)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Selection gives the sorted middle exactly: every length 1-40, random values with
    /// ties, signed zeros and infinities, against sorting by `total_cmp`.
    #[test]
    fn median_by_selection_equals_the_sorted_middle() {
        let mut r = Rng::new(3);
        for n in 1..=40 {
            for _ in 0..50 {
                let v: Vec<f64> = (0..n)
                    .map(|_| match r.below(8) {
                        0 => 0.0,
                        1 => -0.0,
                        2 => f64::INFINITY,
                        3 => (r.below(3) as f64) * 0.5,
                        _ => r.normal(),
                    })
                    .collect();
                let mut s = v.clone();
                s.sort_by(|a, b| a.total_cmp(b));
                let want = if n % 2 == 1 {
                    s[n / 2]
                } else {
                    0.5 * (s[n / 2 - 1] + s[n / 2])
                };
                let got = median(&v);
                assert!(
                    got.to_bits() == want.to_bits() || (got.is_nan() && want.is_nan()),
                    "{v:?}: {got} vs {want}"
                );
            }
        }
        assert!(median(&[]).is_nan());
    }

    #[test]
    fn rng_is_reproducible_and_uniform() {
        let mut a = Rng::new(7);
        let mut b = Rng::new(7);
        let xs: Vec<f64> = (0..10_000).map(|_| a.uniform()).collect();
        let ys: Vec<f64> = (0..10_000).map(|_| b.uniform()).collect();
        assert_eq!(xs, ys);
        let m = mean(&xs);
        assert!((m - 0.5).abs() < 0.01, "mean of uniforms {m}");
    }

    #[test]
    fn normal_draws_have_unit_variance() {
        let mut r = Rng::new(3);
        let xs: Vec<f64> = (0..50_000).map(|_| r.normal()).collect();
        assert!(mean(&xs).abs() < 0.02);
        assert!((sd(&xs) - 1.0).abs() < 0.02);
    }

    #[test]
    fn median_and_mad_by_hand() {
        // 1 2 3 4 100: median 3, deviations 2 1 0 1 97 -> MAD 1.
        let v = [4.0, 1.0, 100.0, 3.0, 2.0];
        assert_eq!(median(&v), 3.0);
        assert_eq!(mad(&v, 3.0), 1.0);
        assert_eq!(median(&[1.0, 2.0, 3.0, 4.0]), 2.5);
    }

    #[test]
    fn normal_cdf_known_values() {
        // Standard normal table values (any statistics handbook): Phi(1.96) = 0.975002,
        // Phi(1) = 0.841345, Phi(0) = 0.5.
        assert!((normal_cdf(1.96) - 0.9750021).abs() < 1e-6);
        assert!((normal_cdf(1.0) - 0.8413447).abs() < 1e-6);
        assert!((normal_cdf(0.0) - 0.5).abs() < 1e-7);
        assert!((normal_cdf(-1.0) - 0.1586553).abs() < 1e-6);
    }
}
