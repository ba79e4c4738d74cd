//! One simulated harvest written in several export forms (comma text with a speed column;
//! semicolons with decimal commas, date and time columns and distance per record; logged
//! every 3 s; no swath column) goes in through the binary and gives the same plots.

use crate::common::*;
use std::collections::BTreeMap;

/// Plot id -> (status, yield t/ha, coverage) from a run folder.
fn plots(run: &std::path::Path) -> BTreeMap<String, (String, f64, f64)> {
    csv_rows(&run.join("3-plots/plots.csv"))
        .into_iter()
        .map(|r| {
            (
                r["plot_id"].clone(),
                (
                    r["status"].clone(),
                    r["yield_mean_t_ha"].parse().unwrap_or(f64::NAN),
                    r["coverage"].parse().unwrap_or(f64::NAN),
                ),
            )
        })
        .collect()
}

/// Relative differences of kept plot yields of `b` from `a`, sorted.
fn yield_differences(
    a: &BTreeMap<String, (String, f64, f64)>,
    b: &BTreeMap<String, (String, f64, f64)>,
) -> Vec<f64> {
    let mut d: Vec<f64> = a
        .iter()
        .filter(|(k, v)| v.0 == "kept" && b[*k].0 == "kept")
        .map(|(k, v)| ((b[k].1 - v.1) / v.1).abs())
        .collect();
    d.sort_by(f64::total_cmp);
    d
}

fn mean_coverage(p: &BTreeMap<String, (String, f64, f64)>) -> f64 {
    let c: Vec<f64> = p.values().filter(|v| v.0 == "kept").map(|v| v.2).collect();
    c.iter().sum::<f64>() / c.len() as f64
}

fn run(w: &Workdir, trial: &std::path::Path, out: &str) {
    run_trial(w, trial, out, &[]);
}

/// Runs two trials into `ra` and `rb`; the same plots kept or set aside in both. Returns
/// the sorted relative differences of the plot yields kept in both.
fn same_plots(
    w: &Workdir,
    a: &std::path::Path,
    b: &std::path::Path,
    ra: &str,
    rb: &str,
) -> Vec<f64> {
    run(w, a, ra);
    run(w, b, rb);
    let (pa, pb) = (plots(&w.path(ra)), plots(&w.path(rb)));
    assert_eq!(
        pa.values().map(|v| &v.0).collect::<Vec<_>>(),
        pb.values().map(|v| &v.0).collect::<Vec<_>>()
    );
    let d = yield_differences(&pa, &pb);
    assert!(d.len() >= 40, "{} plots kept in both", d.len());
    d
}

/// The sorted differences `d` have a median under `median` and a largest under `largest`.
fn differences_within(d: &[f64], median: f64, largest: f64) {
    assert!(
        d[d.len() / 2] < median,
        "median difference {}",
        d[d.len() / 2]
    );
    largest_within(d, largest);
}

/// The largest of the sorted differences `d` is under `limit`.
fn largest_within(d: &[f64], limit: f64) {
    assert!(
        *d.last().unwrap() < limit,
        "largest difference {:?}",
        d.last()
    );
}

/// The same harvest written in another form gives the text form's plots (yields within
/// 1e-9) and the same cleaning rejections, row for row; runs into `r-text` and `run`.
fn same_as_the_text_form(w: &Workdir, text: &Path, other: &Path, run: &str) {
    let d = same_plots(w, text, other, "r-text", run);
    largest_within(&d, 1e-9);
    let (ra, rb) = (
        csv_rows(&w.path("r-text/2-clean/rejected.csv")),
        csv_rows(&w.path(&format!("{run}/2-clean/rejected.csv"))),
    );
    assert_eq!(ra.len(), rb.len());
    assert!(ra
        .iter()
        .zip(&rb)
        .all(|(x, y)| x["rule"] == y["rule"] && x["source_row"] == y["source_row"]));
}

/// A simulated harvest (seed 2) in the text form and in `form`, in folders `text` and
/// `dir`: their trial files.
fn text_and(w: &Workdir, dir: &str, form: &str) -> (PathBuf, PathBuf) {
    let text = simulate(w, "text", &["--seed", "2", "--quiet"]);
    let other = simulate(w, dir, &["--seed", "2", "--form", form, "--quiet"]);
    (text, other)
}

/// `simulate --seed 2 --form FORM` again, into `DIR2`: these files are the same bytes as in
/// `DIR`.
fn simulates_the_same_bytes(w: &Workdir, dir: &str, form: &str, files: &[&str]) {
    let again = format!("{dir}2");
    simulate(w, &again, &["--seed", "2", "--form", form, "--quiet"]);
    for f in files {
        assert_eq!(
            sha(&w.path(&format!("{dir}/{f}"))),
            sha(&w.path(&format!("{again}/{f}"))),
            "{f}"
        );
    }
}

#[test]
fn distance_per_record_with_decimal_commas_and_date_columns_reads_as_the_text_form() {
    let w = Workdir::new("forms-distance");
    let (text, dist) = text_and(&w, "dist", "distance_text");
    let head = read(&w.path("dist/monitor/field-A.csv"));
    assert!(head.starts_with("Date;Time;Longitude;Latitude;Flow_lb_s;Distance_in;Interval_s;"));
    assert!(head
        .lines()
        .nth(1)
        .unwrap()
        .starts_with("18/09/2026;09:00:00;-97,7"));
    // check names the format and the mapping it will use for each export.
    let out = checked(&w, dist.to_str().unwrap());
    assert!(
        out.contains("read: monitor/field-A.csv: mapped_text: delimiter \";\", decimal \",\"; date Date (dmy) and time Time;")
            && out.contains("speed = distance Distance_in (in) / interval Interval_s (s)"),
        "{out}"
    );
    let d = same_plots(&w, &text, &dist, "r-text", "r-dist");
    // The distance is written to 0.1 inch, so speeds agree to about 0.1 %.
    largest_within(&d, 0.005);
    let s = json(&w.path("r-dist/1-ingest/summary.json"));
    assert!(
        s["details"]["read_as"]["monitor/field-B.csv"]
            .as_str()
            .unwrap()
            .contains("speed = distance"),
        "{s}"
    );
}

#[test]
fn a_simulated_harvest_as_geopackage_points_reads_as_the_text_form() {
    // `simulate --form geopackage`: the text form's records as GeoPackage point layers
    // (written through SQLite); the same plots, yields and rejections.
    let w = Workdir::new("forms-gpkg-sim");
    let (text, gpkg) = text_and(&w, "gpkg", "geopackage");
    assert!(w.path("gpkg/monitor/field-A.gpkg").is_file());
    assert!(!w.path("gpkg/monitor/field-A.csv").exists());
    let out = checked(&w, gpkg.to_str().unwrap());
    assert!(
        out.contains("read: monitor/field-A.gpkg: geopackage_points: point geometry"),
        "{out}"
    );
    same_as_the_text_form(&w, &text, &gpkg, "r-gpkg");
    // The simulator writes the same bytes again.
    simulates_the_same_bytes(&w, "gpkg", "geopackage", &["monitor/field-B.gpkg"]);
}

#[test]
fn a_simulated_harvest_as_point_shapefiles_reads_as_the_text_form() {
    // `simulate --form shapefile`: the text form's records as point Shapefiles (dBase names
    // of at most 10 characters, a WGS 84 .prj); the same plots, yields and rejections.
    let w = Workdir::new("forms-shp-sim");
    let (text, shp) = text_and(&w, "shp", "shapefile");
    for ext in ["shp", "shx", "dbf", "prj"] {
        assert!(
            w.path(&format!("shp/monitor/field-A.{ext}")).is_file(),
            "{ext}"
        );
    }
    let out = checked(&w, shp.to_str().unwrap());
    assert!(
        out.contains("read: monitor/field-A.shp: shapefile_points: point geometry"),
        "{out}"
    );
    same_as_the_text_form(&w, &text, &shp, "r-shp");
    // The same bytes again (the dBase header's date is fixed).
    simulates_the_same_bytes(
        &w,
        "shp",
        "shapefile",
        &["monitor/field-B.shp", "monitor/field-B.dbf"],
    );
}

#[test]
fn a_simulated_harvest_as_iso_11783_task_data_reads_as_the_text_form() {
    // `simulate --form taskdata`: one task-data set (monitor/TASKDATA/, one task and binary
    // time log per field, values logged when they change, integer DDI units). Each time log
    // is an export of its own; the plots and yields are the text form's within 0.5 % (the
    // DDI units round flow to 1 mg/s, speed to 1 mm/s, position to 1e-7 degrees).
    let w = Workdir::new("forms-taskdata");
    let (text, td) = text_and(&w, "td", "taskdata");
    assert!(w.path("td/monitor/TASKDATA/TASKDATA.XML").is_file());
    assert!(w.path("td/monitor/TASKDATA/TLG00002.BIN").is_file());
    // Task data names its quantities by DDI: the trial file has no [columns] (before: check
    // refused it without one).
    assert!(!read(&td).contains("[columns]"));
    let out = checked(&w, td.to_str().unwrap());
    assert!(
        out.contains("read: monitor/TASKDATA/TASKDATA.XML#TLG00001: iso11783_taskdata: ISO 11783-10 task data, task \"harvest field-A\", TLG00001: mass flow 0057 of DET-1 (Combine), moisture 0063"),
        "{out}"
    );
    let d = same_plots(&w, &text, &td, "r-text", "r-td");
    let worst = *d.last().unwrap();
    eprintln!("task data vs text: largest plot-yield difference {worst:.5}");
    assert!(worst < 0.005, "largest difference {worst}");
    // Records in = points + rejections, per time log, and the manifest hashes the set's
    // files.
    let s = json(&w.path("r-td/1-ingest/summary.json"));
    assert_eq!(
        s["count_in"].as_u64().unwrap(),
        s["kept"].as_u64().unwrap() + s["rejected"].as_u64().unwrap()
    );
    let m = read(&w.path("r-td/manifest.json"));
    for f in ["TASKDATA.XML", "TLG00001.BIN", "TLG00002.XML"] {
        assert!(m.contains(&format!("monitor/TASKDATA/{f}")), "{f}");
    }
    // A text export beside the task data needs the [columns] the trial file lacks: refused,
    // naming the export and what is missing.
    std::fs::copy(
        w.path("text/monitor/field-A.csv"),
        w.path("td/monitor/field-A.csv"),
    )
    .unwrap();
    let o = plotsieve(&w.0, &["check", td.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(1));
    let out = printed(&o);
    assert!(
        out.contains("monitor/field-A.csv: a mapped_text export is read through [columns], and the trial file has none: ")
            && out.contains("[columns] needs flow"),
        "{out}"
    );
    // The simulator writes the same bytes again.
    simulates_the_same_bytes(
        &w,
        "td",
        "taskdata",
        &[
            "monitor/TASKDATA/TASKDATA.XML",
            "monitor/TASKDATA/TLG00001.BIN",
            "monitor/TASKDATA/TLG00002.BIN",
        ],
    );
}

#[test]
fn a_harvest_logged_every_3_s_keeps_its_plots_and_their_coverage() {
    // Logged every 3 s, a record reports the flow over its interval and the ground covered
    // in it. A footprint capped at 2 s of travel covered two thirds of that ground (mean
    // coverage 0.55 against 0.83 at 1 s), and plots needing 10 records were all set aside.
    let w = Workdir::new("forms-3s");
    let one = simulate(&w, "one", &["--seed", "2", "--quiet"]);
    let three = simulate(
        &w,
        "three",
        &["--seed", "2", "--interval-s", "3", "--quiet"],
    );
    run(&w, &one, "r1");
    run(&w, &three, "r3");
    let (a, b) = (plots(&w.path("r1")), plots(&w.path("r3")));
    let kept = b.values().filter(|v| v.0 == "kept").count();
    assert!(kept >= 45, "{kept} of {} plots kept", b.len());
    let (ca, cb) = (mean_coverage(&a), mean_coverage(&b));
    assert!(cb > 0.85 * ca, "coverage {cb} at 3 s, {ca} at 1 s");
    // A third of the records: plot means move by sampling, about half a percent.
    let d = yield_differences(&a, &b);
    differences_within(&d, 0.01, 0.04);
}

#[test]
fn an_export_without_a_swath_column_takes_the_stated_width_and_says_so() {
    let w = Workdir::new("forms-width");
    let t = simulate(&w, "t", &["--seed", "3", "--quiet"]);
    run(&w, &t, "with");
    // Drop the swath column from both exports and state the header width instead.
    for f in ["field-A.csv", "field-B.csv"] {
        drop_column(&w.path(&format!("t/monitor/{f}")), "swath_ft");
    }
    replace(
        &t,
        "width = { name = \"swath_ft\", unit = \"ft\" }",
        "width = { value = 30.0, unit = \"ft\" }",
        1,
    );
    assert!(checked(&w, t.to_str().unwrap())
        .contains("swath a fixed 30 ft (columns.width.value: the export has no swath column)"));
    run(&w, &t, "without");
    let (a, b) = (plots(&w.path("with")), plots(&w.path("without")));
    // Only the plots under the simulator's partial-swath pass differ much: without the
    // column their narrower swath is taken as full, so their yields come out low.
    let d = yield_differences(&a, &b);
    differences_within(&d, 0.005, f64::INFINITY);
    let far: Vec<(&String, f64, f64)> = a
        .iter()
        .filter(|(k, v)| v.0 == "kept" && b[*k].0 == "kept")
        .map(|(k, v)| (k, v.1, b[k].1))
        .filter(|(_, x, y)| ((y - x) / x).abs() > 0.015)
        .collect();
    assert!(far.len() <= 8, "{far:?}");
    assert!(far.iter().all(|(_, x, y)| y < x), "{far:?}");
    let md = read(&w.path("without/5-report/report.md"));
    assert!(
        md.contains("## How each export was read") && md.contains("swath a fixed 30 ft"),
        "{md}"
    );
    let html = read(&w.path("without/5-report/report.html"));
    assert!(html.contains("<h3>How each export was read</h3>"));
    let s = json(&w.path("without/1-ingest/summary.json"));
    assert!(s["details"]["read_as"]["monitor/field-A.csv"]
        .as_str()
        .unwrap()
        .contains("swath a fixed 30 ft"));
}

#[test]
fn mappings_that_cannot_work_are_refused_naming_the_key() {
    let w = Workdir::new("forms-bad");
    let t = simulate(&w, "t", &["--seed", "2", "--quiet"]);
    let original = read(&t);
    for (from, to, says) in [
        (
            "delimiter = \",\"",
            "delimiter = \",\"\ndecimal = \",\"",
            "columns.decimal and columns.delimiter are both \",\"",
        ),
        (
            "moisture = \"moisture_pct\"",
            "moisture = \"moisture_pct\"\ndistance = { name = \"d\", unit = \"in\" }",
            "[columns] has both speed and distance",
        ),
        (
            "format = \"iso8601\"",
            "format = \"time_of_day\"",
            "needs date (the date column) and date_order",
        ),
        (
            "width = { name = \"swath_ft\", unit = \"ft\" }",
            "width = { unit = \"ft\" }",
            "columns.width needs a column name or a fixed value",
        ),
    ] {
        std::fs::write(&t, original.replacen(from, to, 1)).unwrap();
        let o = plotsieve(&w.0, &["check", t.to_str().unwrap()]);
        assert_eq!(o.status.code(), Some(1), "{to}");
        let e = printed(&o);
        assert!(e.contains(says), "{to}: expected {says:?} in {e}");
    }
}

#[test]
fn exports_and_plots_in_projected_coordinates_read_as_lon_lat() {
    // The same harvest with every position as UTM 14N easting/northing: the exports'
    // coordinate columns through inputs.crs, the plot file through its own crs member.
    let w = Workdir::new("forms-utm");
    let t = simulate(&w, "t", &["--seed", "2", "--quiet"]);
    run(&w, &t, "lonlat");
    let utm = plotsieve_stages::projection::Utm::new(14, false).unwrap();
    for f in ["field-A.csv", "field-B.csv"] {
        let p = w.path(&format!("t/monitor/{f}"));
        let text = read(&p);
        let out: Vec<String> = text
            .lines()
            .enumerate()
            .map(|(i, l)| {
                let mut v: Vec<String> = l.split(',').map(String::from).collect();
                if i == 0 {
                    v[1] = "easting_m".into();
                    v[2] = "northing_m".into();
                } else {
                    let (x, y) = utm
                        .forward(v[1].parse().unwrap(), v[2].parse().unwrap())
                        .unwrap();
                    v[1] = format!("{x:.3}");
                    v[2] = format!("{y:.3}");
                }
                v.join(",")
            })
            .collect();
        std::fs::write(&p, out.join("\n") + "\n").unwrap();
    }
    let gp = w.path("t/plots.geojson");
    let mut g: serde_json::Value = serde_json::from_str(&read(&gp)).unwrap();
    for f in g["features"].as_array_mut().unwrap() {
        for ring in f["geometry"]["coordinates"].as_array_mut().unwrap() {
            for pt in ring.as_array_mut().unwrap() {
                let (x, y) = utm
                    .forward(pt[0].as_f64().unwrap(), pt[1].as_f64().unwrap())
                    .unwrap();
                *pt = serde_json::json!([
                    (x * 1000.0).round() / 1000.0,
                    (y * 1000.0).round() / 1000.0
                ]);
            }
        }
    }
    g["crs"] =
        serde_json::json!({"type": "name", "properties": {"name": "urn:ogc:def:crs:EPSG::32614"}});
    std::fs::write(&gp, serde_json::to_string(&g).unwrap()).unwrap();
    // Read as lon/lat they are refused; with the CRS named they read.
    replace(&t, "longitude = \"lon_deg\"", "x = \"easting_m\"", 1);
    replace(&t, "latitude = \"lat_deg\"", "y = \"northing_m\"", 1);
    let o = plotsieve(&w.0, &["check", t.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&o.stdout).contains("coordinate_range"));
    replace(
        &t,
        "design = \"design.csv\"",
        "design = \"design.csv\"\ncrs = \"EPSG:32614\"",
        1,
    );
    assert!(checked(&w, t.to_str().unwrap())
        .contains("x/y easting_m/northing_m in EPSG:32614 (inputs.crs)"));
    run(&w, &t, "utm");
    let (a, b) = (plots(&w.path("lonlat")), plots(&w.path("utm")));
    assert_eq!(
        a.values().map(|v| &v.0).collect::<Vec<_>>(),
        b.values().map(|v| &v.0).collect::<Vec<_>>()
    );
    let d = yield_differences(&a, &b);
    largest_within(&d, 0.001);
}

#[test]
fn the_second_sample_trial_in_another_form_checks_and_runs() {
    // sample-input/distance-3s: semicolons, decimal commas, date and time columns, distance
    // per record, logged every 3 s (made by `plotsieve simulate --seed 4 --form
    // distance_text --interval-s 3`).
    let w = Workdir::new("forms-sample2");
    let t = repo().join("sample-input/distance-3s/trial.toml");
    let t = t.to_str().unwrap();
    assert!(checked(&w, t).contains("speed = distance Distance_in (in)"));
    ok(&plotsieve(&w.0, &["run", t, "--out", "run", "--quiet"]));
    let truth = json(&repo().join("sample-input/distance-3s/truth.json"));
    let rows = csv_rows(&w.path("run/4-adjust/treatments.csv"));
    let d = rows
        .iter()
        .find(|r| r["field"] == "all" && r["treatment"] == "prod-d")
        .unwrap();
    let (up, sd): (f64, f64) = (
        d["uplift_t_ha"].parse().unwrap(),
        d["uplift_sd_t_ha"].parse().unwrap(),
    );
    let want = truth["effects_t_ha"]["prod-d"].as_f64().unwrap();
    assert!((up - want).abs() < 3.0 * sd, "{up} +- {sd}, truth {want}");
}

#[test]
fn a_yield_point_export_goes_in_and_skips_the_rules_it_cannot_feed() {
    // Yields already computed by farm software: one dry yield per point, the standard
    // moisture filled in, no flow, speed or swath. Faked into a flow column it lost every
    // point to moisture_stuck; read as yields, the rules that need a missing quantity are
    // skipped and listed, the delay is not applied twice, and the plots match the text
    // form's.
    let w = Workdir::new("forms-yield");
    let (text, pts) = text_and(&w, "points", "yield_points");
    assert!(checked(&w, pts.to_str().unwrap()).contains(
        "yield dry_yield_t_ha (t_ha, dry basis, at standard moisture); speed not logged: from positions and times"
    ));
    run(&w, &text, "r-text");
    run(&w, &pts, "r-points");
    let s = json(&w.path("r-points/2-clean/summary.json"));
    assert!(
        s["by_rule"].get("moisture_stuck").is_none(),
        "{}",
        s["by_rule"]
    );
    let ex = &s["details"]["exports"]["monitor/field-A.csv"];
    for (rule, why) in [
        ("moisture_stuck", "not a sensor reading"),
        ("swath_fraction", "no swath width"),
        ("flow_delay_no_data", "no mass flow"),
    ] {
        assert!(
            ex["skipped_rules"][rule]
                .as_str()
                .unwrap_or("")
                .contains(why),
            "{rule}: {}",
            ex["skipped_rules"]
        );
    }
    assert!(ex["flow_delay_source"]
        .as_str()
        .unwrap()
        .starts_with("not applied"));
    let (a, b) = (plots(&w.path("r-text")), plots(&w.path("r-points")));
    assert_eq!(b.values().filter(|v| v.0 == "kept").count(), b.len());
    let d = yield_differences(&a, &b);
    differences_within(&d, 0.01, 0.04);
    // As close to the simulated truth as the text form.
    let truth = truth_by_plot(&json(&w.path("text/truth.json")), "true_yield_t_ha");
    let err = |p: &BTreeMap<String, (String, f64, f64)>| {
        let e: Vec<f64> = p.iter().map(|(k, v)| (v.1 - truth[k]).abs()).collect();
        e.iter().sum::<f64>() / e.len() as f64
    };
    let (ea, eb) = (err(&a), err(&b));
    assert!(
        eb < 1.2 * ea,
        "mean error {eb} t/ha from yields, {ea} from flow"
    );
    // Without a swath the harvested area is unknown: coverage is empty, no plot set aside
    // for it.
    assert!(b.values().all(|v| v.2.is_nan()));
}

#[test]
fn plot_polygons_from_a_shapefile_read_as_the_geojson() {
    // tests/fixtures/shp: the demo trial's plots written by pyshp 3.1.6, in lon/lat and in
    // UTM 14N (the .prj from pyproj). Read through the `shapefile` crate, both give the
    // GeoJSON run's plots.
    let w = Workdir::new("forms-shp");
    let d = w.path("t");
    copy_dir(&repo().join("sample-input"), &d);
    std::fs::remove_dir_all(d.join("distance-3s")).unwrap();
    copy_dir(&repo().join("tests/fixtures/shp"), &d.join("shp"));
    copy_dir(&repo().join("tests/fixtures/layers"), &d.join("layers"));
    let t = d.join("trial.toml");
    run(&w, &t, "geojson");
    let base = plots(&w.path("geojson"));
    // tests/fixtures/layers/plots_utm14n.gpkg: the same polygons in UTM 14N written by GDAL
    // through pyogrio (tests/fixtures/make_layer_fixtures.py).
    for (file, says) in [
        ("layers/plots_utm14n.gpkg", "plots.geojson"),
        ("shp/plots_wgs84.shp", "layers/plots_utm14n.gpkg"),
        ("shp/plots_utm14n.shp", "shp/plots_wgs84.shp"),
    ] {
        replace(&t, says, file, 1);
        ok(&plotsieve(&w.0, &["check", t.to_str().unwrap()]));
        let out = format!("from-{}", file.replace(['/', '.'], "-"));
        run(&w, &t, &out);
        let p = plots(&w.path(&out));
        assert_eq!(
            base.values()
                .map(|v| (&v.0, v.1.is_finite()))
                .collect::<Vec<_>>(),
            p.values()
                .map(|v| (&v.0, v.1.is_finite()))
                .collect::<Vec<_>>(),
            "{file}"
        );
        let diff = yield_differences(&base, &p);
        assert!(*diff.last().unwrap() < 1e-6, "{file}: {:?}", diff.last());
    }
    // A .prj this program cannot place asks for inputs.crs, naming the file.
    std::fs::write(
        d.join("shp/plots_utm14n.prj"),
        "PROJCS[\"RGF93_Lambert_93\",GEOGCS[\"GCS_RGF_1993\"]]",
    )
    .unwrap();
    let o = plotsieve(&w.0, &["check", t.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(1));
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(
        out.contains("shp/plots_utm14n.shp: its .prj is not on WGS 84"),
        "{out}"
    );
}

#[test]
fn monitor_points_from_shapefiles_and_geopackages_read_as_the_text_exports() {
    // tests/fixtures/shp/monitor: the demo trial's two exports as point Shapefiles written by
    // pyshp in lon/lat (attributes under 10-character dBase names); tests/fixtures/layers/
    // monitor: the same as GeoPackage point layers in UTM 14N written by GDAL through
    // pyogrio. Mapped by [columns] like a table, they give the text run's plots and the same
    // rejections.
    let w = Workdir::new("forms-point-layers");
    let d = w.path("t");
    copy_dir(&repo().join("sample-input"), &d);
    std::fs::remove_dir_all(d.join("distance-3s")).unwrap();
    copy_dir(
        &repo().join("tests/fixtures/shp/monitor"),
        &d.join("shp_monitor"),
    );
    copy_dir(
        &repo().join("tests/fixtures/layers/monitor"),
        &d.join("gpkg_monitor"),
    );
    let t = d.join("trial.toml");
    run(&w, &t, "text");
    for (a, b) in [
        ("monitor = [\"monitor\"]", "monitor = [\"shp_monitor\"]"),
        ("\"mass_flow_lb_s\"", "\"flow_lb_s\""),
        ("\"moisture_pct\"", "\"moist_pct\""),
        ("\"header_state\"", "\"header\""),
    ] {
        replace(&t, a, b, 1);
    }
    for (dir, says, tolerance) in [
        (
            "shp_monitor",
            "shp_monitor/field-A.shp: shapefile_points: point geometry",
            1e-9,
        ),
        // Through UTM and back: positions move by nanometres, yields by no more than this.
        (
            "gpkg_monitor",
            "gpkg_monitor/field-A.gpkg: geopackage_points: point geometry",
            1e-7,
        ),
    ] {
        if dir == "gpkg_monitor" {
            replace(&t, "shp_monitor", "gpkg_monitor", 1);
        }
        let out = checked(&w, t.to_str().unwrap());
        assert!(out.contains(&format!("read: {says}")), "{out}");
        run(&w, &t, dir);
        let (a, b) = (plots(&w.path("text")), plots(&w.path(dir)));
        assert_eq!(
            a.values().map(|v| &v.0).collect::<Vec<_>>(),
            b.values().map(|v| &v.0).collect::<Vec<_>>()
        );
        let diff = yield_differences(&a, &b);
        assert!(
            *diff.last().unwrap() < tolerance,
            "{dir}: {:?}",
            diff.last()
        );
        let (ra, rb) = (
            csv_rows(&w.path("text/2-clean/rejected.csv")),
            csv_rows(&w.path(&format!("{dir}/2-clean/rejected.csv"))),
        );
        assert_eq!(ra.len(), rb.len(), "{dir}");
        assert!(ra
            .iter()
            .zip(&rb)
            .all(|(x, y)| x["rule"] == y["rule"] && x["source_row"] == y["source_row"]));
    }
}
