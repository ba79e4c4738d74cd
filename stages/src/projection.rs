//! Projection of WGS84 longitude/latitude to UTM (metres), through the pure-Rust `proj4rs`.
//!
//! Parameters: a UTM zone (1-60) and hemisphere. Returns easting and northing in metres;
//! EPSG code 326zz (north) or 327zz (south).
//! Errors: [`ProjectionError`] for a zone out of range or a failed transform.
//! References: Snyder 1987, "Map Projections: A Working Manual", USGS PP 1395 (transverse
//! Mercator); checked against pyproj (PROJ) in `tests/` to the millimetre.

use proj4rs::proj::Proj;

/// A failed projection.
#[derive(Debug, thiserror::Error)]
pub enum ProjectionError {
    #[error("UTM zone {0} is out of range 1-60")]
    Zone(i64),
    #[error("projection failed at lon {lon}, lat {lat}: {message}")]
    Transform { lon: f64, lat: f64, message: String },
}

/// A UTM zone on WGS84.
pub struct Utm {
    zone: u32,
    south: bool,
    src: Proj,
    dst: Proj,
}

/// The UTM zone containing a longitude (standard 6-degree zones; the Norway and Svalbard
/// exceptions are not applied: a trial field never straddles them in practice).
pub fn zone_of(lon: f64) -> u32 {
    let z = ((lon + 180.0) / 6.0).floor() as i64 + 1;
    z.clamp(1, 60) as u32
}

impl Utm {
    /// Projection to zone `zone` of the northern (or southern) hemisphere.
    pub fn new(zone: i64, south: bool) -> Result<Self, ProjectionError> {
        if !(1..=60).contains(&zone) {
            return Err(ProjectionError::Zone(zone));
        }
        let src = Proj::from_proj_string("+proj=longlat +datum=WGS84 +no_defs")
            .expect("static WGS84 definition parses");
        let def = format!(
            "+proj=utm +zone={zone}{} +datum=WGS84 +units=m +no_defs",
            if south { " +south" } else { "" }
        );
        let dst = Proj::from_proj_string(&def).expect("UTM definition with a valid zone parses");
        Ok(Utm {
            zone: zone as u32,
            south,
            src,
            dst,
        })
    }

    /// The zone of an EPSG code 326zz or 327zz.
    pub fn from_epsg(epsg: u32) -> Result<Self, ProjectionError> {
        match epsg {
            32601..=32660 => Utm::new((epsg - 32600) as i64, false),
            32701..=32760 => Utm::new((epsg - 32700) as i64, true),
            _ => Err(ProjectionError::Zone(epsg as i64)),
        }
    }

    /// EPSG code of this zone: 32600 + zone (north) or 32700 + zone (south).
    pub fn epsg(&self) -> u32 {
        if self.south {
            32700 + self.zone
        } else {
            32600 + self.zone
        }
    }

    /// Project one point; lon/lat in degrees.
    pub fn forward(&self, lon: f64, lat: f64) -> Result<(f64, f64), ProjectionError> {
        let mut p = (lon.to_radians(), lat.to_radians());
        proj4rs::transform::transform(&self.src, &self.dst, &mut p).map_err(|e| {
            ProjectionError::Transform {
                lon,
                lat,
                message: e.to_string(),
            }
        })?;
        Ok(p)
    }

    /// Back to lon/lat in degrees.
    pub fn inverse(&self, x: f64, y: f64) -> Result<(f64, f64), ProjectionError> {
        let mut p = (x, y);
        proj4rs::transform::transform(&self.dst, &self.src, &mut p).map_err(|e| {
            ProjectionError::Transform {
                lon: x,
                lat: y,
                message: e.to_string(),
            }
        })?;
        Ok((p.0.to_degrees(), p.1.to_degrees()))
    }
}

/// A coordinate reference system named by an EPSG code, for inputs that come in projected
/// (or another geographic) coordinates; its definition is from the `crs-definitions` table
/// through `proj4rs`. Checked against pyproj in four CRSs (`tests/fixtures/crs_pyproj.csv`).
pub struct Crs {
    code: u16,
    /// `EPSG:n`, or the proj string of a CRS read from WKT.
    label: String,
    proj: Proj,
    wgs84: Proj,
    geographic: bool,
}

impl Crs {
    /// `EPSG:32614`, `epsg:32614`, `32614` or `urn:ogc:def:crs:EPSG::32614`.
    /// A proj string (`+proj=...`, as [`crate::ingest::wkt`] makes from a `.prj`) is taken
    /// as it is, with code 0.
    pub fn parse(text: &str) -> Result<Crs, String> {
        let t = text.trim();
        let wgs84 = || {
            Proj::from_proj_string("+proj=longlat +datum=WGS84 +no_defs")
                .expect("static WGS84 definition parses")
        };
        if t.starts_with("+proj=") {
            let proj = Proj::from_proj_string(t).map_err(|e| format!("{t:?}: {e}"))?;
            return Ok(Crs {
                code: 0,
                label: t.to_string(),
                geographic: proj.is_latlong(),
                proj,
                wgs84: wgs84(),
            });
        }
        let code = t
            .rsplit(':')
            .next()
            .filter(|c| {
                let l = t.to_ascii_lowercase();
                l == *c || l.starts_with("epsg:") || l.starts_with("urn:ogc:def:crs:epsg:")
            })
            .and_then(|c| c.parse::<u16>().ok())
            .ok_or_else(|| {
                format!(
                    "{t:?} is not a CRS this program knows: give an EPSG code, e.g. \"EPSG:32614\""
                )
            })?;
        let proj = Proj::from_epsg_code(code)
            .map_err(|e| format!("EPSG:{code} is not in the CRS table ({e})"))?;
        let geographic = proj.is_latlong();
        Ok(Crs {
            code,
            label: format!("EPSG:{code}"),
            proj,
            wgs84: wgs84(),
            geographic,
        })
    }

    pub fn code(&self) -> u16 {
        self.code
    }

    /// `EPSG:n`, or the proj string.
    pub fn label(&self) -> &str {
        &self.label
    }

    /// (x, y) in this CRS (degrees for a geographic one) to WGS84 (lon, lat) in degrees.
    pub fn to_wgs84(&self, x: f64, y: f64) -> Result<(f64, f64), ProjectionError> {
        let mut p = if self.geographic {
            (x.to_radians(), y.to_radians())
        } else {
            (x, y)
        };
        proj4rs::transform::transform(&self.proj, &self.wgs84, &mut p).map_err(|e| {
            ProjectionError::Transform {
                lon: x,
                lat: y,
                message: format!("from {}: {e}", self.label),
            }
        })?;
        let (lon, lat) = (p.0.to_degrees(), p.1.to_degrees());
        if !(lon.is_finite() && lat.is_finite()) {
            return Err(ProjectionError::Transform {
                lon: x,
                lat: y,
                message: format!("from {}: no position", self.label),
            });
        }
        Ok((lon, lat))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn projected_inputs_match_pyproj_in_four_crss() {
        // tests/fixtures/crs_pyproj.csv, made by tests/fixtures/make_crs_fixture.py with
        // pyproj 3.7.2 (PROJ 9.5.1): x/y back to lon/lat within 1e-7 degrees (about 1 cm).
        let text = include_str!("../../tests/fixtures/crs_pyproj.csv");
        let mut n = 0;
        for line in text.lines().filter(|l| !l.starts_with('#')).skip(1) {
            let v: Vec<&str> = line.split(',').collect();
            let crs = Crs::parse(&format!("EPSG:{}", v[0])).unwrap();
            let (lon, lat, x, y): (f64, f64, f64, f64) = (
                v[1].parse().unwrap(),
                v[2].parse().unwrap(),
                v[3].parse().unwrap(),
                v[4].parse().unwrap(),
            );
            let (a, b) = crs.to_wgs84(x, y).unwrap();
            assert!(
                (a - lon).abs() < 1e-7 && (b - lat).abs() < 1e-7,
                "EPSG:{}: ({x}, {y}) -> ({a}, {b}), pyproj ({lon}, {lat})",
                v[0]
            );
            n += 1;
        }
        assert_eq!(n, 16);
        assert_eq!(
            Crs::parse("urn:ogc:def:crs:EPSG::2154").unwrap().code(),
            2154
        );
        let (a, b) = Crs::parse(" epsg:4326 ")
            .unwrap()
            .to_wgs84(-97.5, 40.25)
            .unwrap();
        assert!((a + 97.5).abs() < 1e-12 && (b - 40.25).abs() < 1e-12);
        assert!(Crs::parse("UTM 14")
            .err()
            .unwrap()
            .contains("give an EPSG code"));
        assert!(Crs::parse("EPSG:1")
            .err()
            .unwrap()
            .contains("not in the CRS table"));
    }

    #[test]
    fn zone_numbers() {
        assert_eq!(zone_of(-177.0), 1);
        assert_eq!(zone_of(3.0), 31);
        assert_eq!(zone_of(-97.8), 14);
        assert_eq!(zone_of(179.9), 60);
    }

    #[test]
    fn central_meridian_on_equator_is_false_easting() {
        // On the central meridian at the equator, easting is the false easting 500 000 m and
        // northing 0 (definition of UTM, Snyder 1987).
        let utm = Utm::new(31, false).unwrap();
        let (x, y) = utm.forward(3.0, 0.0).unwrap();
        assert!((x - 500_000.0).abs() < 1e-6 && y.abs() < 1e-6, "{x} {y}");
        assert_eq!(utm.epsg(), 32631);
    }

    #[test]
    fn round_trip() {
        let utm = Utm::new(14, false).unwrap();
        let (x, y) = utm.forward(-97.81234, 40.61234).unwrap();
        let (lon, lat) = utm.inverse(x, y).unwrap();
        assert!((lon + 97.81234).abs() < 1e-9 && (lat - 40.61234).abs() < 1e-9);
    }
}
