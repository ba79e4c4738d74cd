//! Benchmark: the adjust stage (GP fit with hyperparameter integration) on synthetic fields.
//!
//! Run: `cargo bench -p plotsieve --bench adjust` (add `-- 50 100 250` for other sizes).
//! Each field is a grid of 18 m x 66 m plots with six treatments, a smooth trend and noise;
//! the time is for `adjust::run` on one field (search, 7x7x7 integration grid, mixtures).

use plotsieve_stages::adjust::{run, FitSettings};
use plotsieve_stages::plots::PlotStats;
use plotsieve_stages::util::Rng;
use std::time::Instant;

fn field(n: usize, seed: u64) -> Vec<PlotStats> {
    let mut rng = Rng::new(seed);
    let cols = 12;
    (0..n)
        .map(|i| {
            let (x, y) = (18.0 * (i % cols) as f64, 66.0 * (i / cols) as f64);
            let trend = (x / 90.0).sin() + (y / 200.0).cos();
            PlotStats::from_yield(
                &format!("p{i}"),
                "F",
                ["chk", "a", "b", "c", "d", "e"][i % 6],
                &(i / 6).to_string(),
                11.0 + trend + 0.2 * rng.normal(),
                x,
                y,
            )
        })
        .collect()
}

fn main() {
    let sizes: Vec<usize> = std::env::args()
        .skip(1)
        .filter_map(|a| a.parse().ok())
        .collect();
    let sizes = if sizes.is_empty() {
        vec![24, 48, 100, 250]
    } else {
        sizes
    };
    let s = FitSettings::new("chk");
    println!("plots   seconds (one field, full hyperparameter integration)");
    for n in sizes {
        let plots = field(n, 7);
        let t = Instant::now();
        let out = run(&plots, &s).expect("fit");
        println!("{n:5}   {:.2}", t.elapsed().as_secs_f64());
        assert_eq!(out.plots.len(), n);
    }
}
