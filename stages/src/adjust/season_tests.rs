//! Known-truth seasons with product x field variation: the pooled ("average field") and
//! new-field intervals of a joint fit against the truth.

use super::*;
use crate::util::Rng;

/// One season: `fields` fields of 5 x 5 plots (12 m x 40 m apart), the check and four
/// products in a Latin square per field, a smooth trend with a random phase per field and
/// plot noise (SD 250 kg/ha). Each product's mean effect ~ N(0, 300^2) kg/ha and its effect
/// in a field is the mean plus N(0, tau^2). Returns the plots, the mean effects and two
/// held-out fields' true effects (the mean plus new interaction draws), product by product.
fn season(seed: u64, fields: usize, tau: f64) -> (Vec<PlotStats>, Vec<f64>, Vec<[f64; 2]>) {
    season_of(seed, fields, 5, tau)
}

/// [`season`] with `rows` rows of five plots per field (at most 10).
pub(crate) fn season_of(
    seed: u64,
    fields: usize,
    rows: usize,
    tau: f64,
) -> (Vec<PlotStats>, Vec<f64>, Vec<[f64; 2]>) {
    let mut rng = Rng::new(seed);
    let names = ["chk", "p1", "p2", "p3", "p4"];
    let mu: Vec<f64> = (0..4).map(|_| 300.0 * rng.normal()).collect();
    let mut plots = Vec::new();
    for f in 0..fields {
        let fx: Vec<f64> = mu.iter().map(|m| m + tau * rng.normal()).collect();
        let (ph0, ph1) = (rng.range(0.0, 6.3), rng.range(0.0, 6.3));
        for r in 0..rows {
            for c in 0..5 {
                let t = (r + 2 * c + f) % 5;
                let (x, y) = (12.0 * c as f64, 40.0 * r as f64);
                let trend = 500.0 * (x / 25.0 + ph0).sin() + 400.0 * (y / 90.0 + ph1).cos();
                let effect = if t == 0 { 0.0 } else { fx[t - 1] };
                let v = 9000.0 + trend + effect + 250.0 * rng.normal();
                plots.push(PlotStats::from_yield(
                    &format!("F{f}-{r}{c}"),
                    &format!("F{f}"),
                    names[t],
                    &r.to_string(),
                    v,
                    x,
                    y,
                ));
            }
        }
    }
    let held_out = mu
        .iter()
        .map(|m| [m + tau * rng.normal(), m + tau * rng.normal()])
        .collect();
    (plots, mu, held_out)
}

#[test]
fn new_field_and_pooled_intervals_are_calibrated_over_1000_held_out_cases() {
    // 125 seasons of 5 fields (product x field SD 250 kg/ha), fitted jointly: the new-field
    // 95 % intervals should cover the true uplifts of two held-out fields per season (1,000
    // cases), and the pooled intervals the products' true mean effects (500 cases), 93-97 %
    // of the time each.
    let s = FitSettings::new("chk");
    let [new, m, pooled, n] =
        coverage(7000..7125, 5, 5, |plots| run(plots, &s).unwrap().treatments);
    let (cn, cp) = (new as f64 / m as f64, pooled as f64 / n as f64);
    eprintln!("new field {new}/{m} = {cn:.3}; pooled {pooled}/{n} = {cp:.3}");
    assert_eq!((n, m), (500, 1000));
    assert!((0.93..=0.97).contains(&cn), "new-field coverage {cn:.3}");
    assert!((0.93..=0.97).contains(&cp), "pooled coverage {cp:.3}");
}

#[test]
fn a_new_field_is_wider_than_the_average_field_by_the_interaction() {
    // With product x field variation the new-field SD exceeds the pooled SD and its
    // variance is about the pooled variance plus the interaction SD squared; a single-field
    // or separate fit has no new-field numbers.
    let (plots, _, _) = season(42, 6, 400.0);
    let s = FitSettings::new("chk");
    let out = run(&plots, &s).unwrap();
    let inter = out
        .hyper
        .iter()
        .find(|h| h.field == "all")
        .unwrap()
        .interaction_sd;
    for r in out
        .treatments
        .iter()
        .filter(|r| r.field == "all" && r.treatment != "chk")
    {
        assert!(r.new_field_sd > r.uplift_sd, "{}", r.treatment);
        let implied = (r.new_field_sd.powi(2) - r.uplift_sd.powi(2)).sqrt();
        // A mixture: E[s^2] >= E[s]^2, so the implied SD is at least the mean SD, and within
        // its interval.
        assert!(
            implied >= 0.95 * inter.mean && implied <= inter.hi95,
            "{}: implied {implied:.0} vs {:?}",
            r.treatment,
            inter
        );
        assert!((r.new_field_uplift - r.uplift).abs() < 1e-6 * r.uplift_sd.max(1.0));
        assert!(r.new_field_lo95 < r.uplift_lo95 && r.new_field_hi95 > r.uplift_hi95);
    }
    for r in out.treatments.iter().filter(|r| r.field != "all") {
        assert!(r.new_field_uplift.is_nan());
    }
    let mut sep = s.clone();
    sep.pooling = Pooling::Separate;
    let out = run(&plots, &sep).unwrap();
    assert!(out.treatments.iter().all(|r| r.new_field_uplift.is_nan()));
}

/// Over the seasons `seeds` of `fields` fields of `rows` x 5 plots (product x field SD 250 kg/ha), how often the
/// pooled rows `fit` returns for products p1-p4 cover two held-out fields' true uplifts with
/// their new-field 95 % intervals and the true mean effects with their 95 % intervals:
/// [new-field covered, new-field cases, pooled covered, pooled cases].
pub(crate) fn coverage(
    seeds: std::ops::Range<u64>,
    fields: usize,
    rows: usize,
    fit: impl Fn(&[PlotStats]) -> Vec<TreatmentRow> + Sync,
) -> [usize; 4] {
    let counts: Vec<[usize; 4]> = seeds
        .into_par_iter()
        .map(|k| {
            let (plots, mu, held) = season_of(k, fields, rows, 250.0);
            let rows = fit(&plots);
            let mut c = [0usize; 4];
            for (j, name) in ["p1", "p2", "p3", "p4"].iter().enumerate() {
                let r = rows
                    .iter()
                    .find(|r| r.field == "all" && r.treatment == *name)
                    .unwrap();
                for h in held[j] {
                    c[0] += usize::from(r.new_field_lo95 <= h && h <= r.new_field_hi95);
                    c[1] += 1;
                }
                c[2] += usize::from(r.uplift_lo95 <= mu[j] && mu[j] <= r.uplift_hi95);
                c[3] += 1;
            }
            c
        })
        .collect();
    counts
        .iter()
        .fold([0; 4], |a, b| std::array::from_fn(|k| a[k] + b[k]))
}
