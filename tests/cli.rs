//! Integration tests: the real `plotsieve` binary in fresh temporary folders, on
//! `sample-input/` and on small inputs the tests write themselves.

use polars::prelude::*;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::atomic::{AtomicUsize, Ordering};

const BIN: &str = env!("CARGO_BIN_EXE_plotsieve");

fn repo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .unwrap()
        .to_path_buf()
}

/// A fresh temporary folder, removed when the test passes.
struct Workdir(PathBuf);
static COUNTER: AtomicUsize = AtomicUsize::new(0);
impl Workdir {
    fn new(name: &str) -> Self {
        let n = COUNTER.fetch_add(1, Ordering::SeqCst);
        let p =
            std::env::temp_dir().join(format!("plotsieve-test-{name}-{}-{n}", std::process::id()));
        let _ = std::fs::remove_dir_all(&p);
        std::fs::create_dir_all(&p).unwrap();
        Workdir(p)
    }
    fn path(&self, rel: &str) -> PathBuf {
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

fn plotsieve(cwd: &Path, args: &[&str]) -> Output {
    Command::new(BIN)
        .args(args)
        .current_dir(cwd)
        .output()
        .expect("binary runs")
}

fn ok(o: &Output) {
    assert!(
        o.status.success(),
        "exit {:?}\n--- stdout\n{}\n--- stderr\n{}",
        o.status.code(),
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr)
    );
}

fn json(p: &Path) -> serde_json::Value {
    serde_json::from_str(
        &std::fs::read_to_string(p).unwrap_or_else(|e| panic!("{}: {e}", p.display())),
    )
    .unwrap()
}

fn csv_rows(p: &Path) -> Vec<BTreeMap<String, String>> {
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

fn parquet(p: &Path) -> DataFrame {
    ParquetReader::new(std::fs::File::open(p).unwrap())
        .finish()
        .unwrap()
}

fn f64s(df: &DataFrame, c: &str) -> Vec<f64> {
    df.column(c)
        .unwrap()
        .f64()
        .unwrap()
        .iter()
        .map(|v| v.unwrap())
        .collect()
}

fn simulate(w: &Workdir, dir: &str, extra: &[&str]) -> PathBuf {
    let mut args = vec!["simulate", dir];
    args.extend_from_slice(extra);
    ok(&plotsieve(&w.0, &args));
    w.path(dir).join("trial.toml")
}

fn all_files(dir: &Path) -> BTreeMap<String, Vec<u8>> {
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

const STAGES: [&str; 4] = ["1-ingest", "2-clean", "3-plots", "4-adjust"];

#[test]
fn sample_input_runs_end_to_end_and_accounts_for_every_point() {
    let w = Workdir::new("sample");
    let sample = repo().join("sample-input");
    let before = all_files(&sample);
    let out = w.path("run");
    ok(&plotsieve(
        &w.0,
        &[
            "run",
            sample.join("trial.toml").to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
            "--quiet",
        ],
    ));
    assert_eq!(before, all_files(&sample), "inputs must never be modified");
    for f in [
        "manifest.json",
        "1-ingest/points.parquet",
        "1-ingest/plots.geojson",
        "2-clean/points.parquet",
        "3-plots/plots.csv",
        "3-plots/points.parquet",
        "4-adjust/adjusted_plots.csv",
        "4-adjust/treatments.csv",
        "4-adjust/hyperparameters.csv",
        "5-report/report.md",
    ] {
        assert!(out.join(f).is_file(), "missing {f}");
    }
    let mut prev_kept = None;
    for s in STAGES {
        let sum = json(&out.join(s).join("summary.json"));
        let (cin, kept, rej) = (
            sum["count_in"].as_u64().unwrap(),
            sum["kept"].as_u64().unwrap(),
            sum["rejected"].as_u64().unwrap(),
        );
        assert_eq!(cin, kept + rej, "{s}: count in = kept + rejected");
        let by_rule: u64 = sum["by_rule"]
            .as_object()
            .unwrap()
            .values()
            .map(|v| v.as_u64().unwrap())
            .sum();
        assert_eq!(by_rule, rej, "{s}: rules add up");
        let rows = csv_rows(&out.join(s).join("rejected.csv"));
        let plot_rows = sum
            .get("plots")
            .and_then(|p| p["set_aside"].as_u64())
            .unwrap_or(0);
        assert_eq!(rows.len() as u64, rej + plot_rows, "{s}: rejected.csv rows");
        if s == "4-adjust" {
            assert_eq!(
                Some(cin),
                prev_kept,
                "adjust takes the plots stage's kept plots"
            );
        } else if let Some(k) = prev_kept {
            assert_eq!(cin, k, "{s} takes the previous stage's kept points");
        }
        prev_kept = Some(match sum.get("plots") {
            Some(p) => {
                let (pi, pk, ps) = (
                    p["count_in"].as_u64().unwrap(),
                    p["kept"].as_u64().unwrap(),
                    p["set_aside"].as_u64().unwrap(),
                );
                assert_eq!(pi, pk + ps, "plots: plots in = kept + set aside");
                pk
            }
            None => kept,
        });
    }
    // The ingest count equals the data lines of the exports.
    let lines: u64 = std::fs::read_dir(sample.join("monitor"))
        .unwrap()
        .map(|e| {
            std::fs::read_to_string(e.unwrap().path())
                .unwrap()
                .lines()
                .count() as u64
                - 1
        })
        .sum();
    assert_eq!(
        json(&out.join("1-ingest/summary.json"))["count_in"]
            .as_u64()
            .unwrap(),
        lines
    );
    // Plot points: every kept clean point is in exactly one plot or rejected.
    let pp = parquet(&out.join("3-plots/points.parquet"));
    let plots_sum = json(&out.join("3-plots/summary.json"));
    assert_eq!(pp.height() as u64, plots_sum["kept"].as_u64().unwrap());
    let manifest = json(&out.join("manifest.json"));
    for s in ["ingest", "clean", "plots", "adjust", "report"] {
        assert_eq!(manifest["stages"][s]["status"], "done", "{s}");
    }
    assert_eq!(
        manifest["inputs"].as_array().unwrap().len(),
        5,
        "trial, two exports, plots, design"
    );
    assert_eq!(manifest["inputs"][0]["sha256"].as_str().unwrap().len(), 64);
    let treatments = csv_rows(&out.join("4-adjust/treatments.csv"));
    for field in ["A", "B", "all"] {
        let n = treatments.iter().filter(|r| r["field"] == field).count();
        assert_eq!(n, 6, "six treatments in field {field}");
    }
    for r in treatments.iter().filter(|r| r["treatment"] != "check") {
        let p: f64 = r["p_uplift_gt0"].parse().unwrap();
        assert!((0.0..=1.0).contains(&p));
        let (lo, up, hi): (f64, f64, f64) = (
            r["uplift_lo95_t_ha"].parse().unwrap(),
            r["uplift_t_ha"].parse().unwrap(),
            r["uplift_hi95_t_ha"].parse().unwrap(),
        );
        assert!(lo < up && up < hi);
    }
    let report = std::fs::read_to_string(out.join("5-report/report.md")).unwrap();
    assert!(
        report.contains("statistical estimates") && report.contains("licensed agronomic advice")
    );
    assert!(
        report.contains("| clean | pass_start |"),
        "removals by rule listed"
    );
}

#[test]
fn rerun_gives_identical_tables() {
    let w = Workdir::new("rerun");
    let trial = simulate(&w, "trial", &["--seed", "5"]);
    let t = trial.to_str().unwrap();
    ok(&plotsieve(&w.0, &["run", t, "--out", "a", "--quiet"]));
    ok(&plotsieve(&w.0, &["run", t, "--out", "b", "--quiet"]));
    let mut a = all_files(&w.path("a"));
    let mut b = all_files(&w.path("b"));
    a.remove("manifest.json");
    b.remove("manifest.json");
    assert_eq!(a.keys().collect::<Vec<_>>(), b.keys().collect::<Vec<_>>());
    for (k, v) in &a {
        assert!(v == &b[k], "{k} differs between reruns");
    }
}

#[test]
fn stage_clean_with_set_changes_clean_and_leaves_ingest_untouched() {
    let w = Workdir::new("stage");
    let trial = simulate(&w, "trial", &["--seed", "2"]);
    let t = trial.to_str().unwrap();
    ok(&plotsieve(&w.0, &["run", t, "--out", "run", "--quiet"]));
    let ingest_before = all_files(&w.path("run/1-ingest"));
    let mtime = std::fs::metadata(w.path("run/1-ingest/points.parquet"))
        .unwrap()
        .modified()
        .unwrap();
    let clean_before = json(&w.path("run/2-clean/summary.json"));
    let clean_pts_before = std::fs::read(w.path("run/2-clean/points.parquet")).unwrap();
    ok(&plotsieve(
        &w.0,
        &[
            "stage",
            "clean",
            t,
            "--out",
            "run",
            "--quiet",
            "--set",
            "clean.speed.min_m_s=2.1",
        ],
    ));
    let clean_after = json(&w.path("run/2-clean/summary.json"));
    assert!(
        clean_after["by_rule"]["speed_min"].as_u64().unwrap()
            > clean_before["by_rule"]["speed_min"].as_u64().unwrap_or(0) + 100,
        "raising the speed minimum removes more points: {} -> {}",
        clean_before["by_rule"]["speed_min"],
        clean_after["by_rule"]["speed_min"]
    );
    assert_ne!(
        clean_pts_before,
        std::fs::read(w.path("run/2-clean/points.parquet")).unwrap()
    );
    assert_eq!(
        ingest_before,
        all_files(&w.path("run/1-ingest")),
        "ingest outputs untouched"
    );
    assert_eq!(
        mtime,
        std::fs::metadata(w.path("run/1-ingest/points.parquet"))
            .unwrap()
            .modified()
            .unwrap()
    );
    let m = json(&w.path("run/manifest.json"));
    assert_eq!(m["stages"]["ingest"]["status"], "done");
    assert_eq!(m["stages"]["clean"]["status"], "done");
    assert_eq!(
        m["stages"]["clean"]["settings"]["clean"]["speed"]["min_m_s"],
        2.1
    );
    for s in ["plots", "adjust", "report"] {
        assert_eq!(m["stages"][s]["status"], "stale", "{s}");
    }
    // A stale upstream must be rerun before the stage after it.
    let o = plotsieve(&w.0, &["stage", "adjust", t, "--out", "run", "--quiet"]);
    assert_eq!(o.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&o.stderr).contains("rerun stage plots first"));
    ok(&plotsieve(
        &w.0,
        &["stage", "plots", t, "--out", "run", "--quiet"],
    ));
}

#[test]
fn missing_upstream_output_says_which_stage_to_run() {
    let w = Workdir::new("upstream");
    let trial = simulate(&w, "trial", &["--seed", "3"]);
    let t = trial.to_str().unwrap();
    let o = plotsieve(&w.0, &["stage", "plots", t, "--out", "run"]);
    assert_eq!(o.status.code(), Some(1));
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("run stage ingest first"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    ok(&plotsieve(
        &w.0,
        &["stage", "ingest", t, "--out", "run", "--quiet"],
    ));
    let o = plotsieve(&w.0, &["stage", "plots", t, "--out", "run"]);
    assert_eq!(o.status.code(), Some(1));
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("run stage clean first"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
}

#[test]
fn malformed_rows_land_in_rejected_csv() {
    let w = Workdir::new("malformed");
    let trial = simulate(&w, "trial", &["--seed", "4"]);
    let export = w.path("trial/monitor/field-A.csv");
    let text = std::fs::read_to_string(&export).unwrap();
    let mut lines: Vec<String> = text.lines().map(String::from).collect();
    let n_before = lines.len() - 1;
    // Line 11: a flow that is not a number; line 21: a truncated record; line 31: a bad time.
    let mut f: Vec<String> = lines[10].split(',').map(String::from).collect();
    f[3] = "abc".into();
    lines[10] = f.join(",");
    lines[20] = lines[20].split(',').take(4).collect::<Vec<_>>().join(",");
    let mut g: Vec<String> = lines[30].split(',').map(String::from).collect();
    g[0] = "2026-09-18 noon".into();
    lines[30] = g.join(",");
    std::fs::write(&export, lines.join("\n") + "\n").unwrap();
    let t = trial.to_str().unwrap();
    ok(&plotsieve(
        &w.0,
        &["stage", "ingest", t, "--out", "run", "--quiet"],
    ));
    let rej = csv_rows(&w.path("run/1-ingest/rejected.csv"));
    let find = |line: &str| {
        rej.iter()
            .find(|r| r["source_file"] == "monitor/field-A.csv" && r["source_row"] == line)
            .cloned()
    };
    let r = find("11").expect("line 11 rejected");
    assert_eq!(
        (
            r["rule"].as_str(),
            r["column"].as_str(),
            r["value"].as_str()
        ),
        ("unparseable", "mass_flow_lb_s", "abc")
    );
    let r = find("21").expect("line 21 rejected");
    assert_eq!(
        (r["rule"].as_str(), r["value"].as_str(), r["limit"].as_str()),
        ("wrong_field_count", "4 fields", "10 fields")
    );
    let r = find("31").expect("line 31 rejected");
    assert_eq!(
        (
            r["rule"].as_str(),
            r["column"].as_str(),
            r["value"].as_str()
        ),
        ("unparseable", "time_utc", "2026-09-18 noon")
    );
    let sum = json(&w.path("run/1-ingest/summary.json"));
    assert_eq!(sum["by_file"]["monitor/field-A.csv"]["unparseable"], 2);
    let pts = parquet(&w.path("run/1-ingest/points.parquet"));
    let from_a = pts
        .column("file_index")
        .unwrap()
        .u32()
        .unwrap()
        .iter()
        .filter(|v| *v == Some(0))
        .count();
    assert_eq!(from_a, n_before - 3);
}

/// A tiny one-field trial: a straight pass north at `speed` m/s with constant readings.
fn tiny_trial(
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

#[test]
fn worked_yield_and_moisture_examples_through_the_binary() {
    // ../shared/CHECKS.md, arithmetic: 20 kg/s at 1.8 m/s with a 9.144 m (30 ft) header is
    // 12,151.26 kg/ha wet; at 15.5 % moisture that is also the corn standard-moisture yield.
    let w = Workdir::new("worked1");
    let t = tiny_trial(&w, 20.0, 1.8, 30.0, 15.5, "t_ha", "", &[]);
    ok(&plotsieve(
        &w.0,
        &[
            "stage",
            "ingest",
            t.to_str().unwrap(),
            "--out",
            "run",
            "--quiet",
        ],
    ));
    ok(&plotsieve(
        &w.0,
        &[
            "stage",
            "clean",
            t.to_str().unwrap(),
            "--out",
            "run",
            "--quiet",
        ],
    ));
    let df = parquet(&w.path("run/2-clean/points.parquet"));
    assert!(df.height() >= 90, "kept {}", df.height());
    for (wet, std, t_ha) in f64s(&df, "yield_wet_kg_ha")
        .iter()
        .zip(f64s(&df, "yield_std_kg_ha"))
        .zip(f64s(&df, "yield_t_ha"))
        .map(|((a, b), c)| (*a, b, c))
    {
        assert!((wet - 12_151.26).abs() < 0.01, "{wet}");
        assert!((std - 12_151.26).abs() < 0.01, "{std}");
        assert!((t_ha - 12.15126).abs() < 1e-5, "{t_ha}");
    }
    drop(w);
    // UF/IFAS EDIS AG442: 10,000 lb/ac wet at 20 % moisture is 9,467.46 lb/ac at 15.5 %,
    // i.e. 169.06 bu/ac of corn at 56 lb/bu (USDA ERS AH-697). 10,000 lb/ac = 11,208.51 kg/ha
    // (1 lb/ac = 1.120851 kg/ha), so the flow is 11,208.51 x 1.8 x 9.144 / 10,000 kg/s.
    let w = Workdir::new("worked2");
    let lb_ac = 0.45359237 / 0.40468564224;
    let flow = 10_000.0 * lb_ac * 1.8 * 9.144 / 10_000.0;
    let t = tiny_trial(&w, flow, 1.8, 30.0, 20.0, "bu_ac", "", &[]);
    ok(&plotsieve(
        &w.0,
        &[
            "stage",
            "ingest",
            t.to_str().unwrap(),
            "--out",
            "run",
            "--quiet",
        ],
    ));
    ok(&plotsieve(
        &w.0,
        &[
            "stage",
            "clean",
            t.to_str().unwrap(),
            "--out",
            "run",
            "--quiet",
        ],
    ));
    let df = parquet(&w.path("run/2-clean/points.parquet"));
    for (std, bu) in f64s(&df, "yield_std_kg_ha")
        .iter()
        .zip(f64s(&df, "yield_bu_ac"))
    {
        assert!((std / lb_ac - 9_467.46).abs() < 0.01, "{}", std / lb_ac);
        assert!((bu - 169.0618).abs() < 1e-3, "{bu}");
    }
}

#[test]
fn utm_coordinates_match_pyproj_to_the_millimetre() {
    let text = std::fs::read_to_string(repo().join("tests/fixtures/utm_pyproj.csv")).unwrap();
    let mut groups: BTreeMap<(String, String), Vec<(f64, f64, f64, f64)>> = BTreeMap::new();
    for line in text.lines().filter(|l| !l.starts_with('#')).skip(1) {
        let f: Vec<&str> = line.split(',').collect();
        let v: Vec<f64> = f[2..].iter().map(|x| x.parse().unwrap()).collect();
        groups
            .entry((f[0].into(), f[1].into()))
            .or_default()
            .push((v[0], v[1], v[2], v[3]));
    }
    assert!(groups.len() >= 2);
    for ((zone, hemi), rows) in groups {
        let w = Workdir::new("utm");
        let ll: Vec<(f64, f64)> = rows.iter().map(|r| (r.0, r.1)).collect();
        let t = tiny_trial(&w, 10.0, 2.0, 30.0, 15.5, "t_ha", "", &ll);
        let zs = format!("ingest.utm_zone={zone}");
        let hs = format!("ingest.hemisphere={hemi}");
        ok(&plotsieve(
            &w.0,
            &[
                "stage",
                "ingest",
                t.to_str().unwrap(),
                "--out",
                "run",
                "--quiet",
                "--set",
                &zs,
                "--set",
                &hs,
            ],
        ));
        let df = parquet(&w.path("run/1-ingest/points.parquet"));
        let (x, y) = (f64s(&df, "x_m"), f64s(&df, "y_m"));
        assert_eq!(x.len(), rows.len());
        for (i, r) in rows.iter().enumerate() {
            assert!(
                (x[i] - r.2).abs() < 1e-3 && (y[i] - r.3).abs() < 1e-3,
                "zone {zone}{hemi} lon {} lat {}: ours ({}, {}) pyproj ({}, {})",
                r.0,
                r.1,
                x[i],
                y[i],
                r.2,
                r.3
            );
        }
    }
}

#[test]
fn simulated_trials_recover_true_effects_and_trend() {
    let mut covered = 0;
    let mut total = 0;
    for seed in [11u64, 12, 13] {
        let w = Workdir::new("truth");
        let trial = simulate(&w, "trial", &["--seed", &seed.to_string()]);
        ok(&plotsieve(
            &w.0,
            &["run", trial.to_str().unwrap(), "--out", "run", "--quiet"],
        ));
        let truth = json(&w.path("trial/truth.json"));
        let effects = truth["effects_t_ha"].as_object().unwrap();
        for r in csv_rows(&w.path("run/4-adjust/treatments.csv"))
            .iter()
            .filter(|r| r["treatment"] != "check" && r["field"] != "all")
        {
            let true_up = effects[&r["treatment"]].as_f64().unwrap();
            let lo: f64 = r["uplift_lo95_t_ha"].parse().unwrap();
            let hi: f64 = r["uplift_hi95_t_ha"].parse().unwrap();
            total += 1;
            if lo <= true_up && true_up <= hi {
                covered += 1;
            }
        }
        // The estimated spatial effect follows the true trend at the plot centroids.
        let trend: BTreeMap<String, f64> = truth_by_plot(&truth, "trend_t_ha");
        let adj = csv_rows(&w.path("run/4-adjust/adjusted_plots.csv"));
        for field in ["A", "B"] {
            let rows: Vec<_> = adj.iter().filter(|r| r["field"] == field).collect();
            let est: Vec<f64> = rows
                .iter()
                .map(|r| r["spatial_effect_t_ha"].parse().unwrap())
                .collect();
            let tru: Vec<f64> = rows.iter().map(|r| trend[&r["plot_id"]]).collect();
            let c = plotsieve_stages::util::correlation(&est, &tru);
            assert!(
                c > 0.6,
                "seed {seed} field {field}: correlation of spatial effect with true trend {c:.3}"
            );
        }
    }
    assert_eq!(total, 30);
    assert!(
        covered >= 24,
        "{covered} of {total} true uplifts inside their 95 % intervals"
    );
}

#[test]
fn check_lists_every_problem_and_writes_nothing() {
    let w = Workdir::new("check");
    let trial = simulate(&w, "trial", &["--seed", "6"]);
    let t = trial.to_str().unwrap();
    let o = plotsieve(&w.0, &["check", t]);
    ok(&o);
    // Break two things: a mapped column and the design.
    let design = w.path("trial/design.csv");
    let text = std::fs::read_to_string(&design).unwrap();
    let kept: Vec<&str> = text.lines().filter(|l| !l.starts_with("A-101,")).collect();
    std::fs::write(&design, kept.join("\n") + "\n").unwrap();
    let before = all_files(&w.0);
    let o = plotsieve(&w.0, &["check", t, "--set", "columns.flow.name=grain_kg"]);
    assert_eq!(o.status.code(), Some(1));
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(
        out.contains("\"grain_kg\"")
            && out.contains("monitor/field-A.csv")
            && out.contains("monitor/field-B.csv"),
        "{out}"
    );
    assert!(
        out.contains("A-101"),
        "the plot missing from the design is named: {out}"
    );
    assert_eq!(before, all_files(&w.0), "check writes nothing");
}

#[test]
fn bad_settings_name_the_key() {
    let w = Workdir::new("settings");
    let trial = simulate(&w, "trial", &["--seed", "7"]);
    let t = trial.to_str().unwrap();
    let cases = [
        ("clean.speed.bogus=1", "unknown key clean.speed.bogus"),
        (
            "clean.speed.min_m_s=fast",
            "clean.speed.min_m_s expects a number",
        ),
        (
            "clean.speed.min_m_s=5",
            "clean.speed.min_m_s must be below clean.speed.max_m_s (got 5 and 4)",
        ),
        ("plots.min_points=0", "plots.min_points must be at least 1"),
        (
            "clean.disabled_rules=[\"no_such_rule\"]",
            "clean.disabled_rules: unknown rule \"no_such_rule\"",
        ),
        (
            "clean.speed.settle_s=-1",
            "clean.speed.settle_s must be a finite number >= 0 (got -1)",
        ),
        (
            "clean.delay.min_s=25",
            "clean.delay.min_s must not be above clean.delay.max_s (got 25 and 20)",
        ),
        (
            "adjust.product_prior_mean.prod-a=0.3",
            "adjust.product_prior_mean.prod-a has no adjust.product_prior_sd.prod-a",
        ),
        (
            "adjust.product_prior_sd.prod-a=0",
            "adjust.product_prior_sd.prod-a must be above 0 (got 0)",
        ),
        (
            "adjust.pooling=\"together\"",
            "adjust.pooling must be \"joint\" or \"separate\" (got \"together\")",
        ),
        (
            "adjust.range_grid_points=2",
            "adjust.range_grid_points must be between 3 and 40 (got 2)",
        ),
    ];
    for (set, msg) in cases {
        let o = plotsieve(&w.0, &["run", t, "--out", "run", "--set", set]);
        assert_eq!(o.status.code(), Some(1), "{set}");
        let e = String::from_utf8_lossy(&o.stderr);
        assert!(e.contains(msg), "--set {set}: expected {msg:?} in {e}");
    }
    assert!(!w.path("run").exists(), "a bad setting writes nothing");
}

#[test]
fn joint_adjust_writes_priors_intervals_and_the_interaction_row() {
    // The demo trial has two fields: the joint fit's tables through the binary, with an
    // informative prior on one product given on the command line.
    let w = Workdir::new("joint");
    let trial = simulate(&w, "trial", &["--seed", "3"]);
    ok(&plotsieve(
        &w.0,
        &[
            "run",
            trial.to_str().unwrap(),
            "--out",
            "run",
            "--quiet",
            "--set",
            "adjust.product_prior_mean.prod-a=0.25",
            "--set",
            "adjust.product_prior_sd.prod-a=0.1",
        ],
    ));
    let h = csv_rows(&w.path("run/4-adjust/hyperparameters.csv"));
    let all = h.iter().find(|r| r["field"] == "all").expect("joint row");
    let (m, lo, hi): (f64, f64, f64) = (
        all["interaction_sd_t_ha"].parse().unwrap(),
        all["interaction_sd_lo95_t_ha"].parse().unwrap(),
        all["interaction_sd_hi95_t_ha"].parse().unwrap(),
    );
    assert!(lo <= m && m <= hi && hi > 0.0, "{m} {lo} {hi}");
    assert!(all["method"].starts_with("joint"), "{}", all["method"]);
    for r in h.iter().filter(|r| r["field"] != "all") {
        let v = |k: &str| -> f64 { r[k].parse().unwrap() };
        assert!(
            v("noise_sd_lo95_t_ha") <= v("noise_sd_t_ha")
                && v("noise_sd_t_ha") <= v("noise_sd_hi95_t_ha")
        );
        assert!(v("spatial_share_lo95") >= 0.0 && v("spatial_share_hi95") <= 1.0);
        assert_eq!(r["method"], "exact");
    }
    let t = csv_rows(&w.path("run/4-adjust/treatments.csv"));
    for r in t.iter().filter(|r| r["treatment"] != "check") {
        let v = |k: &str| -> f64 { r[k].parse().unwrap() };
        assert!(
            v("uplift_lo95_t_ha") < v("uplift_lo90_t_ha")
                && v("uplift_lo90_t_ha") < v("uplift_t_ha")
        );
        assert!(
            v("uplift_t_ha") < v("uplift_hi90_t_ha")
                && v("uplift_hi90_t_ha") < v("uplift_hi95_t_ha")
        );
        if r["treatment"] == "prod-a" {
            assert_eq!((v("prior_mean_t_ha"), v("prior_sd_t_ha")), (0.25, 0.1));
        } else {
            assert!(v("prior_sd_t_ha") > 1.0, "weak default prior");
        }
    }
    let md = std::fs::read_to_string(w.path("run/5-report/report.md")).unwrap();
    assert!(
        md.contains("0.25 +- 0.10"),
        "the prior is shown beside the posterior"
    );
}

#[test]
fn automatic_flow_delay_is_within_one_second_of_the_truth() {
    // Known-truth simulation: true delays across the typical 8-14 s range (Beal & Tian 2001),
    // on fields of eight blocks (passes of about 530 m), two exports each.
    let mut worst: f64 = 0.0;
    for (delay, seed) in [(8.0, 41u64), (9.5, 42), (11.0, 43), (12.5, 44), (14.0, 45)] {
        let w = Workdir::new("delay");
        let d = delay.to_string();
        let trial = simulate(
            &w,
            "trial",
            &[
                "--seed",
                &seed.to_string(),
                "--blocks",
                "8",
                "--flow-delay",
                &d,
            ],
        );
        let t = trial.to_str().unwrap();
        ok(&plotsieve(
            &w.0,
            &["stage", "ingest", t, "--out", "run", "--quiet"],
        ));
        ok(&plotsieve(
            &w.0,
            &["stage", "clean", t, "--out", "run", "--quiet"],
        ));
        let sum = json(&w.path("run/2-clean/summary.json"));
        let exports = sum["details"]["exports"].as_object().unwrap();
        assert_eq!(exports.len(), 2);
        for (f, e) in exports {
            assert_eq!(e["flow_delay_source"], "estimated", "{f}");
            let est = e["flow_delay_s"].as_f64().unwrap();
            assert!(
                e["flow_delay_estimate"]["curve"].as_array().unwrap().len() == 21,
                "curve 0..20 s"
            );
            let err = (est - delay).abs();
            worst = worst.max(err);
            assert!(
                err < 1.0,
                "seed {seed} {f}: estimated {est:.2} s, true {delay} s"
            );
        }
    }
    eprintln!("largest flow-delay error over 10 exports: {worst:.2} s");
}

#[test]
fn cleaning_removes_injected_artifacts_and_spares_clean_points() {
    // Truth labels from the simulator say which records carry which artifact.
    let mut art_total = 0usize;
    let mut art_removed = 0usize;
    let mut clean_total = 0usize;
    let mut clean_removed = 0usize;
    let mut by_label: BTreeMap<String, (usize, usize)> = BTreeMap::new();
    let mut clean_by_rule: BTreeMap<String, usize> = BTreeMap::new();
    for seed in [51u64, 52, 53] {
        let w = Workdir::new("artifacts");
        let trial = simulate(&w, "trial", &["--seed", &seed.to_string()]);
        let t = trial.to_str().unwrap();
        ok(&plotsieve(
            &w.0,
            &["stage", "ingest", t, "--out", "run", "--quiet"],
        ));
        ok(&plotsieve(
            &w.0,
            &["stage", "clean", t, "--out", "run", "--quiet"],
        ));
        let truth = json(&w.path("trial/truth.json"));
        let rejected: BTreeMap<(String, u64), String> =
            csv_rows(&w.path("run/2-clean/rejected.csv"))
                .into_iter()
                .map(|r| {
                    (
                        (r["source_file"].clone(), r["source_row"].parse().unwrap()),
                        r["rule"].clone(),
                    )
                })
                .collect();
        for (file, labels) in truth["artifacts"].as_object().unwrap() {
            let lines = std::fs::read_to_string(w.path("trial").join(file))
                .unwrap()
                .lines()
                .count() as u64;
            let mut labelled = std::collections::BTreeSet::new();
            for (label, rows) in labels.as_object().unwrap() {
                let e = by_label.entry(label.clone()).or_default();
                for r in rows.as_array().unwrap() {
                    let r = r.as_u64().unwrap();
                    labelled.insert(r);
                    e.0 += 1;
                    e.1 += usize::from(rejected.contains_key(&(file.clone(), r)));
                }
            }
            for row in 2..=lines {
                let gone = rejected.get(&(file.clone(), row));
                if labelled.contains(&row) {
                    art_total += 1;
                    art_removed += usize::from(gone.is_some());
                } else {
                    clean_total += 1;
                    if let Some(rule) = gone {
                        clean_removed += 1;
                        *clean_by_rule.entry(rule.clone()).or_default() += 1;
                    }
                }
            }
        }
    }
    eprintln!("artifact label: removed / labelled");
    for (l, (n, r)) in &by_label {
        eprintln!("  {l:14} {r:5} / {n:5}");
    }
    eprintln!("clean records removed, by rule: {clean_by_rule:?}");
    let art = art_removed as f64 / art_total as f64;
    let clean = clean_removed as f64 / clean_total as f64;
    eprintln!(
        "artifact records removed {:.1} %, clean records removed {:.1} %",
        100.0 * art,
        100.0 * clean
    );
    assert!(
        art >= 0.90,
        "only {:.1} % of artifact records removed",
        100.0 * art
    );
    assert!(
        clean < 0.05,
        "{:.1} % of clean records removed",
        100.0 * clean
    );
    for (l, (n, r)) in &by_label {
        if l != "spike" {
            assert!(*r as f64 >= 0.9 * *n as f64, "{l}: {r} of {n} removed");
        }
    }
}

#[test]
fn plot_geometry_matches_shapely() {
    use geo::{Area, Contains, LineString, Polygon};
    use plotsieve_stages::plots::geometry::{clip_area, coverage, signed_area};
    // Fixture made by tests/fixtures/make_fixtures.py with shapely (its version is recorded
    // in the file's "made_by").
    let fx = json(&repo().join("tests/fixtures/geometry_shapely.json"));
    assert!(fx["made_by"].as_str().unwrap().contains("shapely"));
    let ring = |v: &serde_json::Value| -> Vec<(f64, f64)> {
        v.as_array()
            .unwrap()
            .iter()
            .map(|p| (p[0].as_f64().unwrap(), p[1].as_f64().unwrap()))
            .collect()
    };
    let mut polys = BTreeMap::new();
    for (name, p) in fx["polygons"].as_object().unwrap() {
        let ext = ring(&p["exterior"]);
        let holes: Vec<LineString<f64>> = p["holes"]
            .as_array()
            .unwrap()
            .iter()
            .map(|h| LineString::from(ring(h)))
            .collect();
        let poly = Polygon::new(LineString::from(ext.clone()), holes);
        let area = p["area"].as_f64().unwrap();
        assert!(
            (poly.unsigned_area() - area).abs() < 1e-9 * area,
            "{name}: area {} vs shapely {area}",
            poly.unsigned_area()
        );
        polys.insert(name.clone(), (poly, ext));
    }
    let mut n = 0;
    for pt in fx["points"].as_array().unwrap() {
        let (poly, _) = &polys[pt["polygon"].as_str().unwrap()];
        let (x, y) = (pt["x"].as_f64().unwrap(), pt["y"].as_f64().unwrap());
        assert_eq!(
            poly.contains(&geo::Point::new(x, y)),
            pt["inside"].as_bool().unwrap(),
            "point ({x}, {y})"
        );
        n += 1;
    }
    assert_eq!(n, 120);
    for f in fx["footprints"].as_array().unwrap() {
        let (_, ext) = &polys[f["polygon"].as_str().unwrap()];
        let fp = ring(&f["corners"]);
        let ours = clip_area(ext, &fp) / signed_area(&fp).abs();
        let theirs = f["inside_fraction"].as_f64().unwrap();
        assert!(
            (ours - theirs).abs() < 1e-9,
            "footprint inside fraction {ours} vs shapely {theirs}"
        );
    }
    let c = &fx["coverage"][0];
    let fps: Vec<Vec<(f64, f64)>> = c["footprints"]
        .as_array()
        .unwrap()
        .iter()
        .map(ring)
        .collect();
    let (_, ext) = &polys["rect"];
    let ours = coverage(ext, &fps, 0.25);
    let theirs = c["fraction"].as_f64().unwrap();
    assert!(
        (ours - theirs).abs() < 0.01,
        "coverage on a 0.25 m raster {ours} vs shapely union {theirs}"
    );
}

/// A simulated export's lines with every longitude moved `deg` degrees east.
fn shift_east(lines: &[String], deg: f64) -> Vec<String> {
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
fn truth_by_plot(truth: &serde_json::Value, key: &str) -> BTreeMap<String, f64> {
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
fn plot_rmse(plots_csv: &Path, truth: &serde_json::Value) -> (f64, usize) {
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

#[test]
fn border_trimming_brings_plot_means_closer_to_the_truth() {
    let (mut with, mut without) = (0.0, 0.0);
    // The simulator's grain mixing has an SD of 2.5 s, about 5.5 m of travel; an end trim of
    // 8 m (1.5 SD) fits it. The 15 m default is for real combines' ~30 m mixing length.
    for seed in [61u64, 62, 63, 64] {
        let w = Workdir::new("trim");
        let trial = simulate(&w, "trial", &["--seed", &seed.to_string()]);
        let t = trial.to_str().unwrap();
        ok(&plotsieve(
            &w.0,
            &[
                "run",
                t,
                "--out",
                "trimmed",
                "--quiet",
                "--set",
                "plots.end_trim_m=8",
            ],
        ));
        ok(&plotsieve(
            &w.0,
            &[
                "run",
                t,
                "--out",
                "untrimmed",
                "--quiet",
                "--set",
                "plots.end_trim_m=0",
                "--set",
                "plots.side_trim_m=0",
                "--set",
                "plots.min_swath_inside=0",
            ],
        ));
        let truth = json(&w.path("trial/truth.json"));
        let (a, na) = plot_rmse(&w.path("trimmed/3-plots/plots.csv"), &truth);
        let (b, nb) = plot_rmse(&w.path("untrimmed/3-plots/plots.csv"), &truth);
        eprintln!("seed {seed}: plot RMSE trimmed {a:.3} t/ha ({na} plots), untrimmed {b:.3} t/ha ({nb} plots)");
        with += a;
        without += b;
        // Every clean point is in exactly one plot or in rejected.csv.
        let pp = parquet(&w.path("trimmed/3-plots/points.parquet"));
        let ids: std::collections::BTreeSet<u64> = pp
            .column("point_id")
            .unwrap()
            .u64()
            .unwrap()
            .into_no_null_iter()
            .collect();
        assert_eq!(ids.len(), pp.height(), "no point in two plots");
        let rejected: std::collections::BTreeSet<u64> =
            csv_rows(&w.path("trimmed/3-plots/rejected.csv"))
                .iter()
                .filter_map(|r| r["id"].parse().ok())
                .collect();
        assert!(ids.is_disjoint(&rejected));
        let clean = parquet(&w.path("trimmed/2-clean/points.parquet"));
        let all: std::collections::BTreeSet<u64> = clean
            .column("point_id")
            .unwrap()
            .u64()
            .unwrap()
            .into_no_null_iter()
            .collect();
        let union: std::collections::BTreeSet<u64> = ids.union(&rejected).copied().collect();
        assert_eq!(union, all, "clean points = plot points + rejected");
    }
    eprintln!(
        "mean plot RMSE trimmed {:.4} vs untrimmed {:.4}",
        with / 4.0,
        without / 4.0
    );
    assert!(
        with < 0.95 * without,
        "mean plot RMSE trimmed {:.4} vs untrimmed {:.4}",
        with / 4.0,
        without / 4.0
    );
}

#[test]
fn grid_layout_replaces_a_boundary_file_and_stray_exports_are_far_from_trial() {
    let w = Workdir::new("layout");
    let trial = simulate(&w, "trial", &["--seed", "8"]);
    // A stray export: field A's records moved about 4 km east.
    let a: Vec<String> = std::fs::read_to_string(w.path("trial/monitor/field-A.csv"))
        .unwrap()
        .lines()
        .map(String::from)
        .collect();
    let stray = shift_east(&a, 0.05);
    std::fs::write(w.path("trial/monitor/stray.csv"), stray.join("\n") + "\n").unwrap();
    let t = trial.to_str().unwrap();
    ok(&plotsieve(&w.0, &["run", t, "--out", "run", "--quiet"]));
    let sum = json(&w.path("run/3-plots/summary.json"));
    assert!(
        sum["by_file"]["monitor/stray.csv"]["far_from_trial"]
            .as_u64()
            .unwrap()
            > 1000
    );
    assert!(sum["by_file"]["monitor/stray.csv"]
        .get("outside_plots")
        .is_none());
    let assign = &sum["details"]["points_per_export_and_field"];
    assert!(
        assign["monitor/field-A.csv"]["A"].as_u64().unwrap() > 100
            && assign["monitor/field-A.csv"].get("B").is_none()
    );
    assert!(
        assign.get("monitor/stray.csv").is_none(),
        "the stray export feeds no field"
    );
    // The same trial with a grid layout instead of the GeoJSON: one field of 2 x 2 plots.
    let dir = w.path("trial");
    std::fs::write(dir.join("design2.csv"), "plot_id,treatment,block,field\nG-101,check,1,G\nG-102,x,1,G\nG-201,x,2,G\nG-202,check,2,G\n").unwrap();
    let toml = std::fs::read_to_string(&trial).unwrap().replace("plots = \"plots.geojson\"\n", "").replace("design = \"design.csv\"", "design = \"design2.csv\"")
        + "\n[[layout]]\nfield = \"G\"\norigin_lon = -97.8\norigin_lat = 40.6\nbearing_deg = 0.0\nplot_width_m = 18.288\nplot_length_m = 60.0\nalley_m = 6.0\ncolumns = 2\nranges = 2\nnumbering = \"serpentine\"\nid_prefix = \"G-\"\n";
    std::fs::write(dir.join("grid.toml"), toml).unwrap();
    let g = dir.join("grid.toml");
    ok(&plotsieve(
        &w.0,
        &[
            "stage",
            "ingest",
            g.to_str().unwrap(),
            "--out",
            "grid",
            "--quiet",
        ],
    ));
    let gj = json(&w.path("grid/1-ingest/plots_wgs84.geojson"));
    let feats = gj["features"].as_array().unwrap();
    let ids: Vec<&str> = feats
        .iter()
        .map(|f| f["properties"]["plot_id"].as_str().unwrap())
        .collect();
    assert_eq!(
        ids,
        ["G-101", "G-102", "G-202", "G-201"],
        "serpentine numbering"
    );
    // G-101's corner is the origin (to about a centimetre after the round trip).
    let ring = feats[0]["geometry"]["coordinates"][0].as_array().unwrap();
    assert!(ring
        .iter()
        .any(|c| (c[0].as_f64().unwrap() + 97.8).abs() < 1e-7
            && (c[1].as_f64().unwrap() - 40.6).abs() < 1e-7));
    // Design mismatch: a design row without a plot is an error naming it, or a warning.
    std::fs::write(dir.join("design2.csv"), "plot_id,treatment,block,field\nG-101,check,1,G\nG-102,x,1,G\nG-201,x,2,G\nG-202,check,2,G\nG-999,x,3,G\n").unwrap();
    let o = plotsieve(
        &w.0,
        &[
            "stage",
            "ingest",
            g.to_str().unwrap(),
            "--out",
            "grid2",
            "--quiet",
        ],
    );
    assert_eq!(o.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&o.stderr).contains("G-999"));
    ok(&plotsieve(
        &w.0,
        &[
            "stage",
            "ingest",
            g.to_str().unwrap(),
            "--out",
            "grid2",
            "--quiet",
            "--set",
            "plots.design_mismatch=warn",
        ],
    ));
    let s = json(&w.path("grid2/1-ingest/summary.json"));
    assert!(s["details"]["warnings"][0]
        .as_str()
        .unwrap()
        .contains("G-999"));
}

#[test]
fn report_html_renders_in_headless_chromium_without_the_network() {
    let w = Workdir::new("html");
    let out = w.path("run");
    ok(&plotsieve(
        &w.0,
        &[
            "run",
            repo().join("sample-input/trial.toml").to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
            "--quiet",
        ],
    ));
    let html = std::fs::read_to_string(out.join("5-report/report.html")).unwrap();
    // Self-contained: no scripts, no external references; a policy that forbids fetching.
    for bad in ["<script", "src=", "href=", "url(", "@import"] {
        assert!(!html.contains(bad), "report.html contains {bad}");
    }
    assert!(html.contains("default-src 'none'"));
    assert!(html.contains("statistical estimates") && html.contains("licensed agronomic advice"));
    // Maps (5 per field), the forest plot, legends and axis units.
    assert_eq!(html.matches("<svg class=\"map\"").count(), 10);
    assert_eq!(html.matches("<svg class=\"forest\"").count(), 1);
    assert_eq!(html.matches("east from map corner (m)").count(), 10);
    assert!(html.contains("uplift over the check (t/ha)"));
    let chromium = ["/usr/bin/chromium", "/usr/bin/chromium-browser"]
        .into_iter()
        .find(|p| Path::new(p).exists());
    let Some(chromium) = chromium else {
        assert!(
            std::env::var("CI").is_err(),
            "CI must install chromium (.ci/run does)"
        );
        eprintln!("skipped the browser part: no chromium here (install Debian's chromium package)");
        return;
    };
    let netlog = w.path("netlog.json");
    let o = Command::new(chromium)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--host-resolver-rules=MAP * ~NOTFOUND",
        ])
        .arg(format!("--user-data-dir={}", w.path("profile").display()))
        .arg(format!("--log-net-log={}", netlog.display()))
        .arg("--dump-dom")
        .arg(format!(
            "file://{}",
            out.join("5-report/report.html").display()
        ))
        .output()
        .expect("chromium runs");
    assert!(
        o.status.success(),
        "chromium failed: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    let dom = String::from_utf8_lossy(&o.stdout);
    assert_eq!(
        dom.matches("<svg class=\"map\"").count(),
        10,
        "the browser built every map"
    );
    assert!(dom.matches("<table").count() >= 6, "tables present");
    assert!(dom.contains("<circle"), "points drawn");
    // The page itself asked for nothing: every URL in the network log is the report's own
    // file or the browser's own background services (which the flags and the host rules keep
    // from resolving).
    let log = std::fs::read_to_string(&netlog).unwrap_or_default();
    for url in log
        .split("\"url\":\"")
        .skip(1)
        .map(|s| s.split('"').next().unwrap_or(""))
    {
        let ok_url = url.starts_with("file://")
            || url.starts_with("data:")
            || ["google.com/", "googleapis.com/", "gstatic.com/"]
                .iter()
                .any(|h| url.contains(h));
        assert!(ok_url, "unexpected network request {url}");
    }
}

fn sha(p: &Path) -> String {
    use sha2::Digest;
    sha2::Sha256::digest(std::fs::read(p).unwrap())
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect()
}

#[test]
fn intake_matches_exports_to_trials_and_reruns_only_what_changed() {
    let w = Workdir::new("intake");
    // Two trials about 8 km apart.
    ok(&plotsieve(&w.0, &["simulate", "north", "--seed", "71"]));
    ok(&plotsieve(
        &w.0,
        &[
            "simulate",
            "south",
            "--seed",
            "72",
            "--origin-lon=-97.70",
            "--origin-lat=40.55",
        ],
    ));
    let inbox = w.path("inbox");
    std::fs::create_dir_all(&inbox).unwrap();
    let lines = |p: &str| -> Vec<String> {
        std::fs::read_to_string(w.path(p))
            .unwrap()
            .lines()
            .map(String::from)
            .collect()
    };
    let (na, nb, sa, sb) = (
        lines("north/monitor/field-A.csv"),
        lines("north/monitor/field-B.csv"),
        lines("south/monitor/field-A.csv"),
        lines("south/monitor/field-B.csv"),
    );
    for d in ["north/monitor", "south/monitor"] {
        std::fs::remove_dir_all(w.path(d)).unwrap();
    }
    let write = |name: &str, rows: &[String]| {
        std::fs::write(inbox.join(name), rows.join("\n") + "\n").unwrap()
    };
    let half = nb.len() / 2;
    // Two new exports for the north trial: field A, and the first half of field B.
    write("north-A.csv", &na);
    write("north-B1.csv", &nb[..half]);
    // One export spanning both trials: the rest of north B, then south A.
    let mut span = vec![nb[0].clone()];
    span.extend_from_slice(&nb[half..]);
    span.extend_from_slice(&sa[1..]);
    write("span.csv", &span);
    // One export that matches no trial (north A moved about 40 km east).
    let stray = shift_east(&na, 0.5);
    write("stray.csv", &stray);
    // One truncated file: south B cut in the middle of a line.
    let sb_text = sb.join("\n") + "\n";
    std::fs::write(inbox.join("south-B.csv"), &sb_text[..sb_text.len() / 2]).unwrap();
    // One export dropped a second time under another name.
    write("north-A-copy.csv", &na);
    std::fs::write(w.path("season.toml"), "[season]\nname = \"2026 harvest\"\n[[trial]]\nfile = \"north/trial.toml\"\nout = \"runs/north\"\n[[trial]]\nfile = \"south/trial.toml\"\nout = \"runs/south\"\n").unwrap();
    let before: BTreeMap<String, String> = std::fs::read_dir(&inbox)
        .unwrap()
        .map(|e| e.unwrap().path())
        .map(|p| {
            (
                p.file_name().unwrap().to_string_lossy().to_string(),
                sha(&p),
            )
        })
        .collect();
    let o = plotsieve(&w.0, &["intake", "inbox", "season.toml"]);
    ok(&o);
    let said = String::from_utf8_lossy(&o.stdout).to_string();
    eprintln!("{said}");
    assert!(said.contains("6 exports in the inbox, 5 new"), "{said}");
    assert!(said.contains("taken: north-A-copy.csv -> north/trial.toml"));
    assert!(said.contains("taken: north-B1.csv -> north/trial.toml"));
    assert!(
        said.contains("taken: span.csv -> north/trial.toml")
            && said.contains("taken: span.csv -> south/trial.toml")
    );
    assert!(said.contains("left in the inbox: stray.csv: matches no trial"));
    assert!(said.contains("left in the inbox: south-B.csv: partial"));
    assert!(
        said.contains("already seen: north-A.csv (same content as north-A-copy.csv, taken)"),
        "{said}"
    );
    assert!(said.contains("reran north/trial.toml") && said.contains("reran south/trial.toml"));
    // Nothing in the inbox changed or went missing.
    let after: BTreeMap<String, String> = std::fs::read_dir(&inbox)
        .unwrap()
        .map(|e| e.unwrap().path())
        .map(|p| {
            (
                p.file_name().unwrap().to_string_lossy().to_string(),
                sha(&p),
            )
        })
        .collect();
    assert_eq!(before, after);
    // Each trial got exactly its exports, counted once.
    let names = |d: &str| -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(w.path(d))
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().to_string())
            .collect();
        v.sort();
        v
    };
    // Inbox files are taken in name order, so the copy comes first and the original is the
    // one already seen.
    assert_eq!(
        names("north/monitor"),
        ["north-A-copy.csv", "north-B1.csv", "span.csv"]
    );
    assert_eq!(names("south/monitor"), ["span.csv"]);
    let m = json(&w.path("runs/north/manifest.json"));
    assert_eq!(
        m["inputs"].as_array().unwrap().len(),
        6,
        "trial, three exports, plots, design"
    );
    let ingest = json(&w.path("runs/north/1-ingest/summary.json"));
    assert_eq!(
        ingest["count_in"].as_u64().unwrap() as usize,
        (na.len() - 1) + (nb.len() - 1) + (sa.len() - 1)
    );
    let plots = json(&w.path("runs/south/3-plots/summary.json"));
    assert!(
        plots["by_file"]["monitor/span.csv"]["far_from_trial"]
            .as_u64()
            .unwrap()
            > 100,
        "north B records in south's run are far_from_trial"
    );
    let im = json(&w.path("intake-manifest.json"));
    assert_eq!(
        im["exports"].as_object().unwrap().len(),
        5,
        "five distinct contents"
    );
    // A second intake with nothing new does nothing.
    let north_mtime = std::fs::metadata(w.path("runs/north/manifest.json"))
        .unwrap()
        .modified()
        .unwrap();
    let o = plotsieve(&w.0, &["intake", "inbox", "season.toml"]);
    ok(&o);
    let said = String::from_utf8_lossy(&o.stdout);
    assert!(
        said.contains("nothing new") && !said.contains("reran"),
        "{said}"
    );
    // The complete south B arrives: only the south trial reruns.
    std::fs::write(inbox.join("south-B-complete.csv"), &sb_text).unwrap();
    let o = plotsieve(&w.0, &["intake", "inbox", "season.toml"]);
    ok(&o);
    let said = String::from_utf8_lossy(&o.stdout);
    assert!(
        said.contains("taken: south-B-complete.csv -> south/trial.toml")
            && said.contains("reran south/trial.toml")
            && !said.contains("reran north"),
        "{said}"
    );
    assert_eq!(
        north_mtime,
        std::fs::metadata(w.path("runs/north/manifest.json"))
            .unwrap()
            .modified()
            .unwrap()
    );
}

#[test]
fn calibration_over_200_simulated_trials() {
    // Known-truth simulation: 200 trials (two fields each, five products against the check),
    // fitted jointly. 95 % intervals of the per-field uplifts and of the pooled uplifts
    // should each cover the true uplift 92-98 % of the time, and a product with no true
    // effect (prod-c) should get P(uplift > 0) > 0.95 in about 5 % of fields.
    let w = Workdir::new("calibration");
    let seeds: Vec<u64> = (1000..1200).collect();
    let results: Vec<[usize; 6]> = std::thread::scope(|sc| {
        let handles: Vec<_> = seeds
            .chunks(100)
            .map(|chunk| {
                let w = &w;
                sc.spawn(move || {
                    let (mut cov, mut tot, mut fp, mut nulls, mut pcov, mut ptot) =
                        (0, 0, 0, 0, 0, 0);
                    for seed in chunk {
                        let dir = format!("t{seed}");
                        let trial = simulate(w, &dir, &["--seed", &seed.to_string()]);
                        let out = format!("r{seed}");
                        ok(&plotsieve(
                            &w.0,
                            &["run", trial.to_str().unwrap(), "--out", &out, "--quiet"],
                        ));
                        let truth = json(&w.path(&dir).join("truth.json"));
                        for r in csv_rows(&w.path(&out).join("4-adjust/treatments.csv")) {
                            if r["treatment"] == "check" {
                                continue;
                            }
                            let t = truth["effects_t_ha"][&r["treatment"]].as_f64().unwrap();
                            let lo: f64 = r["uplift_lo95_t_ha"].parse().unwrap();
                            let hi: f64 = r["uplift_hi95_t_ha"].parse().unwrap();
                            if r["field"] == "all" {
                                ptot += 1;
                                pcov += usize::from(lo <= t && t <= hi);
                                continue;
                            }
                            tot += 1;
                            cov += usize::from(lo <= t && t <= hi);
                            if t == 0.0 {
                                nulls += 1;
                                fp += usize::from(r["p_uplift_gt0"].parse::<f64>().unwrap() > 0.95);
                            }
                        }
                        let _ = std::fs::remove_dir_all(w.path(&dir));
                        let _ = std::fs::remove_dir_all(w.path(&out));
                    }
                    [cov, tot, fp, nulls, pcov, ptot]
                })
            })
            .collect();
        handles.into_iter().map(|h| h.join().unwrap()).collect()
    });
    let [cov, tot, fp, nulls, pcov, ptot] = results
        .iter()
        .fold([0; 6], |a, b| std::array::from_fn(|k| a[k] + b[k]));
    let coverage = cov as f64 / tot as f64;
    let false_pos = fp as f64 / nulls as f64;
    eprintln!("coverage {cov}/{tot} = {coverage:.3}; null products with P(uplift > 0) > 0.95: {fp}/{nulls} = {false_pos:.3}");
    let pooled = pcov as f64 / ptot as f64;
    eprintln!("pooled coverage {pcov}/{ptot} = {pooled:.3}");
    assert_eq!(tot, 2000);
    assert_eq!(ptot, 1000);
    assert!((0.92..=0.98).contains(&coverage), "coverage {coverage:.3}");
    assert!(
        (0.92..=0.98).contains(&pooled),
        "pooled coverage {pooled:.3}"
    );
    assert!(
        (0.02..=0.09).contains(&false_pos),
        "false-positive rate {false_pos:.3}"
    );
}

#[test]
fn spatial_model_is_more_efficient_with_a_trend_and_no_worse_without() {
    let w = Workdir::new("efficiency");
    let mut eff = BTreeMap::new();
    for (name, trend) in [("strong", "1200"), ("none", "0")] {
        let mut values = Vec::new();
        for seed in [81u64, 82, 83, 84] {
            let dir = format!("{name}{seed}");
            let trial = simulate(
                &w,
                &dir,
                &["--seed", &seed.to_string(), "--trend-sd", trend],
            );
            let out = format!("run-{dir}");
            ok(&plotsieve(
                &w.0,
                &["run", trial.to_str().unwrap(), "--out", &out, "--quiet"],
            ));
            for r in csv_rows(&w.path(&out).join("4-adjust/comparison.csv")) {
                values.push(r["efficiency"].parse::<f64>().unwrap());
            }
        }
        eff.insert(name, plotsieve_stages::util::median(&values));
    }
    eprintln!("median efficiency (RCBD contrast variance / spatial): {eff:?}");
    assert!(eff["strong"] > 1.5, "{eff:?}");
    assert!(eff["none"] > 0.85, "{eff:?}");
}

#[test]
fn plot_table_entry_fits_an_analysts_own_table() {
    let w = Workdir::new("table");
    let trial = simulate(&w, "trial", &["--seed", "91"]);
    ok(&plotsieve(
        &w.0,
        &["run", trial.to_str().unwrap(), "--out", "run", "--quiet"],
    ));
    // The analyst's table: the kept plots of that run, in the plot-table format.
    let mut table = String::from("plot_id,field,treatment,block,yield_t_ha,x_m,y_m\n");
    for r in csv_rows(&w.path("run/3-plots/plots.csv"))
        .iter()
        .filter(|r| r["status"] == "kept")
    {
        table += &format!(
            "{},{},{},{},{},{},{}\n",
            r["plot_id"],
            r["field"],
            r["treatment"],
            r["block"],
            r["yield_mean_t_ha"],
            r["centroid_x_m"],
            r["centroid_y_m"]
        );
    }
    std::fs::write(w.path("trial/table.csv"), table).unwrap();
    let text =
        std::fs::read_to_string(&trial).unwrap() + "\n[adjust]\nplot_table = \"table.csv\"\n";
    let t2 = w.path("trial/table-trial.toml");
    std::fs::write(&t2, text).unwrap();
    ok(&plotsieve(
        &w.0,
        &[
            "stage",
            "adjust",
            t2.to_str().unwrap(),
            "--out",
            "fresh",
            "--quiet",
        ],
    ));
    assert_eq!(
        std::fs::read(w.path("run/4-adjust/treatments.csv")).unwrap(),
        std::fs::read(w.path("fresh/4-adjust/treatments.csv")).unwrap(),
        "the same plots give the same treatment table"
    );
    let m = json(&w.path("fresh/manifest.json"));
    assert_eq!(m["stages"]["adjust"]["status"], "done");
    assert_eq!(
        m["inputs"].as_array().unwrap().len(),
        2,
        "trial file and plot table"
    );
    // A bad cell is named by file, line and column.
    std::fs::write(
        w.path("trial/table.csv"),
        "plot_id,field,treatment,block,yield_t_ha,x_m,y_m\nA-101,A,check,1,lots,0,0\n",
    )
    .unwrap();
    let o = plotsieve(
        &w.0,
        &[
            "stage",
            "adjust",
            t2.to_str().unwrap(),
            "--out",
            "fresh2",
            "--quiet",
        ],
    );
    assert_eq!(o.status.code(), Some(1));
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("table.csv, line 2, column yield_t_ha: expected a number, found \"lots\""),
        "{e}"
    );
}
