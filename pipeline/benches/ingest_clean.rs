//! Benchmark: ingest + clean on a simulated harvest of about 2 million monitor points.
//!
//! Run: `cargo bench -p plotsieve --bench ingest_clean` (add `-- --fields N` to change the
//! size; 92 fields of 60 blocks give about 2.0 million points). The parent process writes
//! the simulated exports to a temporary folder, then runs the measurement in a child process
//! so that the child's peak resident memory (VmHWM from /proc/self/status) counts ingest and
//! clean only, not the simulator. `PLOTSIEVE_BENCH_SET` adds `--set` style overrides,
//! separated by `;`.

use plotsieve_stages::config::TrialConfig;
use plotsieve_stages::simulate::{generate, SimOptions};
use plotsieve_stages::{clean, ingest};
use std::path::Path;
use std::time::Instant;

fn peak_rss_mib() -> f64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines().find(|l| l.starts_with("VmHWM:")).and_then(|l| {
                l.split_whitespace()
                    .nth(1)
                    .and_then(|v| v.parse::<f64>().ok())
            })
        })
        .map(|kb| kb / 1024.0)
        .unwrap_or(f64::NAN)
}

fn measure(dir: &Path) {
    let text = std::fs::read_to_string(dir.join("trial.toml")).expect("trial.toml");
    // Extra settings, e.g. PLOTSIEVE_BENCH_SET="clean.delay.mode=fixed;clean.disabled_rules=[]".
    let sets: Vec<String> = std::env::var("PLOTSIEVE_BENCH_SET")
        .map(|v| {
            v.split(';')
                .filter(|s| !s.is_empty())
                .map(String::from)
                .collect()
        })
        .unwrap_or_default();
    let cfg = TrialConfig::from_toml(&text, "trial.toml", &sets).expect("config");
    let crop = cfg.crop().expect("crop");
    let t0 = Instant::now();
    let ing = ingest::run(&cfg, dir).expect("ingest");
    let t_ingest = t0.elapsed().as_secs_f64();
    let n = ing.points.points.len();
    let t1 = Instant::now();
    let cl = clean::run(&ing.points, &cfg.clean, &crop);
    let t_clean = t1.elapsed().as_secs_f64();
    println!("points                {n}");
    println!(
        "ingest                {t_ingest:.2} s  ({:.0} points/s)",
        n as f64 / t_ingest
    );
    println!(
        "clean                 {t_clean:.2} s  ({:.0} points/s)",
        n as f64 / t_clean
    );
    println!(
        "ingest + clean        {:.2} s  ({:.0} points/s)",
        t_ingest + t_clean,
        n as f64 / (t_ingest + t_clean)
    );
    println!(
        "kept after clean      {} ({:.1} %)",
        cl.points.len(),
        100.0 * cl.points.len() as f64 / n as f64
    );
    println!("peak memory (VmHWM)   {:.0} MiB", peak_rss_mib());
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    if let Some(i) = args.iter().position(|a| a == "--measure") {
        measure(Path::new(&args[i + 1]));
        return;
    }
    let fields = args
        .iter()
        .position(|a| a == "--fields")
        .and_then(|i| args.get(i + 1))
        .and_then(|v| v.parse().ok())
        .unwrap_or(92usize);
    let dir = std::env::temp_dir().join(format!("plotsieve-bench-{}", std::process::id()));
    let t = Instant::now();
    let sim = generate(&SimOptions {
        seed: 2026,
        fields,
        blocks: 60,
        ..Default::default()
    });
    for (rel, text) in &sim.files {
        let p = dir.join(rel);
        std::fs::create_dir_all(p.parent().unwrap()).unwrap();
        std::fs::write(&p, text).unwrap();
    }
    let bytes: u64 = sim.files.iter().map(|f| f.1.len() as u64).sum();
    drop(sim);
    println!(
        "simulated {fields} fields ({:.0} MB of files) in {:.1} s",
        bytes as f64 / 1e6,
        t.elapsed().as_secs_f64()
    );
    let status = std::process::Command::new(std::env::current_exe().unwrap())
        .args(["--measure", dir.to_str().unwrap()])
        .status()
        .expect("child runs");
    let _ = std::fs::remove_dir_all(&dir);
    assert!(status.success());
}
