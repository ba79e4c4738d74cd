//! GeoPackage feature layers (OGC 12-128r18, an SQLite file), read with `rusqlite` (SQLite
//! compiled in, so no system library is needed) opened read-only: the layer's attribute
//! columns as text, its geometries from the GeoPackage binary header and the ISO WKB after it
//! (points, polygons and multipolygons, with Z and M values dropped), and its CRS from
//! `gpkg_spatial_ref_sys`.

use super::layer::{Feature, Geometry, Layer};
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
    // The integer primary key (the feature id, `fid` as GDAL names it) is not an attribute.
    let pk: Option<String> = db
        .prepare(&format!("PRAGMA table_info({quoted})"))
        .and_then(|mut st| {
            st.query_map([], |r| {
                Ok((
                    r.get::<_, String>(1)?,
                    r.get::<_, String>(2)?,
                    r.get::<_, i64>(5)?,
                ))
            })?
            .collect::<Result<Vec<_>, _>>()
        })
        .map_err(sql)?
        .into_iter()
        .find(|(_, kind, pk)| *pk == 1 && kind.eq_ignore_ascii_case("INTEGER"))
        .map(|(n, _, _)| n);
    let skip = |i: usize| i == 0 || i == geom_at || pk.as_deref() == Some(names[i].as_str());
    let fields: Vec<String> = (0..names.len())
        .filter(|&i| !skip(i))
        .map(|i| names[i].clone())
        .collect();
    let mut rows = stmt.query([]).map_err(sql)?;
    let mut features = Vec::new();
    while let Some(row) = rows.next().map_err(sql)? {
        let number: i64 = row.get(0).map_err(sql)?;
        let mut values = Vec::with_capacity(fields.len());
        let mut geometry = Ok(Geometry::Empty);
        for i in 1..names.len() {
            let v = row.get_ref(i).map_err(sql)?;
            if i != geom_at && skip(i) {
                continue;
            }
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

/// The CRS of a spatial reference id: `None` for WGS84 lon/lat (EPSG:4326), else `EPSG:n`,
/// or for a reference without an EPSG code the proj string its WKT definition reads to
/// ([`super::wkt`]).
fn crs_of_srs(db: &Connection, srs_id: i64) -> Result<Option<String>, String> {
    let (org, code, definition): (String, i64, String) = db
        .query_row(
            "SELECT organization, organization_coordsys_id, definition FROM gpkg_spatial_ref_sys WHERE srs_id = ?1",
            [srs_id],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
        )
        .map_err(|e| format!("spatial reference {srs_id} not in gpkg_spatial_ref_sys ({e})"))?;
    if org.eq_ignore_ascii_case("EPSG") && code > 0 {
        return Ok((code != 4326).then(|| format!("EPSG:{code}")));
    }
    super::wkt::proj_string(&definition).map(Some).map_err(|why| {
        format!(
            "its spatial reference is {org} {code}, not an EPSG code, and its definition cannot be read ({why}); give the CRS as inputs.crs = \"EPSG:...\""
        )
    })
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

/// Write a table of points (a CSV text with `lon_deg` and `lat_deg` columns, the rest
/// attributes: `time_utc` as text, every other column as a number) as a GeoPackage point
/// layer `points` in WGS84 lon/lat, for the simulator. The file is new (an existing one is
/// an error) and its bytes depend only on the table (a fixed `last_change`).
pub fn write_points(path: &Path, csv_text: &str) -> Result<(), String> {
    let crate::ingest::layer::PointTable {
        mut rdr,
        header,
        lonlat: (ilon, ilat),
        attrs,
    } = crate::ingest::layer::point_table(csv_text)?;
    if path.exists() {
        return Err(format!("{} exists", path.display()));
    }
    let db = Connection::open(path).map_err(|e| e.to_string())?;
    let q = |s: &str| format!("\"{}\"", s.replace('"', "\"\""));
    let columns: Vec<String> = attrs
        .iter()
        .map(|&i| {
            let kind = if header[i] == "time_utc" {
                "TEXT"
            } else {
                "REAL"
            };
            format!("{} {kind}", q(&header[i]))
        })
        .collect();
    let wgs84 = "GEOGCS[\"WGS 84\",DATUM[\"WGS_1984\",SPHEROID[\"WGS 84\",6378137,298.257223563]],PRIMEM[\"Greenwich\",0],UNIT[\"degree\",0.0174532925199433]]";
    let ddl = format!(
        "PRAGMA application_id = 1196444487; PRAGMA user_version = 10400;
         CREATE TABLE gpkg_spatial_ref_sys (srs_name TEXT NOT NULL, srs_id INTEGER PRIMARY KEY, organization TEXT NOT NULL, organization_coordsys_id INTEGER NOT NULL, definition TEXT NOT NULL, description TEXT);
         INSERT INTO gpkg_spatial_ref_sys VALUES ('WGS 84', 4326, 'EPSG', 4326, '{wgs84}', NULL), ('Undefined cartesian SRS', -1, 'NONE', -1, 'undefined', NULL), ('Undefined geographic SRS', 0, 'NONE', 0, 'undefined', NULL);
         CREATE TABLE gpkg_contents (table_name TEXT NOT NULL PRIMARY KEY, data_type TEXT NOT NULL, identifier TEXT UNIQUE, description TEXT DEFAULT '', last_change DATETIME NOT NULL, min_x DOUBLE, min_y DOUBLE, max_x DOUBLE, max_y DOUBLE, srs_id INTEGER);
         INSERT INTO gpkg_contents VALUES ('points', 'features', 'points', '', '2026-01-01T00:00:00.000Z', NULL, NULL, NULL, NULL, 4326);
         CREATE TABLE gpkg_geometry_columns (table_name TEXT NOT NULL, column_name TEXT NOT NULL, geometry_type_name TEXT NOT NULL, srs_id INTEGER NOT NULL, z TINYINT NOT NULL, m TINYINT NOT NULL, PRIMARY KEY (table_name, column_name));
         INSERT INTO gpkg_geometry_columns VALUES ('points', 'geom', 'POINT', 4326, 0, 0);
         CREATE TABLE points (fid INTEGER PRIMARY KEY AUTOINCREMENT, geom BLOB, {});",
        columns.join(", ")
    );
    db.execute_batch(&ddl).map_err(|e| e.to_string())?;
    let insert = format!(
        "INSERT INTO points (geom, {}) VALUES (?1{})",
        attrs
            .iter()
            .map(|&i| q(&header[i]))
            .collect::<Vec<_>>()
            .join(", "),
        (0..attrs.len())
            .map(|k| format!(", ?{}", k + 2))
            .collect::<String>()
    );
    let tx = db.unchecked_transaction().map_err(|e| e.to_string())?;
    {
        let mut stmt = tx.prepare(&insert).map_err(|e| e.to_string())?;
        for (k, rec) in rdr.records().enumerate() {
            let rec = rec.map_err(|e| format!("row {}: {e}", k + 2))?;
            let num = |i: usize| -> Result<f64, String> {
                rec.get(i)
                    .unwrap_or("")
                    .parse::<f64>()
                    .map_err(|_| format!("row {}, column {}: not a number", k + 2, header[i]))
            };
            // GeoPackage header (little-endian, no envelope, SRS 4326), then WKB Point.
            let mut blob = vec![b'G', b'P', 0, 1];
            blob.extend(4326i32.to_le_bytes());
            blob.push(1);
            blob.extend(1u32.to_le_bytes());
            blob.extend(num(ilon)?.to_le_bytes());
            blob.extend(num(ilat)?.to_le_bytes());
            let mut values: Vec<rusqlite::types::Value> = vec![blob.into()];
            for &i in &attrs {
                values.push(if header[i] == "time_utc" {
                    rec.get(i).unwrap_or("").to_string().into()
                } else {
                    num(i)?.into()
                });
            }
            stmt.execute(rusqlite::params_from_iter(values))
                .map_err(|e| e.to_string())?;
        }
    }
    tx.commit().map_err(|e| e.to_string())
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
    fn points_written_read_back_with_their_attributes() {
        let dir = std::env::temp_dir().join(format!("plotsieve-gpkg-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let p = dir.join("pts.gpkg");
        let _ = std::fs::remove_file(&p);
        let text = "time_utc,lon_deg,lat_deg,mass_flow_lb_s,header_state\n\
                    2026-09-18T09:00:00Z,-97.79994765,40.59998948,0.1234,1\n\
                    2026-09-18T09:00:01Z,-97.79994,40.59999,7.5,0\n";
        write_points(&p, text).unwrap();
        assert!(write_points(&p, text).unwrap_err().contains("exists"));
        let l = read(&p, "").unwrap();
        assert_eq!(l.fields, vec!["time_utc", "mass_flow_lb_s", "header_state"]);
        assert_eq!(l.crs, Ok(None));
        assert_eq!(l.features.len(), 2);
        assert_eq!(
            l.features[0].values,
            vec!["2026-09-18T09:00:00Z", "0.1234", "1"]
        );
        assert_eq!(
            l.features[0].geometry,
            Ok(Geometry::Point(-97.79994765, 40.59998948))
        );
        let bytes = std::fs::read(&p).unwrap();
        std::fs::remove_file(&p).unwrap();
        write_points(&p, text).unwrap();
        assert_eq!(std::fs::read(&p).unwrap(), bytes, "the same bytes again");
        // A spatial reference without an EPSG code is read from its WKT definition (NAD83 /
        // UTM 14N in ESRI WKT, as pyproj writes it); an unreadable one asks for inputs.crs.
        let db = Connection::open(&p).unwrap();
        db.execute_batch(r#"INSERT INTO gpkg_spatial_ref_sys VALUES ('local', 100001, 'NONE', 100001, 'PROJCS["NAD_1983_UTM_Zone_14N",GEOGCS["GCS_North_American_1983",DATUM["D_North_American_1983",SPHEROID["GRS_1980",6378137.0,298.257222101]],PRIMEM["Greenwich",0.0],UNIT["Degree",0.0174532925199433]],PROJECTION["Transverse_Mercator"],PARAMETER["False_Easting",500000.0],PARAMETER["False_Northing",0.0],PARAMETER["Central_Meridian",-99.0],PARAMETER["Scale_Factor",0.9996],PARAMETER["Latitude_Of_Origin",0.0],UNIT["Meter",1.0]]', NULL);
            UPDATE gpkg_geometry_columns SET srs_id = 100001;"#)
            .unwrap();
        let crs = read(&p, "").unwrap().crs.unwrap().unwrap();
        assert!(
            crs.starts_with("+proj=tmerc +lat_0=0 +lon_0=-99 +k_0=0.9996 +x_0=500000"),
            "{crs}"
        );
        db.execute_batch(
            "UPDATE gpkg_spatial_ref_sys SET definition = 'undefined' WHERE srs_id = 100001;",
        )
        .unwrap();
        drop(db);
        assert!(read(&p, "")
            .err()
            .unwrap()
            .contains("not an EPSG code, and its definition cannot be read"));
        std::fs::remove_file(&p).unwrap();
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
