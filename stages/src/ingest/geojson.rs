//! Plot polygons from GeoJSON: RFC 7946 (WGS84 lon/lat), or in a projected CRS named by the
//! file's `crs` member (the 2008 GeoJSON form, e.g. `urn:ogc:def:crs:EPSG::32614`) or by
//! the trial's `inputs.crs` ([`read_plot_input`]).

use super::IngestError;
use crate::table::PlotPolygon;
use std::path::Path;

fn ring_from_json(v: &serde_json::Value) -> Option<Vec<(f64, f64)>> {
    v.as_array()?
        .iter()
        .map(|p| {
            let a = p.as_array()?;
            Some((a.first()?.as_f64()?, a.get(1)?.as_f64()?))
        })
        .collect()
}

/// Read plot polygons from GeoJSON (Polygon or single-part MultiPolygon features), with
/// coordinates as the file has them.
pub fn read_geojson(
    path: &Path,
    name: &str,
    id_prop: &str,
) -> Result<Vec<PlotPolygon>, IngestError> {
    read_with_crs(path, name, id_prop).map(|(p, _)| p)
}

/// The analyst's plot file (GeoJSON, or a Shapefile by its `.shp` extension) in WGS84
/// lon/lat: coordinates in the CRS its `crs` member names, else in `crs` (the trial's
/// `inputs.crs`; empty: WGS84 lon/lat), brought to lon/lat. A Shapefile's CRS is `crs`, or
/// else its `.prj`'s.
pub fn read_plot_input(
    path: &Path,
    name: &str,
    id_prop: &str,
    crs: &str,
) -> Result<Vec<PlotPolygon>, IngestError> {
    let shp = path
        .extension()
        .is_some_and(|e| e.eq_ignore_ascii_case("shp"));
    let (mut polys, named) = if shp {
        // The trial's crs wins over the .prj's.
        let (p, prj) = super::shapefile_plots::read(path, name, id_prop)?;
        (p, if crs.is_empty() { prj } else { crs.to_string() })
    } else {
        let (p, own) = read_with_crs(path, name, id_prop)?;
        (p, own.unwrap_or_else(|| crs.to_string()))
    };
    if named.is_empty() {
        return Ok(polys);
    }
    let unusable = |message: String| IngestError::Unusable {
        file: name.to_string(),
        message,
    };
    let c = crate::projection::Crs::parse(&named).map_err(|e| unusable(format!("crs: {e}")))?;
    if c.code() == 4326 {
        return Ok(polys);
    }
    for p in &mut polys {
        let id = p.plot_id.clone();
        for ring in std::iter::once(&mut p.exterior).chain(p.holes.iter_mut()) {
            for v in ring.iter_mut() {
                *v = c.to_wgs84(v.0, v.1).map_err(|e| {
                    unusable(format!("plot {id}: {e} (coordinates in EPSG:{})", c.code()))
                })?;
            }
        }
    }
    Ok(polys)
}

/// Polygons and the CRS the file's `crs` member names (None without one, or for CRS84).
fn read_with_crs(
    path: &Path,
    name: &str,
    id_prop: &str,
) -> Result<(Vec<PlotPolygon>, Option<String>), IngestError> {
    let text = std::fs::read_to_string(path).map_err(|e| IngestError::Read {
        file: name.to_string(),
        message: e.to_string(),
    })?;
    let unusable = |message: String| IngestError::Unusable {
        file: name.to_string(),
        message,
    };
    let v: serde_json::Value =
        serde_json::from_str(&text).map_err(|e| unusable(format!("not valid JSON: {e}")))?;
    let feats = v
        .get("features")
        .and_then(|f| f.as_array())
        .ok_or_else(|| unusable("expected a GeoJSON FeatureCollection with \"features\"".into()))?;
    let mut out = Vec::new();
    for (i, f) in feats.iter().enumerate() {
        let id = match f.get("properties").and_then(|p| p.get(id_prop)) {
            Some(serde_json::Value::String(s)) => s.clone(),
            Some(serde_json::Value::Number(n)) => n.to_string(),
            _ => {
                return Err(unusable(format!(
                    "feature {i}: no property {id_prop:?} (inputs.plot_id_property)"
                )))
            }
        };
        let g = f
            .get("geometry")
            .ok_or_else(|| unusable(format!("feature {i} (plot {id}): no geometry")))?;
        let coords = g.get("coordinates");
        let rings = match g.get("type").and_then(|t| t.as_str()) {
            Some("Polygon") => coords.and_then(|c| c.as_array()).cloned(),
            Some("MultiPolygon") => {
                let parts = coords
                    .and_then(|c| c.as_array())
                    .cloned()
                    .unwrap_or_default();
                if parts.len() != 1 {
                    return Err(unusable(format!(
                        "feature {i} (plot {id}): a MultiPolygon with {} parts; a plot must be one polygon",
                        parts.len()
                    )));
                }
                parts[0].as_array().cloned()
            }
            other => {
                return Err(unusable(format!(
                    "feature {i} (plot {id}): geometry type {other:?}, expected Polygon"
                )))
            }
        };
        let rings =
            rings.ok_or_else(|| unusable(format!("feature {i} (plot {id}): no coordinates")))?;
        let mut parsed = Vec::new();
        for r in &rings {
            let ring = ring_from_json(r).ok_or_else(|| {
                unusable(format!(
                    "feature {i} (plot {id}): coordinates must be [lon, lat] number pairs"
                ))
            })?;
            if ring.len() < 4 {
                return Err(unusable(format!(
                    "feature {i} (plot {id}): a ring needs at least 4 positions"
                )));
            }
            parsed.push(ring);
        }
        if parsed.is_empty() {
            return Err(unusable(format!("feature {i} (plot {id}): empty polygon")));
        }
        let exterior = parsed.remove(0);
        out.push(PlotPolygon {
            plot_id: id,
            exterior,
            holes: parsed,
        });
    }
    if out.is_empty() {
        return Err(unusable("no plot features".into()));
    }
    let crs = v
        .get("crs")
        .and_then(|c| c.get("properties"))
        .and_then(|p| p.get("name"))
        .and_then(|n| n.as_str())
        .filter(|n| !n.to_ascii_uppercase().ends_with("CRS84"))
        .map(String::from);
    Ok((out, crs))
}
