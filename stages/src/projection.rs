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

#[cfg(test)]
mod tests {
    use super::*;

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
