//! Point Shapefiles of monitor or yield-point data (`.shp` with `.shx`, `.dbf` and `.prj`),
//! read with the `shapefile` crate. Each point record's attributes are read by the trial's
//! `[columns]` names (dBase names, at most 10 characters) exactly as the mapped-text format
//! reads a delimited table's columns, with the same units, checks and rejections; the
//! position is the point's geometry (`columns.longitude` / `latitude` are not read), in
//! `inputs.crs` or else in the CRS of the `.prj`. A rejection's line is the record number
//! plus one, as if the records were the lines of a table under a header.

use super::{mapped_text, ExportRead, MonitorFormat};
use crate::config::TrialConfig;
use crate::ingest::IngestError;
use shapefile::dbase::FieldValue;
use shapefile::Shape;
use std::path::Path;

/// The point Shapefile reader.
pub struct ShapefilePoints;

/// Names of the position columns of the table handed to the mapped-text reader.
const X: &str = "__shape_x";
const Y: &str = "__shape_y";

fn cell(v: &FieldValue) -> String {
    match v {
        FieldValue::Character(Some(s)) | FieldValue::Memo(s) => s.trim().to_string(),
        FieldValue::Numeric(Some(x)) | FieldValue::Double(x) | FieldValue::Currency(x) => {
            format!("{x}")
        }
        FieldValue::Float(Some(x)) => format!("{x}"),
        FieldValue::Integer(i) => i.to_string(),
        FieldValue::Logical(Some(b)) => u8::from(*b).to_string(),
        FieldValue::Date(Some(d)) => {
            format!("{:04}-{:02}-{:02}", d.year(), d.month(), d.day())
        }
        _ => String::new(),
    }
}

/// The records as a table (header: the dBase fields, then the geometry's x and y) and the
/// trial settings that read it: positions from the geometry, in the `.prj`'s CRS when the
/// trial names none.
fn as_table(
    cfg: &TrialConfig,
    path: &Path,
    name: &str,
) -> Result<(Vec<u8>, TrialConfig), IngestError> {
    let unusable = |message: String| IngestError::Unusable {
        file: name.to_string(),
        message,
    };
    let mut reader = crate::ingest::shapefile_plots::open(path, name)?;
    let mut w = csv::Writer::from_writer(Vec::new());
    let mut fields: Option<Vec<String>> = None;
    for (i, item) in reader.iter_shapes_and_records().enumerate() {
        let (shape, record) = item.map_err(|e| unusable(format!("record {}: {e}", i + 1)))?;
        let (x, y) = match shape {
            Shape::Point(p) => (p.x, p.y),
            Shape::PointM(p) => (p.x, p.y),
            Shape::PointZ(p) => (p.x, p.y),
            Shape::NullShape => (f64::NAN, f64::NAN),
            other => {
                return Err(unusable(format!(
                    "record {}: a {} shape, expected points",
                    i + 1,
                    other.shapetype()
                )))
            }
        };
        let names = fields.get_or_insert_with(|| {
            let mut n: Vec<String> = record.clone().into_iter().map(|(k, _)| k).collect();
            n.sort();
            n
        });
        if i == 0 {
            let mut header = names.clone();
            header.extend([X.to_string(), Y.to_string()]);
            w.write_record(&header)
                .map_err(|e| unusable(e.to_string()))?;
        }
        let mut row: Vec<String> = names
            .iter()
            .map(|k| record.get(k).map(cell).unwrap_or_default())
            .collect();
        row.extend([format!("{x}"), format!("{y}")]);
        w.write_record(&row).map_err(|e| unusable(e.to_string()))?;
    }
    let bytes = w.into_inner().map_err(|e| unusable(e.to_string()))?;
    if fields.is_none() {
        return Err(unusable(
            "no data rows: the Shapefile has no records".into(),
        ));
    }
    let mut c = cfg.clone();
    c.columns.delimiter = ",".into();
    c.columns.decimal = ".".into();
    c.columns.longitude = X.into();
    c.columns.latitude = Y.into();
    if c.inputs.crs.is_empty() {
        if let Ok(wkt) = std::fs::read_to_string(path.with_extension("prj")) {
            c.inputs.crs = crate::ingest::shapefile_plots::crs_of_prj(&wkt).map_err(unusable)?;
        }
    }
    Ok((bytes, c))
}

impl MonitorFormat for ShapefilePoints {
    fn name(&self) -> &'static str {
        "shapefile_points"
    }

    fn extensions(&self) -> &'static [&'static str] {
        &["shp"]
    }

    fn sniff(&self, path: &Path, head: &[u8]) -> bool {
        // File code 9994, big-endian, opens every .shp.
        path.extension()
            .is_some_and(|e| e.eq_ignore_ascii_case("shp"))
            || head.starts_with(&[0x00, 0x00, 0x27, 0x0a])
    }

    fn describe(&self, cfg: &TrialConfig) -> String {
        let mut c = cfg.clone();
        c.columns.longitude = "(the geometry's x".into();
        c.columns.latitude = "y)".into();
        format!(
            "point geometry, attributes by [columns]: {}",
            super::mapping_words::describe(&c)
        )
    }

    fn check(&self, cfg: &TrialConfig, path: &Path, name: &str) -> Result<(), String> {
        as_table(cfg, path, name)
            .map(|_| ())
            .map_err(|e| e.to_string())
    }

    fn read(
        &self,
        cfg: &TrialConfig,
        path: &Path,
        name: &str,
        file: u32,
    ) -> Result<ExportRead, IngestError> {
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
        mapped_text::read_records(&c, rdr, header, name, file)
    }

    fn positions(
        &self,
        _cfg: &TrialConfig,
        _bytes: &[u8],
    ) -> Result<Option<Vec<(f64, f64)>>, String> {
        // A Shapefile is several files; intake matches delimited exports only.
        Ok(None)
    }
}
