//! Typed tables passed between stages: monitor points, rejections and stage summaries.

use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::sync::Arc;

/// One monitor record after ingest: SI units, projected coordinates.
#[derive(Clone, Debug, PartialEq)]
pub struct Point {
    /// Sequence number over all exports of the trial, in ingest order.
    pub id: u64,
    /// Index into [`PointSet::files`].
    pub file: u32,
    /// Line number in the source file (the header is line 1).
    pub row: u64,
    /// Seconds since 1970-01-01 UTC.
    pub time_s: f64,
    pub lon: f64,
    pub lat: f64,
    /// UTM easting and northing, metres.
    pub x_m: f64,
    pub y_m: f64,
    pub flow_kg_s: f64,
    pub speed_m_s: f64,
    pub width_m: f64,
    pub moisture_pct: f64,
    /// Work state (0 = not harvesting); NaN when the export has no such column.
    pub work_state: f64,
    /// GPS HDOP; NaN when absent.
    pub hdop: f64,
    /// GPS fix quality; NaN when absent.
    pub fix_quality: f64,
    /// As-applied rate of a rate trial's input where the record was cut, in base units
    /// (kg, l or seeds) per hectare; NaN when the export has none there.
    pub applied_rate: f64,
    /// Yield at standard moisture, kg/ha, as a yield-point export gives it; NaN for a
    /// monitor export (clean computes it from flow, speed and swath).
    pub yield_kg_ha: f64,
}

/// The monitor points of a trial with the names of their source files.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct PointSet {
    pub files: Vec<String>,
    pub points: Vec<Point>,
    /// EPSG code of the projected coordinates.
    pub epsg: u32,
}

/// A point after cleaning: the ingest record plus what clean derived.
#[derive(Clone, Debug, PartialEq)]
pub struct CleanPoint {
    pub base: Point,
    /// Pass number within its source file.
    pub pass: u32,
    /// Mass flow moved back by the flow delay to the position it belongs to.
    pub flow_shifted_kg_s: f64,
    /// Moisture moved back by the moisture delay.
    pub moisture_shifted_pct: f64,
    /// Wet yield from mass flow, speed and swath width.
    pub yield_wet_kg_ha: f64,
    /// Yield at the crop's standard moisture.
    pub yield_std_kg_ha: f64,
}

/// A row of a stage's rejection table: what was removed, by which rule, with the value found
/// and the limit it broke.
///
/// The texts that repeat from row to row (file, rule, column, limit) are shared
/// (`Arc<str>`): a stage may reject a million records, and each row then costs a few
/// pointers instead of four more strings.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Rejection {
    pub source_file: Arc<str>,
    /// Line number in the source file (header = 1); for plots, the design table's line.
    pub source_row: u64,
    /// Point id (sequence number) or plot id.
    pub id: String,
    pub rule: Arc<str>,
    /// The quantity or input column the rule looked at.
    pub column: Arc<str>,
    pub value: String,
    pub limit: Arc<str>,
}

/// One shared copy of each repeated text (see [`Rejection`]).
#[derive(Default)]
pub struct Texts(std::collections::HashMap<String, Arc<str>>);

impl Texts {
    pub fn get(&mut self, s: &str) -> Arc<str> {
        if let Some(a) = self.0.get(s) {
            return a.clone();
        }
        let a: Arc<str> = Arc::from(s);
        self.0.insert(s.to_string(), a.clone());
        a
    }
}

/// Counts of a stage for its `summary.json` and the manifest.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct StageSummary {
    pub stage: String,
    /// What the counts count: "points" or "plots".
    pub unit: String,
    pub count_in: u64,
    pub kept: u64,
    pub rejected: u64,
    pub by_rule: BTreeMap<String, u64>,
    /// Rejections per source file and rule.
    pub by_file: BTreeMap<String, BTreeMap<String, u64>>,
    /// Further stage-specific facts (settings derived from data, estimates).
    pub details: BTreeMap<String, serde_json::Value>,
    /// A second count (plots stage: plots in / kept / set aside).
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub plots: Option<PlotCounts>,
}

/// Plot counts of the plots stage.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct PlotCounts {
    pub count_in: u64,
    pub kept: u64,
    pub set_aside: u64,
    pub by_rule: BTreeMap<String, u64>,
}

impl StageSummary {
    /// The stage's warnings (`details.warnings`): something that drops out of a result or
    /// looks wrong, said in full with where it came from.
    pub fn warnings(&self) -> Vec<String> {
        self.details
            .get("warnings")
            .and_then(|w| serde_json::from_value(w.clone()).ok())
            .unwrap_or_default()
    }

    /// Set `details.warnings` (always present, empty when all is well).
    pub fn set_warnings(&mut self, warnings: &[String]) {
        self.details
            .insert("warnings".into(), serde_json::json!(warnings));
    }

    /// A summary whose counts are derived from the rejection rows.
    pub fn from_rejections(
        stage: &str,
        unit: &str,
        count_in: u64,
        rejections: &[Rejection],
    ) -> Self {
        let mut s = StageSummary {
            stage: stage.into(),
            unit: unit.into(),
            count_in,
            rejected: rejections.len() as u64,
            kept: count_in - rejections.len() as u64,
            ..Default::default()
        };
        // Counted on the shared texts, then named.
        let mut by: BTreeMap<(&str, &str), u64> = BTreeMap::new();
        for r in rejections {
            *by.entry((&*r.source_file, &*r.rule)).or_default() += 1;
        }
        for ((file, rule), n) in by {
            *s.by_rule.entry(rule.to_string()).or_default() += n;
            *s.by_file
                .entry(file.to_string())
                .or_default()
                .entry(rule.to_string())
                .or_default() += n;
        }
        s
    }
}

/// A plot boundary, projected.
#[derive(Clone, Debug, PartialEq)]
pub struct PlotPolygon {
    pub plot_id: String,
    /// Exterior ring in projected metres (closed).
    pub exterior: Vec<(f64, f64)>,
    /// Interior rings (holes), if any.
    pub holes: Vec<Vec<(f64, f64)>>,
}

/// A row of the design table.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct DesignRow {
    pub plot_id: String,
    pub treatment: String,
    pub block: String,
    pub field: String,
    /// Line in the design file (header = 1).
    pub row: u64,
}

/// Statistics of one plot.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct PlotStats {
    pub plot_id: String,
    pub field: String,
    pub treatment: String,
    pub block: String,
    /// `kept`, or `set_aside` with the rule in `reason`; a kept plot's `reason` may carry a
    /// flag (`outside_record_bounds`: a plot-table yield outside the crop's bounds for single
    /// records, kept because the trial sets no plot bounds).
    pub status: String,
    pub reason: String,
    pub points: u64,
    /// Yields at standard moisture, kg/ha (tables show them in the output unit).
    pub yield_mean: f64,
    pub yield_median: f64,
    pub yield_trimmed_mean: f64,
    pub yield_sd: f64,
    pub moisture_mean_pct: f64,
    pub centroid_x_m: f64,
    pub centroid_y_m: f64,
    pub area_m2: f64,
    pub net_area_m2: f64,
    pub harvested_m2: f64,
    pub coverage: f64,
    /// Grid position: range (along travel) and row (across), from 1, and metres.
    pub grid_range: u32,
    pub grid_row: u32,
    pub along_m: f64,
    pub across_m: f64,
    /// The net plot ring (projected metres), empty when the trims leave nothing.
    pub net_ring: Vec<(f64, f64)>,
    /// The as-applied rate of the plot's records, when the exports log one.
    pub applied: Option<AppliedRate>,
}

/// A plot's as-applied rate from the records it keeps, in base units (kg, l or seeds) per
/// hectare.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct AppliedRate {
    /// Records with a rate (a record with an empty rate cell has none).
    pub points: u64,
    /// Their mean and SD (NaN without such records; SD NaN with one).
    pub mean: f64,
    pub sd: f64,
}

impl PlotStats {
    /// A kept plot known only by its yield and centre (plot-table entry, tests, benchmarks);
    /// every monitor-derived statistic is NaN.
    pub fn from_yield(
        plot_id: &str,
        field: &str,
        treatment: &str,
        block: &str,
        yield_mean: f64,
        x: f64,
        y: f64,
    ) -> Self {
        PlotStats {
            plot_id: plot_id.into(),
            field: field.into(),
            treatment: treatment.into(),
            block: block.into(),
            status: "kept".into(),
            reason: String::new(),
            points: 0,
            yield_mean,
            yield_median: f64::NAN,
            yield_trimmed_mean: f64::NAN,
            yield_sd: f64::NAN,
            moisture_mean_pct: f64::NAN,
            centroid_x_m: x,
            centroid_y_m: y,
            area_m2: f64::NAN,
            net_area_m2: f64::NAN,
            harvested_m2: f64::NAN,
            coverage: f64::NAN,
            grid_range: 0,
            grid_row: 0,
            along_m: f64::NAN,
            across_m: f64::NAN,
            net_ring: Vec::new(),
            applied: None,
        }
    }
}

/// Signed area of a ring (counterclockwise positive), shoelace formula.
pub fn signed_area(ring: &[(f64, f64)]) -> f64 {
    let n = ring.len();
    if n < 3 {
        return 0.0;
    }
    // Relative to the first vertex: projected coordinates are ~1e6 m, and the plain formula
    // would lose most of its digits to cancellation.
    let o = ring[0];
    let mut s = 0.0;
    for i in 1..n - 1 {
        let (a, b) = (ring[i], ring[i + 1]);
        s += (a.0 - o.0) * (b.1 - o.1) - (b.0 - o.0) * (a.1 - o.1);
    }
    0.5 * s
}
