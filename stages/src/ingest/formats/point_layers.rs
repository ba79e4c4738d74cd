//! Point layers of monitor or yield-point data: Shapefiles (`.shp` with `.shx`, `.dbf` and
//! `.prj`, read with the `shapefile` crate) and GeoPackages (`.gpkg`, the one feature layer or
//! `inputs.layer`), both through [`crate::ingest::layers`]. Each point's attributes are read
//! by the trial's `[columns]` names (a Shapefile's dBase names have at most 10 characters)
//! exactly as the mapped-text format reads a delimited table's columns, with the same units,
//! checks and rejections; the position is the point's geometry (`columns.longitude` /
//! `latitude` are not read), in `inputs.crs` or else in the file's own CRS (`.prj`, spatial
//! reference). A rejection's line is the feature's place in the file plus one, as if the
//! records were the lines of a table under a header.

use super::{ExportRead, MonitorFormat};
use crate::ingest::layers::{self, Geometry, LayerFormat};
use crate::ingest::settings::IngestConfig;
use crate::ingest::IngestError;
use std::path::Path;

/// The point Shapefile reader.
pub struct ShapefilePoints;

/// The GeoPackage point-layer reader.
pub struct GeoPackagePoints;

/// Names of the position columns of the table handed to the mapped-text reader.
const X: &str = "__shape_x";
const Y: &str = "__shape_y";

/// The points as a table (header: the attributes, then the geometry's x and y) and the
/// trial settings that read it: positions from the geometry, in the file's CRS when the
/// trial names none.
fn as_table(
    cfg: &IngestConfig,
    path: &Path,
    name: &str,
) -> Result<(Vec<u8>, IngestConfig), IngestError> {
    let unusable = |message: String| IngestError::Unusable {
        file: name.to_string(),
        message,
    };
    let layer = layers::read(path, name, &cfg.inputs.layer)?;
    if layer.features.is_empty() {
        return Err(unusable(format!(
            "no data rows: the {} has no points",
            layer.what
        )));
    }
    let mut w = csv::Writer::from_writer(Vec::new());
    let mut header = layer.fields.clone();
    header.extend([X.to_string(), Y.to_string()]);
    w.write_record(&header)
        .map_err(|e| unusable(e.to_string()))?;
    for f in &layer.features {
        let where_ = || format!("{} {}", layer.word, f.number);
        let (x, y) = match f.geometry.clone() {
            Ok(Geometry::Point(x, y)) => (x, y),
            Ok(Geometry::Empty) => (f64::NAN, f64::NAN),
            Ok(Geometry::Polygon(_) | Geometry::MultiPolygon(_)) => {
                return Err(unusable(format!(
                    "{}: a polygon, expected points",
                    where_()
                )))
            }
            Ok(Geometry::Other(t)) => {
                return Err(unusable(format!("{}: a {t}, expected points", where_())))
            }
            Err(e) => return Err(unusable(format!("{}: {e}", where_()))),
        };
        let mut row = f.values.clone();
        row.extend([format!("{x}"), format!("{y}")]);
        w.write_record(&row).map_err(|e| unusable(e.to_string()))?;
    }
    let bytes = w.into_inner().map_err(|e| unusable(e.to_string()))?;
    let mut c = cfg.clone();
    c.columns.delimiter = ",".into();
    c.columns.decimal = ".".into();
    c.columns.longitude = X.into();
    c.columns.latitude = Y.into();
    c.inputs.crs = layer.crs_with(&cfg.inputs.crs).map_err(unusable)?;
    Ok((bytes, c))
}

/// The behaviour both point-layer formats share.
macro_rules! point_layer_format {
    ($t:ty, $name:literal, $layer:expr, $magic:expr) => {
        impl MonitorFormat for $t {
            fn name(&self) -> &'static str {
                $name
            }

            fn extensions(&self) -> &'static [&'static str] {
                $layer.extensions()
            }

            fn records_bound(&self, path: &Path) -> Result<u64, String> {
                // A point record takes at least 28 bytes (a Shapefile's record header and
                // point; a GeoPackage row is larger).
                let size = std::fs::metadata(path).map_err(|e| e.to_string())?.len();
                Ok(size / 28 + 1)
            }

            fn sniff(&self, path: &Path, head: &[u8]) -> bool {
                layers::layer_format(path).is_some_and(|f| f.name() == $layer.name())
                    || head.starts_with($magic)
            }

            fn describe(&self, cfg: &IngestConfig) -> String {
                let mut c = cfg.clone();
                c.columns.longitude = "(the geometry's x".into();
                c.columns.latitude = "y)".into();
                format!(
                    "point geometry, attributes by [columns]: {}",
                    super::mapping_words::describe(&c)
                )
            }

            fn check(&self, cfg: &IngestConfig, path: &Path, name: &str) -> Result<(), String> {
                as_table(cfg, path, name)
                    .map(|_| ())
                    .map_err(|e| e.to_string())
            }

            fn read(
                &self,
                cfg: &IngestConfig,
                path: &Path,
                name: &str,
                file: u32,
            ) -> Result<ExportRead, IngestError> {
                read(cfg, path, name, file)
            }

            fn positions(
                &self,
                _cfg: &IngestConfig,
                _bytes: &[u8],
            ) -> Result<Option<Vec<(f64, f64)>>, String> {
                // Intake matches delimited exports only.
                Ok(None)
            }
        }
    };
}

// File code 9994, big-endian, opens every .shp.
point_layer_format!(
    ShapefilePoints,
    "shapefile_points",
    layers::ShapefileLayer,
    &[0x00, 0x00, 0x27, 0x0a]
);
// A GeoPackage is an SQLite 3 file.
point_layer_format!(
    GeoPackagePoints,
    "geopackage_points",
    layers::GeoPackageLayer,
    b"SQLite format 3\0"
);

fn read(cfg: &IngestConfig, path: &Path, name: &str, file: u32) -> Result<ExportRead, IngestError> {
    let (bytes, c) = as_table(cfg, path, name)?;
    let mut rdr = csv::ReaderBuilder::new()
        .flexible(true)
        .from_reader(bytes.as_slice());
    let header = rdr
        .headers()
        .map_err(|e| IngestError::Unusable {
            file: name.to_string(),
            message: e.to_string(),
        })?
        .clone();
    super::text_records::read_records(&c, rdr, header, name, file)
}
