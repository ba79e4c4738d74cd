//! Plot layers: projected polygons (`1-ingest/plots.geojson`), WGS84 layers with the plot
//! statistics as properties (`plots_wgs84.geojson`, `3-plots/plots.geojson`), and the
//! analyst's own plot table for plot-table entry.

use super::table::Table;
use super::write_json;
use anyhow::Result;
use plotsieve_stages::crop::YieldUnit;
use plotsieve_stages::plots::PlotStats;
use plotsieve_stages::table::PlotPolygon;
use std::path::Path;

/// Projected plot polygons as GeoJSON with the EPSG code as a named CRS (the 2008 GeoJSON
/// form; RFC 7946 readers that want lon/lat should use the input file instead).
pub fn write_projected_plots(path: &Path, polys: &[PlotPolygon], epsg: u32) -> Result<()> {
    let r = |ring: &[(f64, f64)]| -> Vec<serde_json::Value> {
        ring.iter()
            .map(|(x, y)| serde_json::json!([(x * 1e4).round() / 1e4, (y * 1e4).round() / 1e4]))
            .collect()
    };
    let features: Vec<serde_json::Value> = polys
        .iter()
        .map(|p| {
            let mut rings = vec![r(&p.exterior)];
            rings.extend(p.holes.iter().map(|h| r(h)));
            serde_json::json!({"type": "Feature", "properties": {"plot_id": p.plot_id},
                "geometry": {"type": "Polygon", "coordinates": rings}})
        })
        .collect();
    let v = serde_json::json!({
        "type": "FeatureCollection",
        "crs": {"type": "name", "properties": {"name": format!("urn:ogc:def:crs:EPSG::{epsg}")}},
        "features": features,
    });
    write_json(path, &v)
}

/// The plot's statistics as GeoJSON properties (same names as `plots.csv`).
pub fn plot_properties(p: &PlotStats, u: &YieldUnit) -> serde_json::Map<String, serde_json::Value> {
    PlotStats::columns(u.suffix())
        .into_iter()
        .map(|c| {
            let v = c.write(p, u);
            (c.name, v)
        })
        .map(|(k, v)| {
            let val = match v.parse::<f64>() {
                Ok(x) if !["plot_id", "field", "treatment", "block"].contains(&k.as_str()) => {
                    serde_json::json!(x)
                }
                _ => serde_json::json!(v),
            };
            (k, val)
        })
        .collect()
}

/// Polygons back in WGS84 lon/lat (RFC 7946: counterclockwise exterior, 8 decimals).
pub fn write_plots_wgs84<'a>(
    path: &Path,
    utm: &plotsieve_stages::projection::Utm,
    items: impl Iterator<
        Item = (
            &'a str,
            &'a [(f64, f64)],
            serde_json::Map<String, serde_json::Value>,
        ),
    >,
) -> Result<()> {
    let mut features = Vec::new();
    for (id, ring, mut props) in items {
        let mut ll: Vec<(f64, f64)> = ring
            .iter()
            .map(|&(x, y)| utm.inverse(x, y))
            .collect::<Result<_, _>>()?;
        if ll.first() != ll.last() {
            ll.push(ll[0]);
        }
        let area2: f64 = ll
            .windows(2)
            .map(|w| w[0].0 * w[1].1 - w[1].0 * w[0].1)
            .sum();
        if area2 < 0.0 {
            ll.reverse();
        }
        props.insert("plot_id".into(), serde_json::json!(id));
        let coords: Vec<serde_json::Value> = ll
            .iter()
            .map(|(x, y)| serde_json::json!([(x * 1e8).round() / 1e8, (y * 1e8).round() / 1e8]))
            .collect();
        features.push(serde_json::json!({"type": "Feature", "properties": props,
            "geometry": {"type": "Polygon", "coordinates": [coords]}}));
    }
    write_json(
        path,
        &serde_json::json!({"type": "FeatureCollection", "features": features}),
    )
}
