//! Benchmark: the front half (ingest + clean + plots) on a simulated harvest, side by side
//! with polars reading the same CSV files.
//!
//! Run: `cargo bench -p plotsieve --bench ingest_clean` (add `-- --fields N` to change the
//! size; 92 fields of 60 blocks give about 2.0 million points, 23 about 0.5 million, 368
//! about 8 million). The parent process writes the simulated exports to a temporary folder,
//! then runs the measurement in a child process so that the child's peak resident memory
//! (VmHWM from /proc/self/status) counts the front half only, not the simulator. In the
//! child, polars first reads every export (`CsvReader`, all columns, its own threads) as the
//! floor any reader of these files meets; then ingest, clean (with the plots as zones, as
//! `plotsieve run` does) and plots run in memory, and the ratio of their time to the
//! floor's is printed. Then `plotsieve run` runs the whole trial (each stage's seconds from
//! its manifest, the run's wall time and peak memory), and the Python peer
//! (`peer_front_half.py`, a subset of the front half with polars and shapely, in a venv the
//! benchmark makes under the target folder) runs on the same exports; the ratio of the front
//! half inside `run` to the peer's time is printed, and last whether the speed targets are
//! met (front half faster than the peer; adjust stage under 8 s; whole run under 15 s and
//! 1 GiB). `PLOTSIEVE_BENCH_SET` adds `--set` style
//! overrides, separated by `;` (in-process part only).

use plotsieve_stages::clean::zones::Zones;
use plotsieve_stages::config::TrialConfig;
use plotsieve_stages::progress::Progress;
use plotsieve_stages::simulate::{generate, SimOptions};
use plotsieve_stages::{clean, ingest, plots};
use polars::prelude::{CsvReadOptions, SerReader};
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

/// Reset the peak (VmHWM) to the current resident size, so the next reading is one step's
/// peak (Linux `clear_refs` value 5); false where the kernel refuses.
fn reset_peak() -> bool {
    std::fs::write("/proc/self/clear_refs", "5").is_ok()
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
    // The floor: polars reads every export.
    let mut csvs: Vec<_> = std::fs::read_dir(dir.join("monitor"))
        .expect("monitor folder")
        .map(|e| e.expect("entry").path())
        .collect();
    csvs.sort();
    let t = Instant::now();
    let mut rows = 0;
    for p in &csvs {
        let df = CsvReadOptions::default()
            .with_has_header(true)
            .try_into_reader_with_file_path(Some(p.clone()))
            .expect("polars opens the export")
            .finish()
            .expect("polars reads the export");
        rows += df.height();
    }
    let t_polars = t.elapsed().as_secs_f64();
    let peak_polars = peak_rss_mib();
    let steps_measured = reset_peak();
    let none = Progress::none();
    let t0 = Instant::now();
    let ing = ingest::run(&cfg.for_ingest(), dir).expect("ingest");
    let t_ingest = t0.elapsed().as_secs_f64();
    let peak_ingest = peak_rss_mib();
    reset_peak();
    let n = ing.points.points.len();
    let t1 = Instant::now();
    let zones = Zones::new(&ing.polygons, &ing.design);
    let cl = clean::run_with(&ing.points, &cfg.clean, &crop, Some(&zones), &none);
    let t_clean = t1.elapsed().as_secs_f64();
    let peak_clean = peak_rss_mib();
    reset_peak();
    let t2 = Instant::now();
    let pl = plots::run(
        &cl.points,
        &ing.points.files,
        &ing.polygons,
        &ing.design,
        &cfg.design_name(),
        &cfg.plots,
        crop.plot_bounds(),
    );
    let t_plots = t2.elapsed().as_secs_f64();
    let peak_plots = peak_rss_mib();
    let front = t_ingest + t_clean + t_plots;
    let rate = |t: f64| format!("{t:.2} s  ({:.0} points/s)", n as f64 / t);
    println!("points                {n} ({rows} CSV rows read by polars)");
    println!("plots                 {}", pl.plots.len());
    println!("polars CSV read       {}", rate(t_polars));
    println!("ingest                {}", rate(t_ingest));
    println!("clean                 {}", rate(t_clean));
    println!("plots                 {}", rate(t_plots));
    println!("ingest + clean + plots {}", rate(front));
    println!("ratio to polars read  {:.1}x", front / t_polars);
    println!(
        "kept after clean      {} ({:.1} %)",
        cl.points.len(),
        100.0 * cl.points.len() as f64 / n as f64
    );
    // The process's peak is the largest step's (polars' data frames are dropped before
    // ingest starts, but its peak counts where the kernel cannot reset it).
    if steps_measured {
        println!(
            "peak memory (VmHWM)   {:.0} MiB (polars read {peak_polars:.0}, ingest {peak_ingest:.0}, clean {peak_clean:.0}, plots {peak_plots:.0})",
            peak_ingest.max(peak_clean).max(peak_plots)
        );
    } else {
        println!("peak memory (VmHWM)   {:.0} MiB", peak_rss_mib());
    }
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    if let Some(i) = args.iter().position(|a| a == "--measure") {
        // The allocator setting plotsieve's main makes (see pipeline/src/main.rs).
        #[cfg(all(target_os = "linux", target_env = "gnu"))]
        // SAFETY: an allocator setting, made before any thread is started.
        unsafe {
            libc::mallopt(libc::M_MMAP_THRESHOLD, 1 << 20);
        }
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
    assert!(status.success());
    let (in_run, adjust, total, mib) = whole_run(&dir);
    let peer_secs = peer(&dir);
    if let Some(p) = peer_secs {
        println!(
            "front half in run / python peer  {:.2}x ({})",
            in_run / p,
            if in_run < p {
                "plotsieve faster"
            } else {
                "plotsieve slower"
            }
        );
    }
    // The speed targets this workload is held to (at 92 fields, the default size).
    let met = |ok: bool| if ok { "met" } else { "not met" };
    println!("targets ({fields} fields):");
    if let Some(p) = peer_secs {
        println!(
            "  front half inside run faster than the peer: {} ({in_run:.2} s vs {p:.2} s; goal 2x faster)",
            met(in_run < p)
        );
    }
    println!(
        "  adjust stage under 8 s: {} ({adjust:.2} s)",
        met(adjust < 8.0)
    );
    println!(
        "  whole run under 15 s and 1 GiB: {} ({total:.2} s, {mib:.0} MiB)",
        met(total < 15.0 && mib < 1024.0)
    );
    let _ = std::fs::remove_dir_all(&dir);
}

/// Run a command to its end; (wall seconds, peak resident MiB) from wait4's usage record.
fn timed(cmd: &mut std::process::Command) -> (f64, f64) {
    let t = Instant::now();
    let child = cmd.spawn().expect("plotsieve runs");
    let mut status = 0;
    // SAFETY: rusage is plain data that wait4 fills in; the pid is our own child's.
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    let pid = unsafe { libc::wait4(child.id() as libc::pid_t, &mut status, 0, &mut usage) };
    assert!(pid > 0 && status == 0, "plotsieve failed (status {status})");
    (t.elapsed().as_secs_f64(), usage.ru_maxrss as f64 / 1024.0)
}

/// The front half as `plotsieve run` does it: one `run` of the whole trial (the stages hand
/// their point tables on in memory and write every file), with each stage's seconds from the
/// manifest and the whole run's wall time and peak memory. Returns (front half seconds, adjust
/// seconds, whole run seconds, peak MiB).
fn whole_run(dir: &Path) -> (f64, f64, f64, f64) {
    let exe = env!("CARGO_BIN_EXE_plotsieve");
    let trial = dir.join("trial.toml");
    let out = dir.join("run");
    let (t, mib) = timed(
        std::process::Command::new(exe)
            .arg("run")
            .arg(&trial)
            .arg("--out")
            .arg(&out)
            .arg("--quiet")
            .stderr(std::process::Stdio::null()),
    );
    let manifest: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(out.join("manifest.json")).expect("the run's manifest"),
    )
    .expect("manifest JSON");
    let secs = |s: &str| {
        manifest["stages"][s]["seconds"]
            .as_f64()
            .unwrap_or(f64::NAN)
    };
    println!("as `plotsieve run` runs them (one process, writing the run folder):");
    let mut front = 0.0;
    for stage in ["ingest", "clean", "plots", "adjust", "report"] {
        println!("  stage {stage:<7} {:6.2} s", secs(stage));
        if ["ingest", "clean", "plots"].contains(&stage) {
            front += secs(stage);
        }
    }
    println!("  ingest + clean + plots {front:.2} s");
    println!("  whole run              {t:.2} s, peak {mib:.0} MiB");
    (front, secs("adjust"), t, mib)
}

/// The Python peer (`peer_front_half.py`): a short script doing a subset of the front half
/// (see its notes) on the same exports, in a venv of the benchmark's own under the target
/// folder (made with pinned polars, shapely and numpy from PyPI on first use). Returns its
/// seconds, or None (said why) when Python or the packages cannot be had.
fn peer(dir: &Path) -> Option<f64> {
    let venv = Path::new(env!("CARGO_TARGET_TMPDIR")).join("peer-venv");
    let python = venv.join("bin").join("python");
    let run = |cmd: &mut std::process::Command| cmd.status().map(|s| s.success()).unwrap_or(false);
    let ready = python.exists()
        && run(std::process::Command::new(&python)
            .args(["-c", "import polars, shapely, numpy"])
            .stderr(std::process::Stdio::null()));
    if !ready {
        let made = run(std::process::Command::new("python3")
            .arg("-m")
            .arg("venv")
            .arg(&venv))
            && run(std::process::Command::new(&python).args([
                "-m",
                "pip",
                "install",
                "--quiet",
                "polars==2.1.0",
                "shapely==2.2.0",
                "numpy==2.4.6",
            ]));
        if !made {
            println!("python peer           not run: python3 -m venv or pip install failed");
            return None;
        }
    }
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("benches/peer_front_half.py");
    let out = std::process::Command::new(&python)
        .arg(&script)
        .arg(dir)
        .output()
        .ok()?;
    let text = String::from_utf8_lossy(&out.stdout);
    let secs: Option<f64> = text.split_whitespace().next().and_then(|v| v.parse().ok());
    match secs {
        Some(s) if out.status.success() => {
            println!("python peer           {s:.2} s  ({})", text.trim());
            Some(s)
        }
        _ => {
            println!(
                "python peer           failed: {}",
                String::from_utf8_lossy(&out.stderr).trim()
            );
            None
        }
    }
}
