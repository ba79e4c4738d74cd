//! The mapped delimited-text format: one record per line, columns named and scaled by the
//! trial file's `[columns]` (time as ISO 8601 or Unix seconds; WGS84 lon/lat; mass flow,
//! speed and swath width with their units; moisture in %; optional work state, HDOP and fix
//! quality). Every bad record becomes a rejection row naming its line and column:
//! `unreadable_row`, `wrong_field_count`, `unparseable`, `coordinate_range`, `no_position`,
//! `negative_value`.

use super::column_map::{column_index, input_crs, number};
use super::{ExportRead, MonitorFormat};
use crate::ingest::settings::IngestConfig;
use crate::ingest::IngestError;
use std::path::Path;

/// The mapped delimited-text reader.
pub struct MappedText;

/// Read one export: good rows to points, unreadable ones to rejections.
fn read_export(
    cfg: &IngestConfig,
    path: &Path,
    name: &str,
    file_idx: u32,
) -> Result<ExportRead, IngestError> {
    let delim = cfg.columns.delimiter.as_bytes()[0];
    let (rdr, header) = crate::ingest::open_table(path, name, delim)?;
    super::text_records::read_records(cfg, rdr, header, name, file_idx)
}

impl MonitorFormat for MappedText {
    fn name(&self) -> &'static str {
        "mapped_text"
    }

    fn extensions(&self) -> &'static [&'static str] {
        &["csv"]
    }

    fn sniff(&self, _path: &Path, _head: &[u8]) -> bool {
        // The fallback: any file is tried as delimited text with the trial's mapping.
        true
    }

    fn describe(&self, cfg: &IngestConfig) -> String {
        super::mapping_words::describe(cfg)
    }

    fn check(&self, cfg: &IngestConfig, path: &Path, name: &str) -> Result<(), String> {
        let rdr = csv::ReaderBuilder::new()
            .delimiter(cfg.columns.delimiter.as_bytes()[0])
            .flexible(true)
            .from_path(path);
        match rdr {
            Err(e) => Err(format!("{name}: cannot read: {e}")),
            Ok(mut r) => match r.headers() {
                Err(e) => Err(format!("{name}: header is not readable: {e}")),
                Ok(h) => column_index(cfg, &h.clone(), name)
                    .map(|_| ())
                    .map_err(|e| e.to_string()),
            },
        }
    }

    fn read(
        &self,
        cfg: &IngestConfig,
        path: &Path,
        name: &str,
        file: u32,
    ) -> Result<ExportRead, IngestError> {
        read_export(cfg, path, name, file)
    }

    fn positions(
        &self,
        cfg: &IngestConfig,
        bytes: &[u8],
    ) -> Result<Option<Vec<(f64, f64)>>, String> {
        let c = &cfg.columns;
        let mut rdr = csv::ReaderBuilder::new()
            .delimiter(c.delimiter.as_bytes()[0])
            .flexible(true)
            .from_reader(bytes);
        let Ok(h) = rdr.headers().cloned() else {
            return Ok(None);
        };
        let (Some(ilon), Some(ilat)) = (
            h.iter().position(|x| x.trim() == c.longitude),
            h.iter().position(|x| x.trim() == c.latitude),
        ) else {
            return Ok(None);
        };
        let crs = input_crs(cfg)?;
        let mut out = Vec::new();
        let mut last_len = h.len();
        for rec in rdr.records() {
            let Ok(rec) = rec else { continue };
            last_len = rec.len();
            if let (Some(lon), Some(lat)) = (
                rec.get(ilon).and_then(|v| number(v, c.decimal == ",")),
                rec.get(ilat).and_then(|v| number(v, c.decimal == ",")),
            ) {
                match &crs {
                    None => out.push((lon, lat)),
                    Some(k) => {
                        if let Ok(ll) = k.to_wgs84(lon, lat) {
                            out.push(ll);
                        }
                    }
                }
            }
        }
        if last_len != h.len() {
            return Err(format!(
                "partial: the last record has {last_len} fields, the header {}",
                h.len()
            ));
        }
        Ok(Some(out))
    }
}
