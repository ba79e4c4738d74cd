//! `yield_outlier`: per export, yield at standard moisture far from the rest:
//! |Y - median| > `k_mad` x 1.4826 x MAD (`clean.outlier.method = "mad"`; 1.4826 makes the
//! MAD estimate a normal SD), or outside Tukey's fences Q1 - k IQR .. Q3 + k IQR
//! (`"tukey"`; Tukey 1977, "Exploratory Data Analysis").

use super::{Export, Needs, Rule};
use crate::clean::settings::OutlierMethod;
use crate::util::{mad, median};

pub struct YieldOutlier;

/// Tukey's fences Q1 - k IQR .. Q3 + k IQR (quartiles by linear interpolation).
pub fn tukey_fences(values: &[f64], k: f64) -> (f64, f64) {
    let mut v = values.to_vec();
    v.sort_by(|a, b| a.total_cmp(b));
    let q = |p: f64| {
        let h = p * (v.len() - 1) as f64;
        let (lo, hi) = (h.floor() as usize, h.ceil() as usize);
        v[lo] + (h - lo as f64) * (v[hi] - v[lo])
    };
    let (q1, q3) = (q(0.25), q(0.75));
    (q1 - k * (q3 - q1), q3 + k * (q3 - q1))
}

impl Rule for YieldOutlier {
    fn name(&self) -> &'static str {
        "yield_outlier"
    }
    fn needs(&self) -> Needs {
        Needs::Yield
    }
    fn apply(&self, e: &mut Export) {
        let o = &e.s.outlier;
        let alive = e.alive();
        let ys: Vec<f64> = alive.iter().map(|&i| e.w[i].std).collect();
        if ys.len() < 3 {
            return;
        }
        let (lo, hi) = match o.method {
            OutlierMethod::Tukey => tukey_fences(&ys, o.tukey_k),
            OutlierMethod::Mad => {
                let med = median(&ys);
                // Floor of 1 % of the median so identical yields (MAD 0) are not all flagged.
                let scaled = (1.4826 * mad(&ys, med)).max(0.01 * med.abs() / o.k_mad.max(1e-9));
                (med - o.k_mad * scaled, med + o.k_mad * scaled)
            }
        };
        for i in alive {
            let v = e.w[i].std;
            if v < lo || v > hi {
                e.reject(
                    i,
                    self.name(),
                    "yield_std_kg_ha",
                    v,
                    format!("{lo:.1}..{hi:.1}"),
                );
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::{line, verdicts};
    use super::*;

    #[test]
    fn tukey_fences_by_hand() {
        // Sorted 1..9, 100: Q1 = 3.25, Q3 = 7.75 (linear interpolation), IQR 4.5;
        // k = 1.5 gives -3.5 .. 14.5.
        let mut v: Vec<f64> = (1..=9).map(f64::from).collect();
        v.push(100.0);
        let (lo, hi) = tukey_fences(&v, 1.5);
        assert!(
            (lo + 3.5).abs() < 1e-12 && (hi - 14.5).abs() < 1e-12,
            "{lo} {hi}"
        );
    }

    #[test]
    fn a_spike_goes_and_identical_yields_stay() {
        // Flow varies by +-1 % around 10 kg/s; one record at 13 kg/s (30 % high).
        let mut pts = line(21, 2.0);
        for (i, p) in pts.iter_mut().enumerate() {
            p.flow_kg_s = 10.0 + 0.1 * ((i % 3) as f64 - 1.0);
        }
        pts[7].flow_kg_s = 13.0;
        let fixed = |s: &mut crate::clean::settings::CleanSettings| {
            s.flow_delay_s = 0.0;
            s.moisture_delay_s = 0.0;
        };
        let v = verdicts(&YieldOutlier, pts, fixed);
        assert_eq!(v[7], Some("yield_outlier"));
        assert_eq!(v.iter().filter(|r| r.is_some()).count(), 1, "{v:?}");
        // MAD 0: the 1 % floor keeps every identical yield.
        let v = verdicts(&YieldOutlier, line(21, 2.0), fixed);
        assert!(v.iter().all(|r| r.is_none()));
    }
}
