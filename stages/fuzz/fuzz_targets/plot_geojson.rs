//! Plot polygons from GeoJSON, then the plot checks: a value or an error, never a panic or
//! an allocation sized by a coordinate.
#![no_main]

use libfuzzer_sys::fuzz_target;
use plotsieve_stages::ingest::{plot_checks, read_geojson};

fuzz_target!(|data: &[u8]| {
    let p = std::env::temp_dir().join(format!("plotsieve-fuzz-{}.geojson", std::process::id()));
    std::fs::write(&p, data).expect("a temporary file");
    if let Ok(polys) = read_geojson(&p, "p.geojson", "plot_id") {
        let _ = plot_checks::problems(&polys, "p.geojson");
    }
});
