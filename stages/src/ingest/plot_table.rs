//! Plot-table entry: plot-level yields (a plot combine weighs each plot) instead of monitor
//! records. A CSV with one row per plot, or a polygon layer (GeoJSON, Shapefile, GeoPackage)
//! with one feature per plot and the same names as attributes:
//!
//! - `plot_id` (or `plot`, or the name in `inputs.plot_id_property`), the treatment
//!   (`treatment`, `variety`, `entry`, `product` or `genotype`), `block` (or `rep`,
//!   `replicate`), optionally `field` (default `1`);
//! - the yield at standard moisture with its unit in the column name: `yield_t_ha`,
//!   `yield_kg_ha`, `yield_q_ha`, `yield_bu_ac` (bushels of the trial's crop) or
//!   `yield_lb_ac`; or any column named by `inputs.yield_property` with `inputs.yield_unit`;
//! - the position: a CSV's `x_m` and `y_m` (projected metres), or `row` and `range` (or
//!   `column`) times `adjust.row_spacing_m` and `adjust.range_spacing_m`; a layer's polygon
//!   centroids, projected to UTM (the layer's CRS from `inputs.crs`, else its own).
//!
//! A row or feature that cannot be used is a rejection naming its line (a layer: its feature
//! or record number) and column (`missing_value`, `unparseable`, `negative_value`,
//! `plot_yield_bounds` for a yield outside the trial's plot bounds `crop.plot_yield_*_kg_ha`
//! when it sets them, `bad_geometry` for a feature that is not one polygon). A yield outside
//! the crop's bounds for single monitor records is kept and listed in
//! [`PlotTable::outside_record_bounds`] (a warning): real plots of a poor strip or a
//! hailed block yield less than any healthy record; a duplicate plot id, a missing column or a table with no row is an error, and
//! [`PlotTable::usable`] makes one with no usable row an error.

use super::layers::{self, Geometry};
use super::IngestError;
use crate::crop::{Crop, LB_AC_IN_KG_HA};
use crate::ingest::settings::IngestConfig;
use crate::table::PlotStats;
use crate::table::Rejection;
use geo::{Centroid, LineString, Polygon};
use std::collections::BTreeMap;
use std::path::Path;

/// A plot table read: its rows, the plots kept and the rows rejected.
pub struct PlotTable {
    pub rows: u64,
    pub plots: Vec<PlotStats>,
    pub rejections: Vec<Rejection>,
    /// How the table was read (format, columns, units and positions), for `check` and the
    /// summary.
    pub read_as: String,
    /// What a row is called in messages: "line" (CSV), "feature" or "record" (layers).
    pub word: &'static str,
    /// Plots kept whose yield lies outside the crop's bounds for single records (the trial
    /// sets no plot bounds): (plot id, yield kg/ha).
    pub outside_record_bounds: Vec<(String, f64)>,
}

impl PlotTable {
    /// The warning for [`PlotTable::outside_record_bounds`], naming up to ten plots.
    pub fn bounds_warning(&self, name: &str, crop: &Crop) -> Option<String> {
        outside_bounds_warning(name, &self.outside_record_bounds, crop)
    }
}

/// A warning naming plots kept although their yield lies outside the crop's bounds for single
/// records (up to ten by id, then how many more).
pub fn outside_bounds_warning(name: &str, plots: &[(String, f64)], crop: &Crop) -> Option<String> {
    if plots.is_empty() {
        return None;
    }
    let shown: Vec<String> = plots
        .iter()
        .take(10)
        .map(|(id, kg)| format!("{id} ({kg:.0} kg/ha)"))
        .collect();
    let more = if plots.len() > 10 {
        format!(" and {} more", plots.len() - 10)
    } else {
        String::new()
    };
    Some(format!(
        "{name}: {} plot(s) yield outside {}-{} kg/ha, the crop's bounds for single monitor records, and are kept: {}{more}; check them, or set crop.plot_yield_min_kg_ha and crop.plot_yield_max_kg_ha to set such plots aside",
        plots.len(),
        crop.yield_min_kg_ha,
        crop.yield_max_kg_ha,
        shown.join(", ")
    ))
}

/// The flag (`reason` of a kept plot) of a plot whose yield lies outside the crop's bounds
/// for single records.
pub const OUTSIDE_RECORD_BOUNDS: &str = "outside_record_bounds";

const PLOT_ID: &[&str] = &["plot_id", "plot"];
const TREATMENT: &[&str] = &["treatment", "variety", "entry", "product", "genotype"];
const BLOCK: &[&str] = &["block", "rep", "replicate"];
const RANGE: &[&str] = &["range", "column", "col"];

/// The trial's settings a plot table is read with.
pub struct Names<'a> {
    pub row_spacing: f64,
    pub range_spacing: f64,
    pub id_property: &'a str,
    pub yield_property: &'a str,
    pub yield_unit: &'a str,
}

impl<'a> Names<'a> {
    pub fn of(cfg: &'a IngestConfig) -> Names<'a> {
        Names {
            row_spacing: cfg.row_spacing_m,
            range_spacing: cfg.range_spacing_m,
            id_property: &cfg.inputs.plot_id_property,
            yield_property: &cfg.inputs.yield_property,
            yield_unit: &cfg.inputs.yield_unit,
        }
    }
}

/// kg/ha in one unit of a yield column, by its suffix.
fn yield_unit(suffix: &str, crop: &Crop) -> Option<f64> {
    match suffix.to_ascii_lowercase().as_str() {
        "kg_ha" => Some(1.0),
        "t_ha" => Some(1000.0),
        // 1 quintal = 100 kg.
        "q_ha" => Some(100.0),
        "bu_ac" => Some(LB_AC_IN_KG_HA * crop.bushel_lb),
        "lb_ac" => Some(LB_AC_IN_KG_HA),
        _ => None,
    }
}

/// Each feature's position, or why it has none.
type Positions = Vec<Result<(f64, f64), String>>;

/// A table as read, before validation.
struct Source {
    header: Vec<String>,
    /// (line or feature number, cells in header order)
    rows: Vec<(u64, Vec<String>)>,
    /// Rows that could not be read at all (counted as rows).
    unreadable: Vec<Rejection>,
    word: &'static str,
    what: String,
    /// A layer's positions, one per row (or why the feature has none), and how they were
    /// found; `None` for a CSV, whose positions are columns.
    given: Option<(Positions, String)>,
}

/// Read and validate the trial's plot table (`inputs.plot_table`, or `adjust.plot_table` for
/// `name`): a polygon layer by its extension, else a CSV.
pub fn read_input(
    cfg: &IngestConfig,
    base: &Path,
    name: &str,
    crop: &Crop,
) -> Result<PlotTable, IngestError> {
    let path = base.join(name);
    let src = if layers::is_layer(&path) {
        layer_source(cfg, &path, name)?
    } else {
        csv_source(&path, name)?
    };
    validate(src, name, crop, &Names::of(cfg))
}

/// Read and validate a CSV plot table; yields come out in kg/ha.
pub fn read(path: &Path, name: &str, crop: &Crop, n: &Names) -> Result<PlotTable, IngestError> {
    validate(csv_source(path, name)?, name, crop, n)
}

fn csv_source(path: &Path, name: &str) -> Result<Source, IngestError> {
    let (mut rdr, header) = super::open_table(path, name, b',')?;
    let mut src = Source {
        header: header.iter().map(|h| h.trim().to_string()).collect(),
        rows: Vec::new(),
        unreadable: Vec::new(),
        word: "line",
        what: "CSV".into(),
        given: None,
    };
    for (k, rec) in rdr.records().enumerate() {
        let guess = k as u64 + 2;
        match rec {
            Ok(r) => {
                let line = r.position().map(|p| p.line()).unwrap_or(guess);
                src.rows
                    .push((line, r.iter().map(|c| c.trim().to_string()).collect()));
            }
            Err(e) => {
                let line = e.position().map(|p| p.line()).unwrap_or(guess);
                src.unreadable
                    .push(super::formats::unreadable_row(name, line, &e));
            }
        }
    }
    Ok(src)
}

/// A polygon layer's attributes as a table, with each feature's centroid in UTM metres.
fn layer_source(cfg: &IngestConfig, path: &Path, name: &str) -> Result<Source, IngestError> {
    let unusable = |message: String| IngestError::Unusable {
        file: name.to_string(),
        message,
    };
    let layer = layers::read(path, name, &cfg.inputs.layer)?;
    let named = layer.crs_with(&cfg.inputs.crs).map_err(unusable)?;
    let crs = match named.as_str() {
        "" => None,
        c => Some(crate::projection::Crs::parse(c).map_err(|e| unusable(format!("crs: {e}")))?)
            .filter(|c| c.code() != 4326),
    };
    // Each feature's polygon in lon/lat, or why it has none.
    let lonlat: Vec<Result<(layers::Ring, Vec<layers::Ring>), String>> = layer
        .features
        .iter()
        .map(|f| {
            let (ext, holes) = f.geometry.clone().and_then(Geometry::polygon)?;
            let to_ll = |r: layers::Ring| -> Result<layers::Ring, String> {
                match &crs {
                    None => Ok(r),
                    Some(c) => r
                        .into_iter()
                        .map(|(x, y)| c.to_wgs84(x, y).map_err(|e| e.to_string()))
                        .collect(),
                }
            };
            Ok((
                to_ll(ext)?,
                holes.into_iter().map(to_ll).collect::<Result<_, _>>()?,
            ))
        })
        .collect();
    let (lons, lats): (Vec<f64>, Vec<f64>) = lonlat.iter().flatten().map(|(ext, _)| ext[0]).unzip();
    // Every feature with a polygon has a position in lon/lat, so a projection exists for it.
    let utm = if lons.is_empty() {
        None
    } else {
        Some(super::choose_projection(cfg, &lons, &lats)?)
    };
    let how = match &utm {
        None => "no polygon".to_string(),
        Some(u) => format!(
            "polygon centroids in UTM (EPSG:{}), from {}",
            u.epsg(),
            if named.is_empty() {
                "WGS84 lon/lat"
            } else {
                named.as_str()
            }
        ),
    };
    let positions: Positions = lonlat
        .into_iter()
        .map(|p| {
            let (ext, holes) = p?;
            let utm = utm.as_ref().expect("a polygon gives a projection");
            let proj = |r: &layers::Ring| -> Result<LineString<f64>, String> {
                r.iter()
                    .map(|&(lon, lat)| utm.forward(lon, lat).map_err(|e| e.to_string()))
                    .collect::<Result<Vec<_>, _>>()
                    .map(LineString::from)
            };
            Polygon::new(
                proj(&ext)?,
                holes.iter().map(proj).collect::<Result<_, _>>()?,
            )
            .centroid()
            .map(|c| (c.x(), c.y()))
            .ok_or_else(|| "a polygon without area".to_string())
        })
        .collect();
    Ok(Source {
        header: layer.fields.clone(),
        rows: layer
            .features
            .into_iter()
            .map(|f| (f.number, f.values))
            .collect(),
        unreadable: Vec::new(),
        word: layer.word,
        what: layer.what,
        given: Some((positions, how)),
    })
}

/// Validate the rows of a table; yields come out in kg/ha.
/// Which columns of a plot table hold what, found from its header.
struct Columns {
    id: usize,
    treatment: usize,
    block: usize,
    field: Option<usize>,
    yield_col: usize,
    /// kg/ha per unit of the yield column.
    per_unit: f64,
    /// The yield column as the read-as line names it.
    yield_words: String,
    /// Positions from two columns: (x, y, x spacing, y spacing, words); None for a layer.
    xy: Option<(usize, usize, f64, f64, String)>,
    /// Where positions come from, in words.
    position_words: String,
}

/// Find the columns of a plot table from its header (or a layer's attributes).
fn columns_of(src: &Source, name: &str, crop: &Crop, n: &Names) -> Result<Columns, IngestError> {
    let unusable = |message: String| IngestError::Unusable {
        file: name.to_string(),
        message,
    };
    let header = &src.header;
    let col = |names: &[&str]| {
        names.iter().find_map(|want| {
            header
                .iter()
                .position(|h| !want.is_empty() && h.eq_ignore_ascii_case(want))
        })
    };
    let kind = if src.given.is_some() {
        "attribute"
    } else {
        "column"
    };
    let found = || header.join(", ");
    let need = |names: &[&str], what: &str| {
        col(names).ok_or_else(|| {
            unusable(format!(
                "no {what} {kind} (one of {}; found: {})",
                names
                    .iter()
                    .filter(|s| !s.is_empty())
                    .cloned()
                    .collect::<Vec<_>>()
                    .join(", "),
                found()
            ))
        })
    };
    let id_names: Vec<&str> = std::iter::once(n.id_property)
        .chain(PLOT_ID.iter().copied())
        .collect();
    let (i_id, i_trt, i_blk) = (
        need(&id_names, "plot id")?,
        need(TREATMENT, "treatment")?,
        need(BLOCK, "block")?,
    );
    let i_field = col(&["field"]);
    let (i_yield, per_unit) = if !n.yield_property.is_empty() {
        let k = yield_unit(n.yield_unit, crop).ok_or_else(|| {
            unusable(format!(
                "inputs.yield_unit {:?} is not t_ha, kg_ha, q_ha, bu_ac or lb_ac (inputs.yield_property names {:?})",
                n.yield_unit, n.yield_property
            ))
        })?;
        let i = col(&[n.yield_property]).ok_or_else(|| {
            unusable(format!(
                "no {kind} {:?} (inputs.yield_property; found: {})",
                n.yield_property,
                found()
            ))
        })?;
        (i, k)
    } else {
        header
            .iter()
            .enumerate()
            .find_map(|(i, h)| {
                let l = h.to_ascii_lowercase();
                l.strip_prefix("yield_")
                    .and_then(|s| yield_unit(s, crop))
                    .map(|k| (i, k))
            })
            .ok_or_else(|| {
                unusable(format!(
                    "no yield {kind}: name it with its unit, yield_t_ha, yield_kg_ha, yield_q_ha, yield_bu_ac or yield_lb_ac, or name it in inputs.yield_property with inputs.yield_unit (found: {})",
                    found()
                ))
            })?
    };
    let names = |i: usize| header.get(i).cloned().unwrap_or_default();
    let ycol = if n.yield_property.is_empty() {
        names(i_yield)
    } else {
        format!("{} ({})", names(i_yield), n.yield_unit)
    };
    // Where positions come from: a layer's centroids, or two columns times their spacings.
    let columns = if src.given.is_some() {
        None
    } else {
        Some(
            match (col(&["x_m"]), col(&["y_m"]), col(&["row"]), col(RANGE)) {
                (Some(x), Some(y), _, _) => (x, y, 1.0, 1.0, "x_m/y_m (metres)".to_string()),
                (_, _, Some(r), Some(g)) => {
                    if !(n.row_spacing > 0.0 && n.range_spacing > 0.0) {
                        return Err(unusable("a table with row and range needs adjust.row_spacing_m and adjust.range_spacing_m above 0".into()));
                    }
                    (
                        r,
                        g,
                        n.row_spacing,
                        n.range_spacing,
                        format!(
                            "row x {} m and range x {} m",
                            n.row_spacing, n.range_spacing
                        ),
                    )
                }
                _ => {
                    return Err(unusable(format!(
                        "needs columns x_m and y_m, or row and range (found: {})",
                        found()
                    )))
                }
            },
        )
    };
    let pos = match (&columns, &src.given) {
        (Some(c), _) => c.4.clone(),
        (None, Some((_, how))) => how.clone(),
        (None, None) => unreachable!("a table has columns or given positions"),
    };
    Ok(Columns {
        id: i_id,
        treatment: i_trt,
        block: i_blk,
        field: i_field,
        yield_col: i_yield,
        per_unit,
        yield_words: ycol,
        xy: columns,
        position_words: pos,
    })
}

fn validate(src: Source, name: &str, crop: &Crop, n: &Names) -> Result<PlotTable, IngestError> {
    let unusable = |message: String| IngestError::Unusable {
        file: name.to_string(),
        message,
    };
    let c = columns_of(&src, name, crop, n)?;
    let (i_id, i_trt, i_blk, i_field, i_yield, per_unit) =
        (c.id, c.treatment, c.block, c.field, c.yield_col, c.per_unit);
    let (ycol, columns, pos) = (&c.yield_words, &c.xy, &c.position_words);
    let header = &src.header;
    let names = |i: usize| header.get(i).cloned().unwrap_or_default();
    let word = src.word;
    let mut out = PlotTable {
        rows: (src.rows.len() + src.unreadable.len()) as u64,
        plots: Vec::new(),
        rejections: src.unreadable,
        read_as: format!(
            "plot table ({}): plot id {}, treatment {}, block {}, field {}, yield {ycol}, position {pos}",
            src.what,
            names(i_id),
            names(i_trt),
            names(i_blk),
            i_field.map(names).unwrap_or_else(|| "(none: all plots in field 1)".into())
        ),
        word,
        outside_record_bounds: Vec::new(),
    };
    let mut seen: BTreeMap<String, u64> = BTreeMap::new();
    let (lo, hi) = (crop.yield_min_kg_ha, crop.yield_max_kg_ha);
    let plot_bounds = crop.plot_bounds();
    for (k, (line, cells)) in src.rows.iter().enumerate() {
        let line = *line;
        let cell = |i: usize| cells.get(i).cloned().unwrap_or_default();
        let rej = |rule: &str, column: &str, value: &str, limit: &str| {
            let mut r = super::formats::reject(name, line, rule, column, value, limit);
            r.id = format!("{word} {line}");
            r
        };
        let id = cell(i_id);
        if let Some(i) = [i_id, i_trt, i_blk]
            .into_iter()
            .chain(i_field)
            .find(|&i| cell(i).is_empty())
        {
            out.rejections
                .push(rej("missing_value", &names(i), "", "a value"));
            continue;
        }
        if let Some(first) = seen.insert(id.clone(), line) {
            return Err(unusable(format!(
                "plot id {id:?} on {word}s {first} and {line}: plot ids must be unique"
            )));
        }
        let num = |i: usize| cell(i).parse::<f64>().ok().filter(|v| v.is_finite());
        let Some(y) = num(i_yield) else {
            out.rejections.push(rej(
                "unparseable",
                &names(i_yield),
                &cell(i_yield),
                "a number",
            ));
            continue;
        };
        let kg = y * per_unit;
        if kg < 0.0 {
            out.rejections.push(rej(
                "negative_value",
                &names(i_yield),
                &cell(i_yield),
                ">= 0",
            ));
            continue;
        }
        match plot_bounds {
            Some((plo, phi)) if !(plo..=phi).contains(&kg) => {
                out.rejections.push(rej(
                    "plot_yield_bounds",
                    &names(i_yield),
                    &cell(i_yield),
                    &format!(
                        "{plo}-{phi} kg/ha (crop.plot_yield_min_kg_ha and plot_yield_max_kg_ha)"
                    ),
                ));
                continue;
            }
            None if !(lo..=hi).contains(&kg) => {
                out.outside_record_bounds.push((id.clone(), kg));
            }
            _ => {}
        }
        let at = match (&columns, &src.given) {
            (Some((i_x, i_y, sx, sy, _)), _) => match (num(*i_x), num(*i_y)) {
                (Some(x), Some(y)) => (x * sx, y * sy),
                (x, _) => {
                    let i = if x.is_none() { *i_x } else { *i_y };
                    out.rejections
                        .push(rej("unparseable", &names(i), &cell(i), "a number"));
                    continue;
                }
            },
            (None, Some((given, _))) => match &given[k] {
                Ok(p) => *p,
                Err(e) => {
                    out.rejections
                        .push(rej("bad_geometry", "geometry", e, "one polygon"));
                    continue;
                }
            },
            (None, None) => unreachable!("a table has columns or given positions"),
        };
        let field = i_field.map(cell).unwrap_or_else(|| "1".into());
        let mut plot =
            PlotStats::from_yield(&id, &field, &cell(i_trt), &cell(i_blk), kg, at.0, at.1);
        if out
            .outside_record_bounds
            .last()
            .is_some_and(|(last, _)| *last == id)
        {
            // Kept, and flagged in the plot tables as well as in the warning.
            plot.reason = OUTSIDE_RECORD_BOUNDS.into();
        }
        out.plots.push(plot);
    }
    out.rejections.sort_by_key(|r| r.source_row);
    if out.rows == 0 {
        return Err(unusable("no plots: the table has a header only".into()));
    }
    Ok(out)
}

impl PlotTable {
    /// The table, or an error when no row of it can be used (naming the first bad row).
    pub fn usable(self, name: &str) -> Result<PlotTable, IngestError> {
        if !self.plots.is_empty() {
            return Ok(self);
        }
        let first = self
            .rejections
            .first()
            .map(|r| {
                format!(
                    "; the first, {} {}, column {}: {} {:?} (expected {})",
                    self.word, r.source_row, r.column, r.rule, r.value, r.limit
                )
            })
            .unwrap_or_default();
        Err(IngestError::Unusable {
            file: name.to_string(),
            message: format!(
                "none of its {} {} could be used{first}",
                self.rows,
                match self.word {
                    "line" => "rows",
                    "record" => "records",
                    _ => "features",
                }
            ),
        })
    }
}

#[cfg(test)]
mod tests;
