//! Benchmark: the adjust stage (GP fit with full hyperparameter integration) on synthetic
//! fields.
//!
//! Run: `cargo bench -p plotsieve --bench adjust` (add `-- single`, `-- large` or `-- season`
//! for one part). Fields are near-square grids of 18 m x 66 m plots with six treatments, a
//! smooth trend (wavelengths of a few hundred metres) and noise.
//!
//! - single: one field of 24 to 600 plots, exact kernel and reduced-rank basis side by side
//!   (the crossover), with the reduced-rank uplift's difference from the exact one in units
//!   of its SD;
//! - large: one field of 1,000 and of 10,000 plots (reduced rank, the default above 600
//!   plots), with the warnings the fit raised (the target: a 10,000-plot field under 2 s with
//!   no basis warning);
//! - variety: a 224-plot trial of 56 entries in 4 blocks, and six treatments in 30 and 46
//!   blocks with and without block effects;
//! - season: 20 fields x 250 plots fitted jointly (shared range, interaction SD), with the
//!   work it took (see `harvest`);
//! - rates: a 200-plot field whose six treatments are rates (0-200 kg/ha), fitted as a rate
//!   trial (response curves) and as unordered treatments, alternating, and the 92-field
//!   harvest below both ways (the targets: within 1.5x and 2x of the unordered fit);
//! - harvest: a season shaped like the front-half benchmark's harvest, 92 fields x 360 plots
//!   fitted jointly, with the number of exact spectral forms (kernel matrix and its
//!   eigendecomposition) and likelihood evaluations the integration made, what one of each
//!   costs alone on this machine, and so the least time any code making that same work
//!   needs on this machine's threads.

use plotsieve_stages::adjust::spectral::{self, Repr};
use plotsieve_stages::adjust::{prepare, run, AdjustOutput, FitSettings, Pooling, RateSettings};
use plotsieve_stages::crop::RateUnit;
use plotsieve_stages::plots::PlotStats;
use plotsieve_stages::util::Rng;
use std::time::Instant;

fn field(name: &str, n: usize, seed: u64) -> Vec<PlotStats> {
    let mut rng = Rng::new(seed);
    let cols = ((n as f64 * 66.0 / 18.0).sqrt().round() as usize).max(3);
    let phase = rng.range(0.0, 6.0);
    (0..n)
        .map(|i| {
            let (x, y) = (18.0 * (i % cols) as f64, 66.0 * (i / cols) as f64);
            let trend = (x / 90.0 + phase).sin() + (y / 200.0).cos();
            let t = ["chk", "a", "b", "c", "d", "e"][(i + i / cols) % 6];
            let effect = if t == "a" { 0.3 } else { 0.0 };
            PlotStats::from_yield(
                &format!("{name}-{i}"),
                name,
                t,
                &(i / 6).to_string(),
                11.0 + trend + effect + 0.25 * rng.normal(),
                x,
                y,
            )
        })
        .collect()
}

fn timed(plots: &[PlotStats], s: &FitSettings) -> (f64, AdjustOutput) {
    let t = Instant::now();
    let out = run(plots, s).expect("fit");
    (t.elapsed().as_secs_f64(), out)
}

/// Times `plots` fitted with `s` and prints the work the integration made (see the module
/// notes): eigendecompositions and likelihood evaluations counted, one of each timed alone
/// on the first field, and the least time that work needs on this machine's threads.
fn work(label: &str, plots: &[PlotStats], s: &FitSettings) -> (f64, AdjustOutput) {
    let before = spectral::work_counts();
    let (t, out) = timed(plots, s);
    let after = spectral::work_counts();
    let forms = after.eigendecompositions - before.eigendecompositions;
    let evals = after.evaluations - before.evaluations;
    let searches = after.searches - before.searches;
    // The first field's exact form and likelihood, from the design the stage prepares.
    let first = plots[0].field.as_str();
    let prep = prepare(
        first,
        plots.iter().filter(|p| p.field == first).collect(),
        s,
    )
    .expect("a field to fit");
    let (design, sy) = (&prep.model.design, prep.model.sy);
    let n = design.n();
    let reps = 20;
    let t0 = Instant::now();
    let mut repr = None;
    for _ in 0..reps {
        repr = Some(std::hint::black_box(
            Repr::exact(design, (150.0, 150.0)).expect("form"),
        ));
    }
    let t_form = t0.elapsed().as_secs_f64() / reps as f64;
    let repr = repr.expect("form");
    // Evaluations for 0.3 s each (at least 100): without the covariance (searches), with it.
    let per_eval = |cov: bool| {
        let t0 = Instant::now();
        let mut k = 0;
        while k < 100 || t0.elapsed().as_secs_f64() < 0.3 {
            let sf = sy * (0.3 + 0.5 * (k % 1000) as f64 / 1000.0);
            if cov {
                std::hint::black_box(repr.evaluate(sf, 0.4 * sy));
            } else {
                std::hint::black_box(repr.reml_groups(sf, 0.4 * sy, &[]));
            }
            k += 1;
        }
        t0.elapsed().as_secs_f64() / k as f64
    };
    let (t_search, t_full) = (per_eval(false), per_eval(true));
    let threads = rayon::current_num_threads();
    let fields = {
        let mut f: Vec<&str> = plots.iter().map(|p| p.field.as_str()).collect();
        f.sort_unstable();
        f.dedup();
        f.len()
    };
    let floor =
        (forms as f64 * t_form + searches as f64 * t_search + (evals - searches) as f64 * t_full)
            / threads as f64;
    println!(
        "{label}: {t:.2} s; {forms} exact spectral forms of about {n} plots ({:.1} ms each alone), {evals} likelihood evaluations, {searches} of them in mode searches ({:.1} us each alone, {:.1} us with the covariance): that work alone needs {floor:.2} s on {threads} threads; a field's searches, one after another, {:.2} s",
        1e3 * t_form,
        1e6 * t_search,
        1e6 * t_full,
        searches as f64 / fields as f64 * t_search
    );
    (t, out)
}

/// The joint fit's method and shared range, from its hyperparameter row.
fn joint_row(out: &AdjustOutput) -> String {
    let all = out
        .hyper
        .iter()
        .find(|h| h.field == "all")
        .expect("joint row");
    format!("{}; shared range {:.0} m", all.method, all.range_m)
}

fn uplift(out: &AdjustOutput, field: &str, t: &str) -> (f64, f64) {
    let r = out
        .treatments
        .iter()
        .find(|r| r.field == field && r.treatment == t)
        .expect("row");
    (r.uplift, r.uplift_sd)
}

/// A 200-plot field and the 92-field harvest fitted as rate trials and as unordered
/// treatments (see the module notes).
fn rates() {
    let as_rates = |s: &mut FitSettings| {
        s.grain_price_per_t = 180.0;
        s.rates = Some(RateSettings {
            by_treatment: ["chk", "a", "b", "c", "d", "e"]
                .iter()
                .zip([0.0, 40.0, 80.0, 120.0, 160.0, 200.0])
                .map(|(t, r)| (t.to_string(), r))
                .collect(),
            unit: RateUnit::KgHa,
            cost_per_ha: 1.1,
            current: None,
            flat_top_within_per_ha: 0.0,
        });
    };
    let plots = field("R", 200, 21);
    let plain = FitSettings::new("chk");
    let mut rated = FitSettings::new("chk");
    as_rates(&mut rated);
    let (mut tp, mut tr) = (Vec::new(), Vec::new());
    for _ in 0..7 {
        tp.push(timed(&plots, &plain).0);
        tr.push(timed(&plots, &rated).0);
    }
    let med = |v: &mut Vec<f64>| {
        v.sort_by(f64::total_cmp);
        v[v.len() / 2]
    };
    let (a, b) = (med(&mut tp), med(&mut tr));
    println!(
            "200 plots, six rates: {b:.3} s as a rate trial, {a:.3} s unordered (median of 7, alternating): {:.2}x (target 1.5x: {})",
            b / a,
            if b / a <= 1.5 { "met" } else { "not met" }
        );
    let plots: Vec<PlotStats> = (0..92)
        .flat_map(|f| field(&format!("H{f:02}"), 360, 500 + f))
        .collect();
    let (a, _) = timed(&plots, &plain);
    let (b, out) = timed(&plots, &rated);
    println!(
            "92 fields x 360 plots: {b:.2} s as a rate trial ({} response rows), {a:.2} s unordered: {:.2}x (target 2x: {})",
            out.response.len(),
            b / a,
            if b / a <= 2.0 { "met" } else { "not met" }
        );
}

fn main() {
    let part: Option<String> = std::env::args().skip(1).find(|a| !a.starts_with('-'));
    let want = |p: &str| part.as_deref().is_none_or(|x| x == p);
    if want("single") {
        println!("plots  exact s  reduced-rank s  basis        |uplift diff| / sd");
        for n in [24, 48, 100, 250, 400, 600] {
            let plots = field("F", n, 7);
            let mut s = FitSettings::new("chk");
            s.exact_max_plots = usize::MAX;
            let (te, ex) = timed(&plots, &s);
            s.exact_max_plots = 0;
            let (th, hs) = timed(&plots, &s);
            let (ue, se) = uplift(&ex, "F", "a");
            let (uh, _) = uplift(&hs, "F", "a");
            println!(
                "{n:5}  {te:7.2}  {th:14.2}  {:12} {:.3}",
                hs.hyper[0].method,
                (ue - uh).abs() / se
            );
        }
    }
    if want("large") {
        for n in [1000, 10_000] {
            let plots = field("F", n, 9);
            let s = FitSettings::new("chk");
            let (t, out) = timed(&plots, &s);
            println!(
                "{n} plots, one field: {t:.2} s ({}; range {:.0} m; {} warnings)",
                out.hyper[0].method,
                out.hyper[0].range_m,
                out.warnings.len()
            );
            for w in &out.warnings {
                println!("  warning: {w}");
            }
        }
    }
    if want("variety") {
        // A variety trial: 56 entries x 4 complete blocks (224 plots, 8 columns x 28 rows of
        // 18 m x 66 m plots, each block 7 rows), entries shuffled within each block; block
        // effects as fixed columns. And uniformity-trial fits with many blocks.
        let mut rng = Rng::new(56);
        let mut plots = Vec::new();
        for b in 0..4 {
            let mut order: Vec<usize> = (0..56).collect();
            rng.shuffle(&mut order);
            for (k, e) in order.into_iter().enumerate() {
                let i = b * 56 + k;
                let (x, y) = (18.0 * (i % 8) as f64, 66.0 * (i / 8) as f64);
                let trend = (x / 90.0).sin() + (y / 400.0).cos() + 0.2 * b as f64;
                let t = if e == 0 {
                    "chk".to_string()
                } else {
                    format!("e{e:02}")
                };
                let effect = if e == 1 { 300.0 } else { 0.0 };
                plots.push(PlotStats::from_yield(
                    &format!("V-{i}"),
                    "V",
                    &t,
                    &b.to_string(),
                    11_000.0 + 1000.0 * trend + effect + 250.0 * rng.normal(),
                    x,
                    y,
                ));
            }
        }
        let mut s = FitSettings::new("chk");
        s.blocks = true;
        let (_, out) = work("224 plots, 56 entries, 4 blocks", &plots, &s);
        let (u, sd) = uplift(&out, "V", "e01");
        println!("  (uplift of e01 {u:.0} +- {sd:.0} kg/ha, true 300)");
        for nb in [30, 46] {
            let n = nb * 6;
            let mut plots = field("U", n, 11);
            for (i, p) in plots.iter_mut().enumerate() {
                p.block = (i / 6).to_string();
            }
            let (t0, _) = timed(&plots, &FitSettings::new("chk"));
            let mut s = FitSettings::new("chk");
            s.blocks = true;
            let (t1, _) = timed(&plots, &s);
            println!(
                "{n} plots, six treatments, {nb} blocks: {t1:.2} s with blocks, {t0:.2} s without"
            );
        }
    }
    if want("many") {
        // Many small fields: the importance sampler's effective sample size as fields grow.
        for nf in [10, 30, 60] {
            let plots: Vec<PlotStats> = (0..nf)
                .flat_map(|f| field(&format!("F{f:02}"), 36, 300 + f as u64))
                .collect();
            let s = FitSettings::new("chk");
            let (t, out) = timed(&plots, &s);
            let (u, sd) = uplift(&out, "all", "a");
            println!(
                "{nf} fields x 36 plots, joint: {t:.2} s, ESS {:.0}; pooled uplift of a {u:.3} +- {sd:.3} (true 0.3)",
                out.joint_ess
            );
        }
    }
    if want("season") {
        let plots: Vec<PlotStats> = (0..20)
            .flat_map(|f| field(&format!("F{f:02}"), 250, 100 + f))
            .collect();
        // For scale: the same fields fitted separately, and jointly with a range per field.
        let mut s = FitSettings::new("chk");
        s.pooling = Pooling::Separate;
        let (t, _) = timed(&plots, &s);
        println!("20 fields x 250 plots, separately: {t:.2} s");
        s.pooling = Pooling::Joint;
        s.shared_range = false;
        let (t, _) = timed(&plots, &s);
        println!("20 fields x 250 plots, joint with a range per field: {t:.2} s");
        s.shared_range = true;
        let (_, out) = work("20 fields x 250 plots, joint", &plots, &s);
        let (u, sd) = uplift(&out, "all", "a");
        println!(
            "  ({}; pooled uplift of a {u:.3} +- {sd:.3}, true 0.3)",
            joint_row(&out)
        );
    }
    if want("rates") {
        rates();
    }
    if want("harvest") {
        let plots: Vec<PlotStats> = (0..92)
            .flat_map(|f| field(&format!("H{f:02}"), 360, 500 + f))
            .collect();
        let s = FitSettings::new("chk");
        let (_, out) = work("92 fields x 360 plots, joint", &plots, &s);
        println!("  ({})", joint_row(&out));
    }
}
