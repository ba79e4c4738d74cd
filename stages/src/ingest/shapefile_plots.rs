//! ESRI Shapefiles (`.shp` with its `.shx`, `.dbf` and optional `.prj`), opened with the
//! `shapefile` crate, and the CRS a `.prj` names (WGS84 geographic, or WGS84 / UTM zones; any
//! other `.prj` asks for `inputs.crs`). Layers are read in [`super::layers`].

use super::IngestError;
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

/// The EPSG code a `.prj` names, for the CRSs farm data travels in without `inputs.crs`:
/// WGS84 geographic ("") and WGS84 / UTM zones.
pub(crate) fn crs_of_prj(wkt: &str) -> Result<String, String> {
    crs_of_wgs84_prj(wkt).or_else(|e| {
        // Another projected CRS: its WKT read to a proj string.
        super::wkt::proj_string(wkt).map_err(|why| format!("{e} ({why})"))
    })
}

/// WGS84 geographic ("") and WGS84 / UTM zones, by name.
fn crs_of_wgs84_prj(wkt: &str) -> Result<String, String> {
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
