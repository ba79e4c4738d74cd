//! Vector layers as farm data travels in: a GeoJSON FeatureCollection, an ESRI Shapefile
//! (`.shp` with `.shx`, `.dbf` and `.prj`) or a GeoPackage (`.gpkg`), read to one shape:
//! attribute values as text in the layer's field order, one geometry per feature, and the CRS
//! the file names. Plot polygons and plot tables are built from it.

use super::IngestError;
use shapefile::dbase::FieldValue;
use shapefile::{PolygonRing, Shape};
use std::path::Path;

pub(crate) use super::layer::{point_table, PointTable};
pub use super::layer::{Feature, Geometry, Layer, Ring};

/// A path's extension, lower case ("" without one).
pub fn extension(path: &Path) -> String {
    path.extension()
        .map(|e| e.to_string_lossy().to_ascii_lowercase())
        .unwrap_or_default()
}

/// A vector layer file format: points or polygons with attributes. Every format is in
/// [`LAYERS`]; nothing outside this registry tests a layer file's extension.
pub trait LayerFormat: Sync {
    /// The format's name, as messages print it.
    fn name(&self) -> &'static str;
    /// File-name extensions (lower case, no dot).
    fn extensions(&self) -> &'static [&'static str];
    /// The files that come with `path` and belong to it (a Shapefile's .shx, .dbf and .prj):
    /// hashed with it in the manifest, replaced with it when written.
    fn companions(&self, path: &Path) -> Vec<std::path::PathBuf> {
        let _ = path;
        Vec::new()
    }
    /// Whether the trial's `inputs.crs` overrides the CRS the file states (true for a
    /// Shapefile's .prj or a GeoPackage's reference); false where the file's own CRS wins
    /// (a GeoJSON file's crs member).
    fn trial_crs_wins(&self) -> bool {
        true
    }
    /// Read the layer (`layer`: which one of a file holding several, or empty).
    fn read(&self, path: &Path, name: &str, layer: &str) -> Result<Layer, IngestError>;
}

/// GeoJSON (RFC 7946, and the older crs member).
pub struct GeoJsonLayer;
/// An ESRI Shapefile: the .shp with its .shx, .dbf and .prj.
pub struct ShapefileLayer;
/// A GeoPackage feature layer.
pub struct GeoPackageLayer;

/// Every vector layer format; the first, GeoJSON, reads any other file named as a layer.
pub static LAYERS: &[&dyn LayerFormat] = &[&GeoJsonLayer, &ShapefileLayer, &GeoPackageLayer];

impl LayerFormat for GeoJsonLayer {
    fn name(&self) -> &'static str {
        "GeoJSON"
    }
    fn extensions(&self) -> &'static [&'static str] {
        &["geojson", "json"]
    }
    fn trial_crs_wins(&self) -> bool {
        false
    }
    fn read(&self, path: &Path, name: &str, _layer: &str) -> Result<Layer, IngestError> {
        read_geojson(path, name)
    }
}

impl LayerFormat for ShapefileLayer {
    fn name(&self) -> &'static str {
        "Shapefile"
    }
    fn extensions(&self) -> &'static [&'static str] {
        &["shp"]
    }
    fn companions(&self, path: &Path) -> Vec<std::path::PathBuf> {
        ["shx", "dbf", "prj"]
            .iter()
            .map(|e| path.with_extension(e))
            .collect()
    }
    fn read(&self, path: &Path, name: &str, _layer: &str) -> Result<Layer, IngestError> {
        read_shapefile(path, name)
    }
}

impl LayerFormat for GeoPackageLayer {
    fn name(&self) -> &'static str {
        "GeoPackage"
    }
    fn extensions(&self) -> &'static [&'static str] {
        &["gpkg"]
    }
    fn read(&self, path: &Path, name: &str, layer: &str) -> Result<Layer, IngestError> {
        if !path.is_file() {
            return Err(IngestError::Read {
                file: name.to_string(),
                message: "no such file".into(),
            });
        }
        super::geopackage::read(path, layer).map_err(|message| IngestError::Unusable {
            file: name.to_string(),
            message,
        })
    }
}

/// The layer format of a path, by its extension; None when no format claims it.
pub fn layer_format(path: &Path) -> Option<&'static dyn LayerFormat> {
    let ext = extension(path);
    LAYERS
        .iter()
        .copied()
        .find(|f| f.extensions().contains(&ext.as_str()))
}

/// Whether a path names a layer file this module reads (by extension).
pub fn is_layer(path: &Path) -> bool {
    layer_format(path).is_some()
}

/// The files that belong with `path` (its layer format's companions) that exist.
pub fn companions(path: &Path) -> Vec<std::path::PathBuf> {
    layer_format(path)
        .map(|f| f.companions(path))
        .unwrap_or_default()
        .into_iter()
        .filter(|p| p.is_file())
        .collect()
}

/// Read a layer through its format ([`layer_format`]); a file no format claims is read as
/// GeoJSON.
pub fn read(path: &Path, name: &str, layer: &str) -> Result<Layer, IngestError> {
    layer_format(path)
        .unwrap_or(&GeoJsonLayer)
        .read(path, name, layer)
}

fn read_geojson(path: &Path, name: &str) -> Result<Layer, IngestError> {
    let unusable = |message: String| IngestError::Unusable {
        file: name.to_string(),
        message,
    };
    let text = std::fs::read_to_string(path).map_err(|e| IngestError::Read {
        file: name.to_string(),
        message: e.to_string(),
    })?;
    let v: serde_json::Value =
        serde_json::from_str(&text).map_err(|e| unusable(format!("not valid JSON: {e}")))?;
    let feats = v
        .get("features")
        .and_then(|f| f.as_array())
        .ok_or_else(|| unusable("expected a GeoJSON FeatureCollection with \"features\"".into()))?;
    let mut fields: Vec<String> = Vec::new();
    for f in feats {
        if let Some(p) = f.get("properties").and_then(|p| p.as_object()) {
            for k in p.keys() {
                if !fields.contains(k) {
                    fields.push(k.clone());
                }
            }
        }
    }
    let features = feats
        .iter()
        .enumerate()
        .map(|(i, f)| {
            let props = f.get("properties");
            let values = fields
                .iter()
                .map(|k| match props.and_then(|p| p.get(k)) {
                    Some(serde_json::Value::String(s)) => s.trim().to_string(),
                    Some(serde_json::Value::Null) | None => String::new(),
                    Some(other) => other.to_string(),
                })
                .collect();
            Feature {
                number: i as u64,
                values,
                geometry: f
                    .get("geometry")
                    .filter(|g| !g.is_null())
                    .map(geometry_from_json)
                    .unwrap_or(Ok(Geometry::Empty)),
            }
        })
        .collect();
    Ok(Layer {
        word: "feature",
        what: "GeoJSON".into(),
        fields,
        features,
        crs: Ok(geojson_crs(&v)),
    })
}

/// The CRS a GeoJSON `crs` member names (the 2008 form), None without one or for CRS84.
pub fn geojson_crs(v: &serde_json::Value) -> Option<String> {
    v.get("crs")
        .and_then(|c| c.get("properties"))
        .and_then(|p| p.get("name"))
        .and_then(|n| n.as_str())
        .filter(|n| !n.to_ascii_uppercase().ends_with("CRS84"))
        .map(String::from)
}

fn ring_from_json(v: &serde_json::Value) -> Option<Ring> {
    v.as_array()?
        .iter()
        .map(|p| {
            let a = p.as_array()?;
            Some((a.first()?.as_f64()?, a.get(1)?.as_f64()?))
        })
        .collect()
}

/// A GeoJSON geometry object.
pub fn geometry_from_json(g: &serde_json::Value) -> Result<Geometry, String> {
    let coords = g.get("coordinates");
    let bad = || "coordinates must be [lon, lat] number pairs".to_string();
    let rings = |c: Option<&serde_json::Value>| -> Result<Vec<Ring>, String> {
        c.and_then(|c| c.as_array())
            .ok_or_else(|| "no coordinates".to_string())?
            .iter()
            .map(|r| ring_from_json(r).ok_or_else(bad))
            .collect()
    };
    match g.get("type").and_then(|t| t.as_str()) {
        Some("Point") => {
            let p = coords.and_then(|c| c.as_array()).ok_or_else(bad)?;
            match (
                p.first().and_then(|x| x.as_f64()),
                p.get(1).and_then(|y| y.as_f64()),
            ) {
                (Some(x), Some(y)) => Ok(Geometry::Point(x, y)),
                _ => Err(bad()),
            }
        }
        Some("Polygon") => rings(coords).map(Geometry::Polygon),
        Some("MultiPolygon") => coords
            .and_then(|c| c.as_array())
            .ok_or_else(|| "no coordinates".to_string())?
            .iter()
            .map(|part| rings(Some(part)))
            .collect::<Result<Vec<_>, _>>()
            .map(Geometry::MultiPolygon),
        Some(t) => Ok(Geometry::Other(t.to_string())),
        None => Err("a geometry without a \"type\"".into()),
    }
}

/// A Shapefile shape. Shapefile rings run clockwise; they are turned counterclockwise (as
/// RFC 7946 and the rest of plotsieve have them).
pub fn geometry_of_shape(shape: Shape) -> Geometry {
    match shape {
        Shape::NullShape => Geometry::Empty,
        Shape::Point(p) => Geometry::Point(p.x, p.y),
        Shape::PointM(p) => Geometry::Point(p.x, p.y),
        Shape::PointZ(p) => Geometry::Point(p.x, p.y),
        Shape::Polygon(p) => {
            let mut parts: Vec<Vec<Ring>> = Vec::new();
            for r in p.rings() {
                let mut pts: Ring = r.points().iter().map(|p| (p.x, p.y)).collect();
                pts.reverse();
                match (r, parts.last_mut()) {
                    (PolygonRing::Inner(_), Some(last)) => last.push(pts),
                    _ => parts.push(vec![pts]),
                }
            }
            match parts.len() {
                0 => Geometry::Empty,
                1 => Geometry::Polygon(parts.remove(0)),
                _ => Geometry::MultiPolygon(parts),
            }
        }
        other => Geometry::Other(other.shapetype().to_string()),
    }
}

/// A dBASE value as text ("" for null).
pub fn field_text(v: &FieldValue) -> String {
    match v {
        FieldValue::Character(Some(s)) | FieldValue::Memo(s) => s.trim().to_string(),
        FieldValue::Numeric(Some(x)) => format!("{x}"),
        FieldValue::Float(Some(x)) => format!("{x}"),
        FieldValue::Integer(n) => n.to_string(),
        FieldValue::Double(x) => format!("{x}"),
        FieldValue::Currency(x) => format!("{x}"),
        FieldValue::Logical(Some(b)) => u8::from(*b).to_string(),
        FieldValue::Date(Some(d)) => format!("{:04}-{:02}-{:02}", d.year(), d.month(), d.day()),
        _ => String::new(),
    }
}

fn read_shapefile(path: &Path, name: &str) -> Result<Layer, IngestError> {
    let unusable = |message: String| IngestError::Unusable {
        file: name.to_string(),
        message,
    };
    let mut reader = super::shapefile_plots::open(path, name)?;
    let mut fields: Vec<String> = Vec::new();
    let mut features = Vec::new();
    for (i, item) in reader.iter_shapes_and_records().enumerate() {
        let (shape, record) = item.map_err(|e| unusable(format!("record {}: {e}", i + 1)))?;
        let record: std::collections::BTreeMap<String, FieldValue> = record.into_iter().collect();
        if fields.is_empty() {
            fields = record.keys().cloned().collect();
        }
        features.push(Feature {
            number: i as u64 + 1,
            values: fields
                .iter()
                .map(|f| record.get(f).map(field_text).unwrap_or_default())
                .collect(),
            geometry: Ok(geometry_of_shape(shape)),
        });
    }
    let crs = match std::fs::read_to_string(path.with_extension("prj")) {
        Err(_) => Ok(None),
        Ok(wkt) => {
            super::shapefile_plots::crs_of_prj(&wkt).map(|c| Some(c).filter(|c| !c.is_empty()))
        }
    };
    Ok(Layer {
        word: "record",
        what: "Shapefile".into(),
        fields,
        features,
        crs,
    })
}

/// Plot polygons from a polygon layer: the plot id from the attribute `id_prop`
/// (`inputs.plot_id_property`), one polygon per feature; any feature that is not one is an
/// error naming it.
pub fn plot_polygons(
    layer: Layer,
    name: &str,
    id_prop: &str,
    key: &str,
) -> Result<Vec<crate::table::PlotPolygon>, IngestError> {
    let unusable = |message: String| IngestError::Unusable {
        file: name.to_string(),
        message,
    };
    let attr = if layer.what == "GeoJSON" {
        "property"
    } else {
        "attribute"
    };
    let at = layer.field(id_prop);
    let word = layer.word;
    let mut out = Vec::new();
    for f in layer.features {
        let n = f.number;
        let id = match at.map(|i| f.values[i].clone()) {
            Some(id) if !id.is_empty() => id,
            _ => {
                return Err(unusable(format!(
                    "{word} {n}: no {attr} {id_prop:?} ({key})"
                )))
            }
        };
        let (exterior, holes) = f
            .geometry
            .and_then(Geometry::polygon)
            .map_err(|e| unusable(format!("{word} {n} (plot {id}): {e}")))?;
        out.push(crate::table::PlotPolygon {
            plot_id: id,
            exterior,
            holes,
        });
    }
    if out.is_empty() {
        return Err(unusable(format!("no plot {word}s")));
    }
    Ok(out)
}

/// Writes a point table (CSV text with `lon_deg` and `lat_deg` and other columns of at most
/// 10 characters) as a point Shapefile at `path` (`.shp`, `.shx`, `.dbf`, and a `.prj` in
/// WGS 84): each record a point with the other columns as attributes (`time_utc` as text,
/// the rest as numbers with 8 decimals). The dBase header's date is set to 2026-01-01 so
/// that the same table gives the same bytes. For `plotsieve simulate --form shapefile`.
pub fn write_point_shapefile(path: &Path, csv_text: &str) -> Result<(), String> {
    use shapefile::dbase::{FieldName, Record, TableWriterBuilder};
    let PointTable {
        mut rdr,
        header,
        lonlat: (ilon, ilat),
        attrs,
    } = point_table(csv_text)?;
    let mut table = TableWriterBuilder::new();
    for &i in &attrs {
        let name = FieldName::try_from(header[i].as_str()).map_err(|_| {
            format!(
                "{}: not a dBase field name (at most 10 characters)",
                header[i]
            )
        })?;
        table = if header[i] == "time_utc" {
            table.add_character_field(name, 24)
        } else {
            table.add_numeric_field(name, 19, 8)
        };
    }
    {
        let mut w = shapefile::Writer::from_path(path, table).map_err(|e| e.to_string())?;
        for (r, rec) in rdr.records().enumerate() {
            let rec = rec.map_err(|e| e.to_string())?;
            let num = |i: usize| -> Result<f64, String> {
                rec.get(i)
                    .and_then(|v| v.parse::<f64>().ok())
                    .ok_or_else(|| format!("record {}: {} is not a number", r + 1, header[i]))
            };
            let point = shapefile::Point::new(num(ilon)?, num(ilat)?);
            let mut record = Record::default();
            for &i in &attrs {
                let v = if header[i] == "time_utc" {
                    FieldValue::Character(Some(rec.get(i).unwrap_or("").to_string()))
                } else {
                    FieldValue::Numeric(Some(num(i)?))
                };
                record.insert(header[i].clone(), v);
            }
            w.write_shape_and_record(&point, &record)
                .map_err(|e| e.to_string())?;
        }
    }
    // A fixed last-update date (bytes 1-3: years since 1900, month, day).
    let dbf = path.with_extension("dbf");
    let mut bytes = std::fs::read(&dbf).map_err(|e| e.to_string())?;
    if bytes.len() > 4 {
        bytes[1..4].copy_from_slice(&[126, 1, 1]);
    }
    std::fs::write(&dbf, bytes).map_err(|e| e.to_string())?;
    std::fs::write(
        path.with_extension("prj"),
        "GEOGCS[\"GCS_WGS_1984\",DATUM[\"D_WGS_1984\",SPHEROID[\"WGS_1984\",6378137.0,298.257223563]],PRIMEM[\"Greenwich\",0.0],UNIT[\"Degree\",0.0174532925199433]]",
    )
    .map_err(|e| e.to_string())
}

#[cfg(test)]
mod registry_tests {
    use super::*;

    #[test]
    fn each_layer_extension_belongs_to_one_format() {
        let mut seen = std::collections::BTreeSet::new();
        for f in LAYERS {
            for e in f.extensions() {
                assert!(seen.insert(*e), "{e} claimed twice");
                let p = Path::new("plots").with_extension(e.to_uppercase());
                assert_eq!(layer_format(&p).map(|g| g.name()), Some(f.name()));
            }
        }
        assert!(layer_format(Path::new("plots.csv")).is_none());
        assert_eq!(
            ShapefileLayer.companions(Path::new("a/p.shp"))[1],
            Path::new("a/p.dbf")
        );
        assert!(GeoJsonLayer.companions(Path::new("a/p.geojson")).is_empty());
        assert!(!GeoJsonLayer.trial_crs_wins() && GeoPackageLayer.trial_crs_wins());
    }
}
