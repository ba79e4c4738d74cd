//! Plot geometry: shapely fixtures, border trimming against the truth, grid layouts and stray exports.

use crate::common::*;

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
    let fps: Vec<&[(f64, f64)]> = fps.iter().map(|f| f.as_slice()).collect();
    let ours = coverage(ext, &fps, 0.25);
    let theirs = c["fraction"].as_f64().unwrap();
    assert!(
        (ours - theirs).abs() < 0.01,
        "coverage on a 0.25 m raster {ours} vs shapely union {theirs}"
    );
}

#[test]
fn border_trimming_brings_plot_means_closer_to_the_truth() {
    let (mut with, mut without) = (0.0, 0.0);
    // The simulator's grain mixing has an SD of 2.5 s, about 5.5 m of travel; an end trim of
    // 8 m (1.5 SD) fits it. The 15 m default is for real combines' ~30 m mixing length.
    for seed in [61u64, 62, 63, 64] {
        let w = Workdir::new("trim");
        let trial = simulate(&w, "trial", &["--seed", &seed.to_string()]);
        run_trial(&w, &trial, "trimmed", &["plots.end_trim_m=8"]);
        run_trial(
            &w,
            &trial,
            "untrimmed",
            &[
                "plots.end_trim_m=0",
                "plots.side_trim_m=0",
                "plots.min_swath_inside=0",
            ],
        );
        let truth = json(&w.path("trial/truth.json"));
        let (a, na) = plot_rmse(&w.path("trimmed/3-plots/plots.csv"), &truth);
        let (b, nb) = plot_rmse(&w.path("untrimmed/3-plots/plots.csv"), &truth);
        eprintln!("seed {seed}: plot RMSE trimmed {a:.3} t/ha ({na} plots), untrimmed {b:.3} t/ha ({nb} plots)");
        with += a;
        without += b;
        // Every clean point is in exactly one plot or in rejected.csv.
        let pp = parquet(&w.path("trimmed/3-plots/points.parquet"));
        let ids = u64_set(&pp, "point_id");
        assert_eq!(ids.len(), pp.height(), "no point in two plots");
        let rejected: std::collections::BTreeSet<u64> =
            csv_rows(&w.path("trimmed/3-plots/rejected.csv"))
                .iter()
                .filter_map(|r| r["id"].parse().ok())
                .collect();
        assert!(ids.is_disjoint(&rejected));
        let clean = parquet(&w.path("trimmed/2-clean/points.parquet"));
        let all = u64_set(&clean, "point_id");
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
    run_stages(&w, &g, "grid", &["ingest"]);
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
fn broken_plot_polygons_are_refused_by_check_and_run_naming_the_plot() {
    let w = Workdir::new("badplots");
    let trial = simulate(&w, "t", &["--seed", "10"]);
    let t = trial.to_str().unwrap();
    let path = w.path("t/plots.geojson");
    let mut g = json(&path);
    let feats = g["features"].as_array_mut().unwrap();
    let id = |f: &serde_json::Value| f["properties"]["plot_id"].as_str().unwrap().to_string();
    let (bow, typo) = (id(&feats[3]), id(&feats[7]));
    // A bow tie (two vertices swapped) and a mistyped longitude (-1 degree).
    let ring = feats[3]["geometry"]["coordinates"][0]
        .as_array_mut()
        .unwrap();
    ring.swap(1, 2);
    feats[7]["geometry"]["coordinates"][0][2][0] = serde_json::json!(-1.0);
    std::fs::write(&path, serde_json::to_string(&g).unwrap()).unwrap();
    let o = plotsieve(&w.0, &["check", t]);
    assert_eq!(o.status.code(), Some(1));
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(
        out.contains(&format!(
            "plots.geojson: plot {bow}: its boundary crosses itself"
        )),
        "{out}"
    );
    assert!(
        out.contains(&format!("plots.geojson: plot {typo}:")) && out.contains("likely mistyped"),
        "{out}"
    );
    let o = plotsieve(&w.0, &["run", t, "--out", "run", "--quiet"]);
    assert_eq!(o.status.code(), Some(1));
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("plot geometry is not usable") && e.contains(&bow) && e.contains(&typo),
        "{e}"
    );
    assert!(
        !w.path("run/1-ingest").exists(),
        "nothing that looks like a result"
    );
    assert_eq!(
        json(&w.path("run/manifest.json"))["stages"]["ingest"]["status"],
        "failed"
    );
}

#[test]
fn end_trims_longer_than_a_plot_keep_its_middle_and_side_trims_that_leave_nothing_are_named() {
    // Before: a plot shorter than twice plots.end_trim_m lost every point, in silence
    // (research plots of 6-12 m are common). Now each end trim is at most
    // plots.end_trim_max_fraction (0.3) of the plot's length: on the demo's 59.7 m plots a
    // 40 m trim is cut back to 17.9 m, so every plot keeps its middle 40 % (the net area is
    // 0.4 x the plot's length by its width less the two 0.5 m side trims).
    let w = Workdir::new("short-plots");
    let t = repo().join("sample-input/trial.toml");
    let t = t.to_str().unwrap();
    run_trial(&w, Path::new(t), "b", &["plots.end_trim_m=40"]);
    let b = csv_rows(&w.path("b/3-plots/plots.csv"));
    assert_eq!(b.len(), 48);
    // Every plot keeps points (a few fall under plots.min_points with 40 % of their
    // length: set aside by that rule, as they should be).
    let kept = b.iter().filter(|p| p["status"] == "kept").count();
    assert!(kept >= 40, "{kept}");
    for p in &b {
        assert!(p["points"].parse::<u64>().unwrap() > 0, "{p:?}");
        let (area, net): (f64, f64) = (
            p["area_m2"].parse().unwrap(),
            p["net_area_m2"].parse().unwrap(),
        );
        // 18.3 m wide: (18.3 - 1) / 18.3 of the width.
        let want = 0.4 * (18.3 - 1.0) / 18.3;
        assert!((net / area - want).abs() < 0.005, "{p:?}: {}", net / area);
    }
    // Side trims of half the plots' width (about 18 m) or more leave nothing: said, with
    // the fix.
    let o = plotsieve(&w.0, &["check", t, "--set", "plots.side_trim_m=12"]);
    assert_eq!(o.status.code(), Some(1));
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(
        out.contains("48 plot(s) are too small for their trims")
            && out.contains("set it below half the plot's width"),
        "{out}"
    );
}
