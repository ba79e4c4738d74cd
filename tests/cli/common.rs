//! Helpers shared by the integration tests: a fresh work folder per test, running the
//! binary, reading its tables, simulated trials.

pub use polars::prelude::*;
pub use std::collections::BTreeMap;
pub use std::path::{Path, PathBuf};
pub use std::process::{Command, Output};
pub use std::sync::atomic::{AtomicUsize, Ordering};

pub const BIN: &str = env!("CARGO_BIN_EXE_plotsieve");

pub fn repo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .unwrap()
        .to_path_buf()
}

/// A fresh temporary folder, removed when the test passes.
pub struct Workdir(pub PathBuf);

pub static COUNTER: AtomicUsize = AtomicUsize::new(0);

impl Workdir {
    pub fn new(name: &str) -> Self {
        let n = COUNTER.fetch_add(1, Ordering::SeqCst);
        let p =
            std::env::temp_dir().join(format!("plotsieve-test-{name}-{}-{n}", std::process::id()));
        let _ = std::fs::remove_dir_all(&p);
        std::fs::create_dir_all(&p).unwrap();
        Workdir(p)
    }
    pub fn path(&self, rel: &str) -> PathBuf {
        self.0.join(rel)
    }
}

impl Drop for Workdir {
    fn drop(&mut self) {
        if !std::thread::panicking() {
            let _ = std::fs::remove_dir_all(&self.0);
        }
    }
}

pub fn plotsieve(cwd: &Path, args: &[&str]) -> Output {
    Command::new(BIN)
        .args(args)
        .current_dir(cwd)
        .output()
        .expect("binary runs")
}

pub fn ok(o: &Output) {
    assert!(
        o.status.success(),
        "exit {:?}\n--- stdout\n{}\n--- stderr\n{}",
        o.status.code(),
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr)
    );
}

pub fn json(p: &Path) -> serde_json::Value {
    serde_json::from_str(
        &std::fs::read_to_string(p).unwrap_or_else(|e| panic!("{}: {e}", p.display())),
    )
    .unwrap()
}

pub fn csv_rows(p: &Path) -> Vec<BTreeMap<String, String>> {
    let mut r = csv::Reader::from_path(p).unwrap_or_else(|e| panic!("{}: {e}", p.display()));
    let h = r.headers().unwrap().clone();
    r.records()
        .map(|rec| {
            h.iter()
                .zip(rec.unwrap().iter())
                .map(|(k, v)| (k.to_string(), v.to_string()))
                .collect()
        })
        .collect()
}

pub fn parquet(p: &Path) -> DataFrame {
    ParquetReader::new(std::fs::File::open(p).unwrap())
        .finish()
        .unwrap()
}

pub fn f64s(df: &DataFrame, c: &str) -> Vec<f64> {
    df.column(c)
        .unwrap()
        .f64()
        .unwrap()
        .iter()
        .map(|v| v.unwrap())
        .collect()
}

pub fn simulate(w: &Workdir, dir: &str, extra: &[&str]) -> PathBuf {
    let mut args = vec!["simulate", dir];
    args.extend_from_slice(extra);
    ok(&plotsieve(&w.0, &args));
    w.path(dir).join("trial.toml")
}

pub fn all_files(dir: &Path) -> BTreeMap<String, Vec<u8>> {
    let mut out = BTreeMap::new();
    for e in std::fs::read_dir(dir).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            for (k, v) in all_files(&p) {
                out.insert(
                    format!("{}/{k}", p.file_name().unwrap().to_string_lossy()),
                    v,
                );
            }
        } else {
            out.insert(
                p.file_name().unwrap().to_string_lossy().to_string(),
                std::fs::read(&p).unwrap(),
            );
        }
    }
    out
}

pub const STAGES: [&str; 4] = ["1-ingest", "2-clean", "3-plots", "4-adjust"];

/// A tiny one-field trial: a straight pass north at `speed` m/s with constant readings.
pub fn tiny_trial(
    w: &Workdir,
    flow_kg_s: f64,
    speed: f64,
    width_ft: f64,
    moisture: f64,
    unit: &str,
    extra_cols: &str,
    rows: &[(f64, f64)],
) -> PathBuf {
    let dir = w.path("tiny");
    std::fs::create_dir_all(dir.join("monitor")).unwrap();
    let (lon0, lat0) = rows.first().copied().unwrap_or((-97.8, 40.6));
    let mpd = 6_371_000.0 * std::f64::consts::PI / 180.0;
    let mut csv = String::from("t,lon,lat,flow,speed,swath,moist\n");
    if rows.is_empty() {
        for i in 0..100 {
            let lat = lat0 + speed * i as f64 / mpd;
            csv += &format!(
                "{},{lon0:.8},{lat:.9},{flow_kg_s},{speed},{width_ft},{moisture}\n",
                1_000_000 + i
            );
        }
    } else {
        for (i, (lon, lat)) in rows.iter().enumerate() {
            csv += &format!(
                "{},{lon:.8},{lat:.8},{flow_kg_s},{speed},{width_ft},{moisture}\n",
                1_000_000 + i
            );
        }
    }
    std::fs::write(dir.join("monitor/m.csv"), csv).unwrap();
    let d = 200.0 / mpd;
    let sq = |lo: f64, la: f64| {
        format!(
            "[[{lo},{la}],[{},{la}],[{},{}],[{lo},{}],[{lo},{la}]]",
            lo + d,
            lo + d,
            la + d,
            la + d
        )
    };
    let geo = format!(
        r#"{{"type":"FeatureCollection","features":[
        {{"type":"Feature","properties":{{"plot_id":"p1"}},"geometry":{{"type":"Polygon","coordinates":[{}]}}}},
        {{"type":"Feature","properties":{{"plot_id":"p2"}},"geometry":{{"type":"Polygon","coordinates":[{}]}}}}]}}"#,
        sq(lon0 - d / 2.0, lat0 - 0.1 * d),
        sq(lon0 + d, lat0)
    );
    std::fs::write(dir.join("plots.geojson"), geo).unwrap();
    std::fs::write(
        dir.join("design.csv"),
        "plot_id,treatment,block,field\np1,chk,1,F\np2,x,1,F\n",
    )
    .unwrap();
    let toml = format!(
        r#"[trial]
name = "tiny"
crop = "corn"
output_unit = "{unit}"
check = "chk"
[inputs]
monitor = ["monitor/m.csv"]
plots = "plots.geojson"
design = "design.csv"
[columns]
delimiter = ","
time = {{ name = "t", format = "unix_s" }}
longitude = "lon"
latitude = "lat"
flow = {{ name = "flow", unit = "kg_s" }}
speed = {{ name = "speed", unit = "m_s" }}
width = {{ name = "swath", unit = "ft" }}
moisture = "moist"
[clean]
flow_delay_s = 0.0
moisture_delay_s = 0.0
{extra_cols}
[clean.pass]
start_trim_s = 0.0
end_trim_s = 0.0
# The readings are constant by construction: not a stuck sensor here.
[clean.moisture]
stuck_s = 0.0
"#
    );
    std::fs::write(dir.join("trial.toml"), toml).unwrap();
    dir.join("trial.toml")
}

/// A simulated export's lines with every longitude moved `deg` degrees east.
pub fn shift_east(lines: &[String], deg: f64) -> Vec<String> {
    lines
        .iter()
        .enumerate()
        .map(|(i, l)| {
            if i == 0 {
                return l.clone();
            }
            let mut f: Vec<String> = l.split(',').map(String::from).collect();
            f[1] = format!("{:.8}", f[1].parse::<f64>().unwrap() + deg);
            f.join(",")
        })
        .collect()
}

/// One number per plot from the simulator's truth, by plot id.
pub fn truth_by_plot(truth: &serde_json::Value, key: &str) -> BTreeMap<String, f64> {
    truth["plots"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| {
            (
                p["plot_id"].as_str().unwrap().to_string(),
                p[key].as_f64().unwrap(),
            )
        })
        .collect()
}

/// Root-mean-square error of plot mean yields against the simulator's true plot yields.
pub fn plot_rmse(plots_csv: &Path, truth: &serde_json::Value) -> (f64, usize) {
    let t: BTreeMap<String, f64> = truth_by_plot(truth, "true_yield_t_ha");
    let rows: Vec<_> = csv_rows(plots_csv)
        .into_iter()
        .filter(|r| r["status"] == "kept")
        .collect();
    let se: f64 = rows
        .iter()
        .map(|r| (r["yield_mean_t_ha"].parse::<f64>().unwrap() - t[&r["plot_id"]]).powi(2))
        .sum();
    ((se / rows.len() as f64).sqrt(), rows.len())
}

pub fn sha(p: &Path) -> String {
    use sha2::Digest;
    sha2::Sha256::digest(std::fs::read(p).unwrap())
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect()
}

pub fn read(p: &Path) -> String {
    std::fs::read_to_string(p).unwrap()
}

/// Replace the first `n` occurrences of `a` (all with n = 0).
pub fn replace(p: &Path, a: &str, b: &str, n: usize) {
    let t = read(p);
    assert!(t.contains(a), "{}: no {a:?}", p.display());
    let t = if n == 0 {
        t.replace(a, b)
    } else {
        t.replacen(a, b, n)
    };
    std::fs::write(p, t).unwrap();
}

/// Apply `f` to every value of CSV column `col`.
pub fn set_col(p: &Path, col: &str, f: impl Fn(&str) -> String) {
    let t = read(p);
    let mut lines = t.lines();
    let header = lines.next().unwrap().to_string();
    let k = header.split(',').position(|c| c == col).unwrap();
    let mut out = vec![header];
    for l in lines {
        let mut v: Vec<String> = l.split(',').map(String::from).collect();
        v[k] = f(&v[k]);
        out.push(v.join(","));
    }
    std::fs::write(p, out.join("\n") + "\n").unwrap();
}

/// Copy a folder tree.
pub fn copy_dir(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for e in std::fs::read_dir(from).unwrap() {
        let p = e.unwrap().path();
        let q = to.join(p.file_name().unwrap());
        if p.is_dir() {
            copy_dir(&p, &q);
        } else {
            std::fs::copy(&p, &q).unwrap();
        }
    }
}

/// Zip the files of `set` (a task-data folder) into `zip` under `TASKDATA/`, in name order;
/// `member` may replace a file's bytes by writing its own into the archive (return true).
pub fn zip_task_data(
    set: &Path,
    zip: &Path,
    method: ::zip::CompressionMethod,
    member: impl Fn(&str, &mut ::zip::ZipWriter<std::fs::File>) -> bool,
) {
    let f = std::fs::File::create(zip).unwrap();
    let mut z = ::zip::ZipWriter::new(f);
    let opts = ::zip::write::SimpleFileOptions::default()
        .compression_method(method)
        .large_file(true);
    let mut names: Vec<String> = std::fs::read_dir(set)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().to_string())
        .collect();
    names.sort();
    for n in names {
        z.start_file(format!("TASKDATA/{n}"), opts).unwrap();
        if !member(&n, &mut z) {
            std::io::Write::write_all(&mut z, &std::fs::read(set.join(&n)).unwrap()).unwrap();
        }
    }
    z.finish().unwrap();
}

/// Asserts that every uplift in a run's `4-adjust/treatments.csv` (t/ha) lies within `k_sd`
/// posterior SDs of the simulator's true effect; only the pooled rows (`field` = `all`) when
/// `pooled_only`. Returns how many uplifts were checked.
pub fn uplifts_within_truth(
    run: &Path,
    truth: &serde_json::Value,
    k_sd: f64,
    pooled_only: bool,
) -> usize {
    let mut checked = 0;
    for r in csv_rows(&run.join("4-adjust/treatments.csv")) {
        if r["treatment"] == "check" || (pooled_only && r["field"] != "all") {
            continue;
        }
        let (u, sd): (f64, f64) = (
            r["uplift_t_ha"].parse().unwrap(),
            r["uplift_sd_t_ha"].parse().unwrap(),
        );
        let want = truth["effects_t_ha"][&r["treatment"]].as_f64().unwrap();
        assert!(
            (u - want).abs() < k_sd * sd,
            "{} {}: {u} +- {sd}, truth {want}",
            r["field"],
            r["treatment"]
        );
        checked += 1;
    }
    checked
}

/// `plotsieve run TRIAL --out OUT --quiet`, with `--set` for each of `sets`; asserts that it
/// succeeded and returns what it printed.
pub fn run_trial(w: &Workdir, trial: &Path, out: &str, sets: &[&str]) -> Output {
    let mut args = vec!["run", trial.to_str().unwrap(), "--out", out, "--quiet"];
    for s in sets {
        args.extend(["--set", s]);
    }
    let o = plotsieve(&w.0, &args);
    ok(&o);
    o
}

/// `plotsieve run TRIAL --out OUT --quiet` with `--set` for each of `sets`, which must fail
/// saying `want`.
pub fn run_refused(w: &Workdir, trial: &Path, out: &str, sets: &[&str], want: &str) {
    let mut args = vec!["run", trial.to_str().unwrap(), "--out", out, "--quiet"];
    for s in sets {
        args.extend(["--set", s]);
    }
    let o = plotsieve(&w.0, &args);
    let said = printed(&o);
    assert!(!o.status.success(), "{sets:?}: {said}");
    assert!(said.contains(want), "{sets:?}: {said}");
}

/// `plotsieve stage NAME TRIAL --out OUT --quiet` for each of `stages` in turn, each asserted
/// to succeed.
pub fn run_stages(w: &Workdir, trial: &Path, out: &str, stages: &[&str]) {
    for s in stages {
        ok(&plotsieve(
            &w.0,
            &["stage", s, trial.to_str().unwrap(), "--out", out, "--quiet"],
        ));
    }
}

/// `plotsieve check TRIAL` in `w`, which must pass: what it printed on standard output.
pub fn checked(w: &Workdir, trial: &str) -> String {
    let o = plotsieve(&w.0, &["check", trial]);
    ok(&o);
    String::from_utf8_lossy(&o.stdout).to_string()
}

/// Everything a command printed: standard output, then standard error.
pub fn printed(o: &Output) -> String {
    String::from_utf8_lossy(&o.stdout).to_string() + &String::from_utf8_lossy(&o.stderr)
}

/// Rewrite every line of a text file through `f(line number from 0, line)`.
pub fn map_lines(p: &Path, mut f: impl FnMut(usize, &str) -> String) {
    let out: Vec<String> = read(p).lines().enumerate().map(|(i, l)| f(i, l)).collect();
    std::fs::write(p, out.join("\n") + "\n").unwrap();
}

/// Remove CSV column `col` (by its header name) from a comma-delimited file.
pub fn drop_column(p: &Path, col: &str) {
    let k = read(p)
        .lines()
        .next()
        .unwrap()
        .split(',')
        .position(|c| c == col)
        .unwrap_or_else(|| panic!("no column {col} in {}", p.display()));
    map_lines(p, |_, l| {
        let mut v: Vec<&str> = l.split(',').collect();
        v.remove(k);
        v.join(",")
    });
}

/// A Parquet table's unsigned integer column as a set (point ids, say).
pub fn u64_set(df: &DataFrame, col: &str) -> std::collections::BTreeSet<u64> {
    df.column(col)
        .unwrap()
        .u64()
        .unwrap()
        .into_no_null_iter()
        .collect()
}

/// Every file of a folder (not its subfolders) by name, with its SHA-256.
pub fn folder_hashes(dir: &Path) -> BTreeMap<String, String> {
    std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.is_file())
        .map(|p| {
            (
                p.file_name().unwrap().to_string_lossy().to_string(),
                sha(&p),
            )
        })
        .collect()
}
