//! The simulated field's ground: a smooth random trend, the local frame of each field, and
//! times as ISO 8601.

use crate::util::Rng;

/// Metres per degree of latitude on the local tangent plane (mean Earth radius 6 371 km).
const M_PER_DEG: f64 = 6_371_000.0 * std::f64::consts::PI / 180.0;

/// A smooth random field: random Fourier features of a squared-exponential kernel.
pub(super) struct Trend {
    w: Vec<(f64, f64, f64)>,
    sd: f64,
}

impl Trend {
    pub(super) fn new(rng: &mut Rng, length_m: f64, sd: f64) -> Self {
        let w = (0..300)
            .map(|_| {
                (
                    rng.normal() / length_m,
                    rng.normal() / length_m,
                    rng.range(0.0, 2.0 * std::f64::consts::PI),
                )
            })
            .collect();
        Trend { w, sd }
    }
    pub(super) fn at(&self, x: f64, y: f64) -> f64 {
        let m = self.w.len() as f64;
        self.sd
            * (2.0 / m).sqrt()
            * self
                .w
                .iter()
                .map(|(a, b, c)| (a * x + b * y + c).cos())
                .sum::<f64>()
    }
}

/// One field's geometry: origin, bearing and the local frame (u along travel, v across).
pub(super) struct Frame {
    pub(super) lon0: f64,
    pub(super) lat0: f64,
    pub(super) sin: f64,
    pub(super) cos: f64,
}

impl Frame {
    /// East and north metres of local (u, v).
    pub(super) fn en(&self, u: f64, v: f64) -> (f64, f64) {
        (u * self.sin + v * self.cos, u * self.cos - v * self.sin)
    }
    pub(super) fn lonlat(&self, u: f64, v: f64) -> (f64, f64) {
        let (e, n) = self.en(u, v);
        (
            self.lon0 + e / (M_PER_DEG * self.lat0.to_radians().cos()),
            self.lat0 + n / M_PER_DEG,
        )
    }
}

/// ISO 8601 UTC from seconds since the epoch (Hinnant's `civil_from_days`).
pub fn iso(t: f64) -> String {
    let secs = t.floor() as i64;
    let days = secs.div_euclid(86_400);
    let rem = secs.rem_euclid(86_400);
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + if m <= 2 { 1 } else { 0 };
    format!(
        "{y:04}-{m:02}-{d:02}T{:02}:{:02}:{:02}Z",
        rem / 3600,
        rem / 60 % 60,
        rem % 60
    )
}
