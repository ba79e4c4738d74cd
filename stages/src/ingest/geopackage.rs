//! GeoPackage feature layers (OGC 12-128r18, an SQLite file), read with `rusqlite` (SQLite
//! compiled in, so no system library is needed) opened read-only: the layer's attribute
//! columns as text, its geometries from the GeoPackage binary header and the ISO WKB after it
//! (points, polygons and multipolygons, with Z and M values dropped), and its CRS from
//! `gpkg_spatial_ref_sys`.

use super::layers::{Feature, Geometry, Layer};
use rusqlite::types::ValueRef;
use rusqlite::{Connection, OpenFlags};
use std::path::Path;

/// Read the one feature layer of a GeoPackage, or the one named `layer` when it has several.
pub fn read(path: &Path, layer: &str) -> Result<Layer, String> {
    let db = Connection::open_with_flags(
        path,
        OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
    )
    .map_err(|e| format!("not a readable GeoPackage: {e}"))?;
    let sql = |e: rusqlite::Error| format!("not a readable GeoPackage: {e}");
    let mut tables: Vec<String> = db
        .prepare(
            "SELECT table_name FROM gpkg_contents WHERE data_type = 'features' ORDER BY table_name",
        )
        .and_then(|mut s| s.query_map([], |r| r.get(0))?.collect())
        .map_err(sql)?;
    let table = if !layer.is_empty() {
        if !tables.iter().any(|t| t == layer) {
            return Err(format!(
                "no feature layer {layer:?} (inputs.layer); its feature layers: {}",
                tables.join(", ")
            ));
        }
        layer.to_string()
    } else if tables.len() == 1 {
        tables.remove(0)
    } else {
        return Err(format!(
            "{} feature layers ({}): name one as inputs.layer",
            tables.len(),
            tables.join(", ")
        ));
    };
    let (geom_col, srs_id): (String, i64) = db
        .query_row(
            "SELECT column_name, srs_id FROM gpkg_geometry_columns WHERE table_name = ?1",
            [&table],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .map_err(|e| format!("layer {table}: no geometry column ({e})"))?;
    let crs = crs_of_srs(&db, srs_id).map_err(|e| format!("layer {table}: {e}"))?;
    let quoted = format!("\"{}\"", table.replace('"', "\"\""));
    let mut stmt = db
        .prepare(&format!("SELECT rowid, * FROM {quoted} ORDER BY rowid"))
        .map_err(sql)?;
    let names: Vec<String> = stmt.column_names().map(|s| s.to_string()).collect();
    let geom_at = names
        .iter()
        .skip(1)
        .position(|n| n.eq_ignore_ascii_case(&geom_col))
        .map(|i| i + 1)
        .ok_or_else(|| format!("layer {table}: its geometry column {geom_col:?} is missing"))?;
    let fields: Vec<String> = names
        .iter()
        .enumerate()
        .skip(1)
        .filter(|(i, _)| *i != geom_at)
        .map(|(_, n)| n.clone())
        .collect();
    let mut rows = stmt.query([]).map_err(sql)?;
    let mut features = Vec::new();
    while let Some(row) = rows.next().map_err(sql)? {
        let number: i64 = row.get(0).map_err(sql)?;
        let mut values = Vec::with_capacity(fields.len());
        let mut geometry = Ok(Geometry::Empty);
        for i in 1..names.len() {
            let v = row.get_ref(i).map_err(sql)?;
            if i == geom_at {
                geometry = match v {
                    ValueRef::Null => Ok(Geometry::Empty),
                    ValueRef::Blob(b) => geometry_of_blob(b),
                    _ => Err("the geometry is not a GeoPackage geometry blob".into()),
                };
                continue;
            }
            values.push(match v {
                ValueRef::Null => String::new(),
                ValueRef::Integer(n) => n.to_string(),
                ValueRef::Real(x) => x.to_string(),
                ValueRef::Text(t) => String::from_utf8_lossy(t).trim().to_string(),
                ValueRef::Blob(_) => String::new(),
            });
        }
        features.push(Feature {
            number: number as u64,
            values,
            geometry,
        });
    }
    Ok(Layer {
        word: "feature",
        what: format!("GeoPackage layer {table}"),
        fields,
        features,
        crs: Ok(crs),
    })
}

/// The CRS of a spatial reference id: `None` for WGS84 lon/lat (EPSG:4326), else `EPSG:n`.
fn crs_of_srs(db: &Connection, srs_id: i64) -> Result<Option<String>, String> {
    let (org, code): (String, i64) = db
        .query_row(
            "SELECT organization, organization_coordsys_id FROM gpkg_spatial_ref_sys WHERE srs_id = ?1",
            [srs_id],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .map_err(|e| format!("spatial reference {srs_id} not in gpkg_spatial_ref_sys ({e})"))?;
    if !org.eq_ignore_ascii_case("EPSG") || code <= 0 {
        return Err(format!(
            "its spatial reference is {org} {code}, not an EPSG code; give the CRS as inputs.crs = \"EPSG:...\""
        ));
    }
    Ok((code != 4326).then(|| format!("EPSG:{code}")))
}

/// A GeoPackage geometry blob: "GP", version, flags, srs id, envelope, then WKB.
pub fn geometry_of_blob(b: &[u8]) -> Result<Geometry, String> {
    if b.len() < 8 || &b[..2] != b"GP" {
        return Err("the geometry is not a GeoPackage geometry blob (no \"GP\" header)".into());
    }
    let flags = b[3];
    if flags & 0x20 != 0 {
        return Err("an extended GeoPackage geometry type, expected Polygon or Point".into());
    }
    let envelope = match (flags >> 1) & 0x07 {
        0 => 0,
        1 => 32,
        2 | 3 => 48,
        4 => 64,
        n => {
            return Err(format!(
                "envelope code {n} in the geometry header is invalid"
            ))
        }
    };
    if flags & 0x10 != 0 {
        return Ok(Geometry::Empty);
    }
    let mut r = Wkb {
        b,
        at: 8 + envelope,
        little: true,
    };
    r.geometry()
}

/// A reader of ISO (and extended) well-known binary.
struct Wkb<'a> {
    b: &'a [u8],
    at: usize,
    little: bool,
}

impl Wkb<'_> {
    fn bytes<const N: usize>(&mut self) -> Result<[u8; N], String> {
        let s = self
            .b
            .get(self.at..self.at + N)
            .ok_or("the geometry's WKB ends early")?;
        self.at += N;
        Ok(s.try_into().expect("slice of N bytes"))
    }
    fn u32(&mut self) -> Result<u32, String> {
        let a = self.bytes::<4>()?;
        Ok(if self.little {
            u32::from_le_bytes(a)
        } else {
            u32::from_be_bytes(a)
        })
    }
    fn f64(&mut self) -> Result<f64, String> {
        let a = self.bytes::<8>()?;
        Ok(if self.little {
            f64::from_le_bytes(a)
        } else {
            f64::from_be_bytes(a)
        })
    }
    /// Byte order and type: (base type 1-7, coordinates per position).
    fn header(&mut self) -> Result<(u32, usize), String> {
        self.little = match self.bytes::<1>()?[0] {
            0 => false,
            1 => true,
            o => return Err(format!("WKB byte order {o} is invalid")),
        };
        let t = self.u32()?;
        // Extended WKB keeps Z, M and SRID as high bits; ISO WKB adds 1000, 2000 or 3000.
        let (z, m, srid) = (
            t & 0x8000_0000 != 0,
            t & 0x4000_0000 != 0,
            t & 0x2000_0000 != 0,
        );
        if srid {
            self.u32()?;
        }
        let iso = t & 0x0fff_ffff;
        let (base, iso_dims) = (iso % 1000, iso / 1000);
        let dims = 2
            + usize::from(z)
            + usize::from(m)
            + [0, 1, 1, 2]
                .get(iso_dims as usize)
                .copied()
                .ok_or(format!("WKB type {t} is invalid"))?;
        Ok((base, dims))
    }
    fn position(&mut self, dims: usize) -> Result<(f64, f64), String> {
        let p = (self.f64()?, self.f64()?);
        for _ in 2..dims {
            self.f64()?;
        }
        Ok(p)
    }
    fn rings(&mut self, dims: usize) -> Result<Vec<Vec<(f64, f64)>>, String> {
        let n = self.u32()?;
        (0..n)
            .map(|_| {
                let k = self.u32()?;
                (0..k).map(|_| self.position(dims)).collect()
            })
            .collect()
    }
    fn geometry(&mut self) -> Result<Geometry, String> {
        let (base, dims) = self.header()?;
        Ok(match base {
            1 => {
                let p = self.position(dims)?;
                if p.0.is_nan() && p.1.is_nan() {
                    Geometry::Empty
                } else {
                    Geometry::Point(p.0, p.1)
                }
            }
            3 => Geometry::Polygon(self.rings(dims)?),
            6 => {
                let n = self.u32()?;
                let mut parts = Vec::new();
                for _ in 0..n {
                    let (b, d) = self.header()?;
                    if b != 3 {
                        return Err(format!("a MultiPolygon part of WKB type {b}"));
                    }
                    parts.push(self.rings(d)?);
                }
                Geometry::MultiPolygon(parts)
            }
            2 => Geometry::Other("LineString".into()),
            4 => Geometry::Other("MultiPoint".into()),
            5 => Geometry::Other("MultiLineString".into()),
            7 => Geometry::Other("GeometryCollection".into()),
            t => Geometry::Other(format!("WKB type {t}")),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn blob(wkb: &[u8], envelope: &[f64]) -> Vec<u8> {
        let code = match envelope.len() {
            0 => 0u8,
            4 => 1,
            _ => 2,
        };
        let mut b = vec![b'G', b'P', 0, (code << 1) | 1];
        b.extend(32614i32.to_le_bytes());
        for v in envelope {
            b.extend(v.to_le_bytes());
        }
        b.extend(wkb);
        b
    }

    #[test]
    fn points_and_polygons_in_both_byte_orders_and_with_z() {
        // A little-endian 2D point.
        let mut p = vec![1u8];
        p.extend(1u32.to_le_bytes());
        p.extend(402200.5f64.to_le_bytes());
        p.extend(4040600.25f64.to_le_bytes());
        assert_eq!(
            geometry_of_blob(&blob(&p, &[])).unwrap(),
            Geometry::Point(402200.5, 4040600.25)
        );
        // A big-endian PolygonZ (ISO type 1003) with one 4-position ring, behind an xy envelope.
        let mut g = vec![0u8];
        g.extend(1003u32.to_be_bytes());
        g.extend(1u32.to_be_bytes());
        g.extend(4u32.to_be_bytes());
        for (x, y) in [(0.0, 0.0), (3.0, 0.0), (3.0, 9.0), (0.0, 0.0)] {
            for v in [x, y, 7.5f64] {
                g.extend(v.to_be_bytes());
            }
        }
        let ring = vec![(0.0, 0.0), (3.0, 0.0), (3.0, 9.0), (0.0, 0.0)];
        assert_eq!(
            geometry_of_blob(&blob(&g, &[0.0, 3.0, 0.0, 9.0])).unwrap(),
            Geometry::Polygon(vec![ring])
        );
        assert!(geometry_of_blob(b"XX\0\0\0\0\0\0")
            .unwrap_err()
            .contains("no \"GP\" header"));
        assert!(geometry_of_blob(&blob(&g[..20], &[]))
            .unwrap_err()
            .contains("ends early"));
    }
}
