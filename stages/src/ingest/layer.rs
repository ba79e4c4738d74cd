//! The one shape every vector layer is read to (attribute values as text in the layer's
//! field order, one geometry per feature, the CRS the file names), and the simulator's point
//! tables that the layer writers take. The readers (`layers`, `geopackage`) build these
//! types; nothing here reads a file, so each reader imports this and not the other readers.

/// A ring of positions, in the layer's coordinates.
pub type Ring = Vec<(f64, f64)>;

/// One feature's geometry, as stored.
#[derive(Clone, Debug, PartialEq)]
pub enum Geometry {
    Empty,
    Point(f64, f64),
    /// The exterior ring, then the holes.
    Polygon(Vec<Ring>),
    MultiPolygon(Vec<Vec<Ring>>),
    /// Any other type, by name.
    Other(String),
}

impl Geometry {
    /// The one polygon a plot must be: (exterior, holes), or why it is not one.
    pub fn polygon(self) -> Result<(Ring, Vec<Ring>), String> {
        let mut rings = match self {
            Geometry::Polygon(r) => r,
            Geometry::MultiPolygon(mut parts) if parts.len() == 1 => parts.remove(0),
            Geometry::MultiPolygon(parts) => {
                return Err(format!(
                    "a MultiPolygon with {} parts; a plot must be one polygon",
                    parts.len()
                ))
            }
            Geometry::Empty => return Err("no geometry".into()),
            Geometry::Point(..) => return Err("geometry type Point, expected Polygon".into()),
            Geometry::Other(t) => return Err(format!("geometry type {t}, expected Polygon")),
        };
        if rings.is_empty() {
            return Err("empty polygon".into());
        }
        if rings.iter().any(|r| r.len() < 4) {
            return Err("a ring needs at least 4 positions".into());
        }
        let exterior = rings.remove(0);
        Ok((exterior, rings))
    }
}

/// One feature: its number in the file (as the format counts), attribute values in the
/// layer's field order ("" for null), and its geometry or why it could not be read.
pub struct Feature {
    pub number: u64,
    pub values: Vec<String>,
    pub geometry: Result<Geometry, String>,
}

/// A layer read.
pub struct Layer {
    /// What a feature is called in messages ("feature", "record").
    pub word: &'static str,
    /// The format and layer, for `check` and the summary.
    pub what: String,
    pub fields: Vec<String>,
    pub features: Vec<Feature>,
    /// The CRS the file names (`None`: WGS84 lon/lat or not named), or why the file's own
    /// CRS could not be identified (then the trial must give `inputs.crs`).
    pub crs: Result<Option<String>, String>,
}

impl Layer {
    /// The field's position, by name, case-insensitive.
    pub fn field(&self, name: &str) -> Option<usize> {
        self.fields
            .iter()
            .position(|f| f.eq_ignore_ascii_case(name))
    }

    /// The CRS to read the coordinates in: the trial's `inputs.crs` wins over the file's own.
    pub fn crs_with(&self, trial_crs: &str) -> Result<String, String> {
        if !trial_crs.is_empty() {
            return Ok(trial_crs.to_string());
        }
        self.crs.clone().map(|c| c.unwrap_or_default())
    }
}

/// A simulator's point table (CSV text): its reader after the header, the header, the
/// positions of `lon_deg` and `lat_deg`, and the other columns.
pub(crate) struct PointTable<'a> {
    pub(crate) rdr: csv::Reader<&'a [u8]>,
    pub(crate) header: Vec<String>,
    pub(crate) lonlat: (usize, usize),
    pub(crate) attrs: Vec<usize>,
}

pub(crate) fn point_table(csv_text: &str) -> Result<PointTable<'_>, String> {
    let mut rdr = csv::Reader::from_reader(csv_text.as_bytes());
    let header: Vec<String> = rdr
        .headers()
        .map_err(|e| e.to_string())?
        .iter()
        .map(String::from)
        .collect();
    let at = |n: &str| header.iter().position(|h| h == n);
    let (ilon, ilat) = at("lon_deg")
        .zip(at("lat_deg"))
        .ok_or("a point table needs lon_deg and lat_deg")?;
    let attrs: Vec<usize> = (0..header.len())
        .filter(|&i| i != ilon && i != ilat)
        .collect();
    Ok(PointTable {
        rdr,
        header,
        lonlat: (ilon, ilat),
        attrs,
    })
}
