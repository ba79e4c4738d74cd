//! Plot polygons from GeoJSON: RFC 7946 (WGS84 lon/lat), or in a projected CRS named by the
//! file's `crs` member (the 2008 GeoJSON form, e.g. `urn:ogc:def:crs:EPSG::32614`) or by
//! the trial's `inputs.crs` ([`read_plot_input`]).

use super::IngestError;
use crate::table::PlotPolygon;
use std::path::Path;

/// Read plot polygons from GeoJSON (Polygon or single-part MultiPolygon features), with
/// coordinates as the file has them.
pub fn read_geojson(
    path: &Path,
    name: &str,
    id_prop: &str,
) -> Result<Vec<PlotPolygon>, IngestError> {
    super::layers::plot_polygons(
        super::layers::read(path, name, "")?,
        name,
        id_prop,
        "inputs.plot_id_property",
    )
}

/// The analyst's plot file (GeoJSON, or a Shapefile or GeoPackage by its `.shp` or `.gpkg`
/// extension; `layer` names a GeoPackage's layer) in WGS84 lon/lat: a GeoJSON's coordinates
/// in the CRS its `crs` member names, else in `crs` (the trial's `inputs.crs`; empty: WGS84
/// lon/lat), brought to lon/lat. A Shapefile's or GeoPackage's CRS is `crs`, or else its
/// own (`.prj`, spatial reference).
pub fn read_plot_input(
    path: &Path,
    name: &str,
    id_prop: &str,
    crs: &str,
    layer: &str,
) -> Result<Vec<PlotPolygon>, IngestError> {
    read_polygon_layer(path, name, id_prop, "inputs.plot_id_property", crs, layer)
}

/// [`read_plot_input`] for any polygon layer whose attribute `prop` (the setting `key`)
/// names each polygon (plot ids; treatments of prescription polygons).
pub fn read_polygon_layer(
    path: &Path,
    name: &str,
    id_prop: &str,
    key: &str,
    crs: &str,
    layer: &str,
) -> Result<Vec<PlotPolygon>, IngestError> {
    let unusable = |message: String| IngestError::Unusable {
        file: name.to_string(),
        message,
    };
    let trial_crs_wins = super::layers::layer_format(path).is_some_and(|f| f.trial_crs_wins());
    let layer = super::layers::read(path, name, layer)?;
    let named = if trial_crs_wins {
        // The trial's crs wins over a Shapefile's .prj or a GeoPackage's reference.
        layer.crs_with(crs).map_err(unusable)?
    } else {
        // A GeoJSON file's own crs member wins over the trial's.
        layer
            .crs
            .clone()
            .ok()
            .flatten()
            .unwrap_or_else(|| crs.to_string())
    };
    let mut polys = super::layers::plot_polygons(layer, name, id_prop, key)?;
    if named.is_empty() {
        return Ok(polys);
    }
    let c = crate::projection::Crs::parse(&named).map_err(|e| unusable(format!("crs: {e}")))?;
    if c.code() == 4326 {
        return Ok(polys);
    }
    for p in &mut polys {
        let id = p.plot_id.clone();
        for ring in std::iter::once(&mut p.exterior).chain(p.holes.iter_mut()) {
            for v in ring.iter_mut() {
                *v = c.to_wgs84(v.0, v.1).map_err(|e| {
                    unusable(format!("plot {id}: {e} (coordinates in {})", c.label()))
                })?;
            }
        }
    }
    Ok(polys)
}
