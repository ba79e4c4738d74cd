//! Plot layers: projected polygons (`1-ingest/plots.geojson`), WGS84 layers with the plot
//! statistics as properties (`plots_wgs84.geojson`, `3-plots/plots.geojson`), and the
//! analyst's own plot table for plot-table entry.

use super::table::Table;
use super::write_json;
use anyhow::Result;
use plotsieve_stages::crop::YieldUnit;
use plotsieve_stages::plots::PlotStats;
use plotsieve_stages::table::PlotPolygon;
use serde::ser::{Error as _, SerializeMap, SerializeSeq};
use std::cell::RefCell;
use std::path::Path;

/// A GeoJSON FeatureCollection whose features are made one at a time while it is written
/// (a whole layer as one JSON tree took several times the file's size in memory). Keys come
/// in the sorted order a JSON tree of the same content writes them in, so the bytes are
/// the same.
struct Collection<I> {
    crs: Option<serde_json::Value>,
    features: RefCell<Option<I>>,
}

struct Features<'a, I>(&'a RefCell<Option<I>>);

impl<I: Iterator<Item = Result<serde_json::Value>>> serde::Serialize for Features<'_, I> {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let mut seq = s.serialize_seq(None)?;
        for f in self.0.borrow_mut().take().into_iter().flatten() {
            seq.serialize_element(&f.map_err(|e| S::Error::custom(format!("{e:#}")))?)?;
        }
        seq.end()
    }
}

impl<I: Iterator<Item = Result<serde_json::Value>>> serde::Serialize for Collection<I> {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let mut m = s.serialize_map(None)?;
        if let Some(crs) = &self.crs {
            m.serialize_entry("crs", crs)?;
        }
        m.serialize_entry("features", &Features(&self.features))?;
        m.serialize_entry("type", "FeatureCollection")?;
        m.end()
    }
}

fn write_collection(
    path: &Path,
    crs: Option<serde_json::Value>,
    features: impl Iterator<Item = Result<serde_json::Value>>,
) -> Result<()> {
    write_json(
        path,
        &Collection {
            crs,
            features: RefCell::new(Some(features)),
        },
    )
}

/// Projected plot polygons as GeoJSON with the EPSG code as a named CRS (the 2008 GeoJSON
/// form; RFC 7946 readers that want lon/lat should use the input file instead).
pub fn write_projected_plots(path: &Path, polys: &[PlotPolygon], epsg: u32) -> Result<()> {
    let r = |ring: &[(f64, f64)]| -> Vec<serde_json::Value> {
        ring.iter()
            .map(|(x, y)| serde_json::json!([(x * 1e4).round() / 1e4, (y * 1e4).round() / 1e4]))
            .collect()
    };
    let features = polys.iter().map(|p| {
        let mut rings = vec![r(&p.exterior)];
        rings.extend(p.holes.iter().map(|h| r(h)));
        Ok(
            serde_json::json!({"type": "Feature", "properties": {"plot_id": p.plot_id},
                "geometry": {"type": "Polygon", "coordinates": rings}}),
        )
    });
    let crs = serde_json::json!({"type": "name", "properties": {"name": format!("urn:ogc:def:crs:EPSG::{epsg}")}});
    write_collection(path, Some(crs), features)
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
    let features = items.map(|(id, ring, mut props)| {
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
        Ok(serde_json::json!({"type": "Feature", "properties": props,
            "geometry": {"type": "Polygon", "coordinates": [coords]}}))
    });
    write_collection(path, None, features)
}
