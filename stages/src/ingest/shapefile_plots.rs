//! Plot polygons from an ESRI Shapefile (`.shp` with its `.shx`, `.dbf` and optional `.prj`),
//! read with the `shapefile` crate: one polygon per record (holes allowed), the plot id from
//! the attribute named by `inputs.plot_id_property`, the CRS from `inputs.crs` or else from
//! the `.prj` (WGS84 geographic, or WGS84 / UTM zones; any other `.prj` asks for
//! `inputs.crs`).

use super::IngestError;
use crate::table::PlotPolygon;
use shapefile::dbase::FieldValue;
use shapefile::{PolygonRing, Shape};
use std::path::Path;

/// A Shapefile opened with its `.shx` and `.dbf`; the error names the file.
pub(crate) fn open(
    path: &Path,
    name: &str,
) -> Result<
    shapefile::Reader<std::io::BufReader<std::fs::File>, std::io::BufReader<std::fs::File>>,
    IngestError,
> {
    shapefile::Reader::from_path(path).map_err(|e| IngestError::Unusable {
        file: name.to_string(),
        message: format!("not a readable Shapefile (with .shx and .dbf): {e}"),
    })
}

/// Polygons as stored and the CRS the `.prj` names ("" for WGS84 lon/lat or no `.prj`).
pub fn read(
    path: &Path,
    name: &str,
    id_prop: &str,
) -> Result<(Vec<PlotPolygon>, String), IngestError> {
    let unusable = |message: String| IngestError::Unusable {
        file: name.to_string(),
        message,
    };
    let mut reader = open(path, name)?;
    let mut out = Vec::new();
    for (i, item) in reader.iter_shapes_and_records().enumerate() {
        let (shape, record) = item.map_err(|e| unusable(format!("record {}: {e}", i + 1)))?;
        let id = match record.get(id_prop) {
            Some(FieldValue::Character(Some(s))) => s.trim().to_string(),
            Some(FieldValue::Numeric(Some(v))) => format!("{v}"),
            Some(FieldValue::Integer(v)) => v.to_string(),
            _ => {
                return Err(unusable(format!(
                    "record {}: no attribute {id_prop:?} (inputs.plot_id_property)",
                    i + 1
                )))
            }
        };
        let rings = match shape {
            Shape::Polygon(p) => p
                .rings()
                .iter()
                .map(|r| {
                    let pts: Vec<(f64, f64)> = r.points().iter().map(|p| (p.x, p.y)).collect();
                    (matches!(r, PolygonRing::Outer(_)), pts)
                })
                .collect::<Vec<_>>(),
            other => {
                return Err(unusable(format!(
                    "record {} (plot {id}): a {} shape, expected a polygon",
                    i + 1,
                    other.shapetype()
                )))
            }
        };
        let outers = rings.iter().filter(|r| r.0).count();
        if outers != 1 {
            return Err(unusable(format!(
                "record {} (plot {id}): {outers} outer rings; a plot must be one polygon",
                i + 1
            )));
        }
        let mut exterior = Vec::new();
        let mut holes = Vec::new();
        for (outer, mut pts) in rings {
            if pts.len() < 4 {
                return Err(unusable(format!(
                    "record {} (plot {id}): a ring needs at least 4 positions",
                    i + 1
                )));
            }
            // Shapefile rings run clockwise; plotsieve's (like RFC 7946) counterclockwise.
            pts.reverse();
            if outer {
                exterior = pts;
            } else {
                holes.push(pts);
            }
        }
        out.push(PlotPolygon {
            plot_id: id,
            exterior,
            holes,
        });
    }
    if out.is_empty() {
        return Err(unusable("no plot records".into()));
    }
    let prj = path.with_extension("prj");
    let crs = match std::fs::read_to_string(&prj) {
        Err(_) => String::new(),
        Ok(wkt) => crs_of_prj(&wkt).map_err(unusable)?,
    };
    Ok((out, crs))
}

/// The EPSG code a `.prj` names, for the CRSs farm data travels in without `inputs.crs`:
/// WGS84 geographic ("") and WGS84 / UTM zones.
pub(crate) fn crs_of_prj(wkt: &str) -> Result<String, String> {
    let w = wkt.to_ascii_uppercase().replace(' ', "_");
    if !w.contains("WGS_1984") && !w.contains("WGS_84") {
        return Err(format!(
            "its .prj is not on WGS 84 ({}...); give the CRS as inputs.crs = \"EPSG:...\"",
            wkt.chars().take(60).collect::<String>()
        ));
    }
    if !w.starts_with("PROJCS") && !w.starts_with("PROJCRS") {
        return Ok(String::new());
    }
    let zone = w
        .split("UTM_ZONE_")
        .nth(1)
        .and_then(|z| {
            let digits: String = z.chars().take_while(|c| c.is_ascii_digit()).collect();
            let south = z[digits.len()..].starts_with('S');
            digits.parse::<u32>().ok().map(|n| (n, south))
        })
        .filter(|(n, _)| (1..=60).contains(n));
    match zone {
        Some((n, south)) => Ok(format!("EPSG:{}", if south { 32700 } else { 32600 } + n)),
        None => Err(format!(
            "its .prj names a projection this program cannot identify ({}...); give the CRS as inputs.crs = \"EPSG:...\"",
            wkt.chars().take(60).collect::<String>()
        )),
    }
}

#[cfg(test)]
mod tests {
    use super::crs_of_prj;

    #[test]
    fn prj_names_of_wgs84_and_its_utm_zones() {
        assert_eq!(
            crs_of_prj(
                r#"GEOGCS["GCS_WGS_1984",DATUM["D_WGS_1984",SPHEROID["WGS_1984",6378137,298.257223563]],PRIMEM["Greenwich",0],UNIT["Degree",0.017453292519943295]]"#
            ),
            Ok(String::new())
        );
        assert_eq!(
            crs_of_prj(
                r#"PROJCS["WGS_1984_UTM_Zone_14N",GEOGCS["GCS_WGS_1984",DATUM["D_WGS_1984",SPHEROID["WGS_1984",6378137.0,298.257223563]]]]"#
            ),
            Ok("EPSG:32614".into())
        );
        assert_eq!(
            crs_of_prj(r#"PROJCS["WGS 84 / UTM zone 33S",GEOGCS["WGS 84"]]"#),
            Ok("EPSG:32733".into())
        );
        assert!(
            crs_of_prj(r#"PROJCS["RGF93_Lambert_93",GEOGCS["GCS_RGF_1993"]]"#)
                .unwrap_err()
                .contains("give the CRS as inputs.crs")
        );
    }
}
