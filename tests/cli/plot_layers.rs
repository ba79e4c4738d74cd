//! A plot table given as a polygon layer: the same invented variety trial written by GDAL
//! (through pyogrio, `tests/fixtures/make_layer_fixtures.py`) as a CSV with shapely's
//! centroids, a GeoPackage and a Shapefile in UTM 14N, and a GeoJSON in lon/lat. Each layer,
//! with no other input, passes `check` and runs, and gives the CSV's plots and results.

use crate::common::*;
use std::collections::BTreeMap;

/// Plot id -> (treatment, block, yield t/ha, x, y) from `1-ingest/plot_table.csv`.
fn table(run: &std::path::Path) -> BTreeMap<String, (String, String, f64, f64, f64)> {
    csv_rows(&run.join("1-ingest/plot_table.csv"))
        .into_iter()
        .map(|r| {
            let f = |k: &str| r[k].parse::<f64>().unwrap();
            (
                r["plot_id"].clone(),
                (
                    r["treatment"].clone(),
                    r["block"].clone(),
                    f("yield_mean_t_ha"),
                    f("centroid_x_m"),
                    f("centroid_y_m"),
                ),
            )
        })
        .collect()
}

fn trial(w: &Workdir, table: &str, extra: &str) -> std::path::PathBuf {
    let t = w.path(&format!("t/{}.toml", table.replace(['/', '.'], "-")));
    std::fs::write(
        &t,
        format!("[trial]\nname = \"Layer trial\"\ncrop = \"wheat\"\noutput_unit = \"t_ha\"\ncheck = \"V1\"\n\n[inputs]\nplot_table = \"{table}\"\n{extra}"),
    )
    .unwrap();
    t
}

#[test]
fn a_plot_table_as_a_polygon_layer_reads_as_the_csv() {
    let w = Workdir::new("plot-layers");
    copy_dir(&repo().join("tests/fixtures/layers"), &w.path("t"));
    let csv = trial(&w, "plot_table.csv", "");
    let o = plotsieve(
        &w.0,
        &["run", csv.to_str().unwrap(), "--out", "csv", "--quiet"],
    );
    ok(&o);
    let base = table(&w.path("csv"));
    assert_eq!(base.len(), 24);
    let base_trt = csv_rows(&w.path("csv/4-adjust/treatments.csv"));
    for (file, says) in [
        ("plot_table.gpkg", "GeoPackage layer plot_table"),
        ("shp/plot_table.shp", "Shapefile"),
        ("plot_table.geojson", "GeoJSON"),
    ] {
        let t = trial(&w, file, "");
        let out = checked(&w, t.to_str().unwrap());
        assert!(
            out.contains(&format!("read: {file}: plot table ({says}): plot id plot_id, treatment variety, block block, field (none: all plots in field 1), yield yield_t_ha, position polygon centroids in UTM (EPSG:32614)")),
            "{out}"
        );
        let dir = file.replace(['/', '.'], "-");
        ok(&plotsieve(
            &w.0,
            &["run", t.to_str().unwrap(), "--out", &dir, "--quiet"],
        ));
        let got = table(&w.path(&dir));
        assert_eq!(got.len(), base.len(), "{file}");
        for (id, b) in &base {
            let g = &got[id];
            assert_eq!((&g.0, &g.1, g.2), (&b.0, &b.1, b.2), "{file}: plot {id}");
            // shapely's centroids, written to 0.1 mm; the GeoJSON's went through lon/lat.
            assert!(
                (g.3 - b.3).abs() < 1e-3 && (g.4 - b.4).abs() < 1e-3,
                "{file}: plot {id} at ({}, {}), shapely ({}, {})",
                g.3,
                g.4,
                b.3,
                b.4
            );
        }
        // The same plots give the same uplifts (to the sub-millimetre positions' effect).
        let trt = csv_rows(&w.path(&format!("{dir}/4-adjust/treatments.csv")));
        assert_eq!(trt.len(), base_trt.len());
        for (a, b) in base_trt.iter().zip(&trt) {
            assert_eq!(
                (&a["field"], &a["treatment"]),
                (&b["field"], &b["treatment"])
            );
            let (x, y): (f64, f64) = (
                a["uplift_t_ha"].parse().unwrap_or(0.0),
                b["uplift_t_ha"].parse().unwrap_or(0.0),
            );
            assert!(
                (x - y).abs() < 1e-4,
                "{file} {}: {x} vs {y}",
                a["treatment"]
            );
        }
        let m = json(&w.path(&format!("{dir}/manifest.json")));
        let n = m["inputs"].as_array().unwrap().len();
        // The trial file and the layer; a Shapefile with its .shx, .dbf and .prj.
        assert_eq!(n, if file.ends_with(".shp") { 5 } else { 2 }, "{file}");
    }
    // The same Shapefile with a .prj of NAD83 / UTM zone 14N (ESRI WKT from pyproj 3.7.2):
    // read from its WKT (transverse Mercator on GRS 1980, NAD83 taken as WGS 84), the same
    // centroids within a millimetre.
    copy_dir(&w.path("t/shp"), &w.path("t/nad83"));
    std::fs::write(
        w.path("t/nad83/plot_table.prj"),
        r#"PROJCS["NAD_1983_UTM_Zone_14N",GEOGCS["GCS_North_American_1983",DATUM["D_North_American_1983",SPHEROID["GRS_1980",6378137.0,298.257222101]],PRIMEM["Greenwich",0.0],UNIT["Degree",0.0174532925199433]],PROJECTION["Transverse_Mercator"],PARAMETER["False_Easting",500000.0],PARAMETER["False_Northing",0.0],PARAMETER["Central_Meridian",-99.0],PARAMETER["Scale_Factor",0.9996],PARAMETER["Latitude_Of_Origin",0.0],UNIT["Meter",1.0]]"#,
    )
    .unwrap();
    let t = trial(&w, "nad83/plot_table.shp", "");
    assert!(checked(&w, t.to_str().unwrap())
        .contains("from +proj=tmerc +lat_0=0 +lon_0=-99 +k_0=0.9996"));
    run_trial(&w, &t, "nad83", &[]);
    let got = table(&w.path("nad83"));
    for (id, b) in &base {
        let g = &got[id];
        assert!(
            (g.3 - b.3).abs() < 1e-3 && (g.4 - b.4).abs() < 1e-3,
            "plot {id} at ({}, {}), shapely ({}, {})",
            g.3,
            g.4,
            b.3,
            b.4
        );
    }
}

#[test]
fn a_layer_feature_that_is_not_a_plot_polygon_is_a_located_rejection() {
    let w = Workdir::new("plot-layer-rejects");
    std::fs::create_dir_all(w.path("t")).unwrap();
    let square = |x: f64| {
        let e = x + 0.0001;
        format!("{{\"type\":\"Polygon\",\"coordinates\":[[[{x},40.0],[{e},40.0],[{e},40.0001],[{x},40.0001],[{x},40.0]]]}}")
    };
    let mut feats = Vec::new();
    for b in 1..=4 {
        for (v, k) in [("C", 0), ("N", 1)] {
            let x = -97.0 - (b * 2 + k) as f64 * 0.0002;
            feats.push(format!(
                "{{\"type\":\"Feature\",\"properties\":{{\"id\":\"{b}{v}\",\"entry\":\"{v}\",\"rep\":{b},\"yld\":{}}},\"geometry\":{}}}",
                100 + 3 * b + 5 * k,
                square(x)
            ));
        }
    }
    // A point where a plot should be, and a feature without geometry.
    feats.push("{\"type\":\"Feature\",\"properties\":{\"id\":\"5C\",\"entry\":\"C\",\"rep\":5,\"yld\":101},\"geometry\":{\"type\":\"Point\",\"coordinates\":[-97.5,40.0]}}".into());
    feats.push("{\"type\":\"Feature\",\"properties\":{\"id\":\"5N\",\"entry\":\"N\",\"rep\":5,\"yld\":101},\"geometry\":null}".into());
    std::fs::write(
        w.path("t/plots.geojson"),
        format!(
            "{{\"type\":\"FeatureCollection\",\"features\":[{}]}}",
            feats.join(",")
        ),
    )
    .unwrap();
    let t = w.path("t/trial.toml");
    std::fs::write(
        &t,
        "[trial]\nname = \"Rejects\"\ncrop = \"wheat\"\noutput_unit = \"bu_ac\"\ncheck = \"C\"\n\n[inputs]\nplot_table = \"plots.geojson\"\nplot_id_property = \"id\"\nyield_property = \"yld\"\nyield_unit = \"bu_ac\"\n",
    )
    .unwrap();
    let o = plotsieve(&w.0, &["check", t.to_str().unwrap()]);
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(out.contains("yield yld (bu_ac)"), "{out}");
    assert!(
        out.contains("warning: plots.geojson, feature 8, column geometry: bad_geometry (\"geometry type Point, expected Polygon\"; expected one polygon)")
            && out.contains("feature 9, column geometry: bad_geometry (\"no geometry\""),
        "{out}"
    );
    let o = plotsieve(
        &w.0,
        &["run", t.to_str().unwrap(), "--out", "run", "--quiet"],
    );
    ok(&o);
    let rej = csv_rows(&w.path("run/1-ingest/rejected.csv"));
    assert_eq!(
        rej.iter()
            .map(|r| (r["id"].as_str(), r["rule"].as_str()))
            .collect::<Vec<_>>(),
        vec![("feature 8", "bad_geometry"), ("feature 9", "bad_geometry")]
    );
    let s = json(&w.path("run/1-ingest/summary.json"));
    assert_eq!(
        (s["count_in"].as_u64(), s["kept"].as_u64()),
        (Some(10), Some(8)),
        "{s}"
    );
    // 100 bu/ac of wheat (60 lb/bu) = 6,725.1 kg/ha; the table is written in the output unit.
    let p = csv_rows(&w.path("run/1-ingest/plot_table.csv"));
    let y1c: f64 = p.iter().find(|r| r["plot_id"] == "1C").unwrap()["yield_mean_bu_ac"]
        .parse()
        .unwrap();
    assert!((y1c - 103.0).abs() < 1e-9, "{y1c}");
    // A yield unit that is not one: a clear error naming the key.
    replace(&t, "yield_unit = \"bu_ac\"", "yield_unit = \"bushels\"", 1);
    let o = plotsieve(&w.0, &["check", t.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(1));
    assert!(
        String::from_utf8_lossy(&o.stdout).contains("inputs.yield_unit \"bushels\" is not t_ha")
    );
}
