//! Simulator: an invented replicated trial harvested by a yield-monitor combine, with known
//! truth.
//!
//! Scenario (invented): the "Brackenmoor trial station" runs a randomised complete block
//! trial of a check and five products on two or more fields. Each field is a grid of plots
//! (two header passes wide, blocks along the direction of travel) rotated to its own
//! bearing. A combine with a 9.144 m (30 ft) header harvests it in serpentine passes at
//! 1 Hz, at 2.0-2.4 m/s, turning on the headlands with the header up.
//!
//! Truth: yield at standard moisture = base + smooth trend + product effect + plot noise +
//! point noise. The trend is a Gaussian-process sample drawn by random Fourier features
//! (Rahimi & Recht 2007) of a squared-exponential kernel, with an SD several times the
//! product effects.
//!
//! Artifacts, each labelled per record in `truth.json`: a flow delay of 8-14 s and a
//! first-order grain-mixing lag (fill ramps at pass starts, `pass_fill`), header-up turns
//! (`turn`), speed dips (`speed_dip`), a partial-width pass (`partial_swath`), GPS jumps
//! (`gps_jump`) and flow-sensor spikes (`spike`); moisture varies between 14 and 24 %.

mod geometry;
mod harvest;
mod trial_file;
use crate::util::Rng;
pub use geometry::iso;
use geometry::{Frame, Trend};
use serde_json::json;
use std::collections::BTreeMap;

/// Header width of the simulated combine, metres (30 ft).
pub const HEADER_M: f64 = 9.144;

/// Size and seed of a simulated trial.
#[derive(Clone, Debug)]
pub struct SimOptions {
    pub seed: u64,
    pub fields: usize,
    /// Blocks (replicates) per field; each block is one range of plots.
    pub blocks: usize,
    /// Plot length along the direction of travel, metres. Plots shorter than 30 m are
    /// research plots: 3 m alleys instead of 6 m, cut at 1.0-1.3 m/s instead of 2.0-2.4 m/s.
    pub plot_length_m: f64,
    /// SD of the spatial trend, kg/ha.
    pub trend_sd_kg_ha: f64,
    /// Scale of all product effects (1 = the defaults below; 0 = no true effects).
    pub effect_scale: f64,
    /// Flow delay (centre of the grain-mixing kernel), seconds;
    /// `None` draws it from 8-14 s.
    pub flow_delay_s: Option<f64>,
    /// Where the first field lies (WGS84 degrees); later fields are 0.02 degrees east.
    pub origin_lon: f64,
    pub origin_lat: f64,
    /// An on-farm strip trial instead of the RCBD: strips one header wide, the check
    /// alternating with `prod-d` across each block (every check strip between two product
    /// strips, closer together than the local outlier rule's radius).
    pub strips: bool,
    /// SD of each record's own yield noise before grain mixing, kg/ha.
    pub point_noise_kg_ha: f64,
    /// How the exports are written (the same harvest in each form).
    pub form: SimForm,
    /// Seconds between logged records (1-5): a record reports the mass flow averaged over
    /// its interval and the distance travelled in it.
    pub interval_s: usize,
    /// Each record carries the treatment of the plot it was cut in (a last `treatment`
    /// column, empty outside plots) and no plot polygons or design table are written: the
    /// plots are built from the labels (`columns.treatment`). Not for the task-data form.
    pub labels: bool,
    /// No plot polygons or design either, but prescription polygons: `prescription.geojson`,
    /// each plot's rectangle with the treatment applied in it as its `product`
    /// (`inputs.prescription`).
    pub prescription: bool,
    /// A nitrogen-rate trial instead of products: treatments N0-N200 (0-200 kg N/ha in
    /// steps of 40) on the true quadratic-plateau curve [`true_rate_gain`], with grain and N
    /// prices in the trial file (see [`RATE_TRUTH`]).
    pub rates: bool,
    /// With `rates`: the spreader's as-applied N rate logged on each record (a last
    /// `applied_n_kg_ha` column, empty outside plots; text forms only). Each
    /// plot's applied rate is its target x [`APPLIED_FACTORS`] x (1 + 3 % noise), the yield
    /// responds to the applied rate, and truth.json gives each plot's.
    pub applied: bool,
}

crate::choice! {
    /// `simulate --form`: the layout of the monitor exports.
    pub enum SimForm {
        /// Comma-delimited, ISO 8601 time, lon/lat, mass flow (lb/s), speed (mph), swath
        /// (ft), moisture, heading, header state, HDOP.
        Text = "text",
        /// Semicolon-delimited with decimal commas, separate date (dd/mm/yyyy) and time
        /// columns, distance travelled per record (in) and the record's interval (s) instead
        /// of speed.
        DistanceText = "distance_text",
        /// A yield-point export as farm software writes it: ISO 8601 time, lon/lat, dry
        /// yield (t/ha at standard moisture, delay-corrected), the standard moisture filled
        /// in, heading and header state; no flow, speed or swath.
        YieldPoints = "yield_points",
        /// The text form's records as a GeoPackage point layer (WGS84 lon/lat geometry,
        /// the other columns as attributes of the same names).
        GeoPackage = "geopackage",
        /// ISO 11783-10 task data: one task per field with a binary time log of the text
        /// form's records (mass flow, moisture, speed, working width, work state, position).
        TaskData = "taskdata",
        /// The text form's records as point Shapefiles (WGS 84 points with a `.prj`; the
        /// columns under dBase names of at most 10 characters).
        Shapefile = "shapefile",
    }
}

impl Default for SimOptions {
    fn default() -> Self {
        SimOptions {
            seed: 1,
            fields: 2,
            blocks: 4,
            plot_length_m: 60.0,
            trend_sd_kg_ha: 1200.0,
            effect_scale: 1.0,
            flow_delay_s: None,
            origin_lon: -97.80,
            origin_lat: 40.60,
            strips: false,
            point_noise_kg_ha: 400.0,
            form: SimForm::Text,
            interval_s: 1,
            labels: false,
            prescription: false,
            rates: false,
            applied: false,
        }
    }
}

/// Treatments and their true effects in kg/ha at standard moisture.
pub const TREATMENTS: &[(&str, f64)] = &[
    ("check", 0.0),
    ("prod-a", 400.0),
    ("prod-b", 200.0),
    ("prod-c", 0.0),
    ("prod-d", 600.0),
    ("prod-e", -200.0),
];

/// A rate trial's treatments, their N rates (kg/ha) and true yield gains over N0 (kg/ha at
/// standard moisture, before `effect_scale`): [`true_rate_gain`] at each rate (a test
/// checks they agree).
pub const RATE_TREATMENTS: &[(&str, f64)] = &[
    ("N0", 0.0),
    ("N40", 832.0),
    ("N80", 1408.0),
    ("N120", 1728.0),
    ("N160", 1800.0),
    ("N200", 1800.0),
];
pub const RATES_KG_HA: [f64; 6] = [0.0, 40.0, 80.0, 120.0, 160.0, 200.0];

/// `--applied`: the spreader's calibration per treatment (as-applied / target): N120 is
/// under-applied by 15 %, the others on target.
pub const APPLIED_FACTORS: [f64; 6] = [1.0, 1.0, 1.0, 0.85, 1.0, 1.0];

/// `--applied`: each plot's as-applied N rate (kg/ha) per block and column, drawn from its
/// own stream so the rest of the trial is drawn as without it.
fn applied_rates(o: &SimOptions, field: usize, layout: &[Vec<usize>]) -> Vec<Vec<f64>> {
    let mut rng = Rng::new(
        o.seed
            .wrapping_mul(1_000_003)
            .wrapping_add(7 + field as u64),
    );
    layout
        .iter()
        .map(|row| {
            row.iter()
                .map(|&t| RATES_KG_HA[t] * APPLIED_FACTORS[t] * (1.0 + 0.03 * rng.normal()))
                .collect()
        })
        .collect()
}

/// The invented truth of a rate trial: a quadratic-plateau response (rise to the plateau,
/// kg/ha; the join, kg N/ha) and the prices (grain per tonne, N per kg).
pub struct RateTruth {
    pub rise_kg_ha: f64,
    pub join_kg_ha: f64,
    pub grain_price_per_t: f64,
    pub n_price_per_kg: f64,
}

pub const RATE_TRUTH: RateTruth = RateTruth {
    rise_kg_ha: 1800.0,
    join_kg_ha: 150.0,
    grain_price_per_t: 180.0,
    n_price_per_kg: 1.1,
};

/// The true yield gain over no nitrogen at `rate` kg N/ha, kg/ha (`scale` x the rise).
pub fn true_rate_gain(rate: f64, scale: f64) -> f64 {
    let t = RATE_TRUTH;
    let v = 1.0 - rate.min(t.join_kg_ha) / t.join_kg_ha;
    scale * t.rise_kg_ha * (1.0 - v * v)
}

/// The true economic optimum N rate (kg/ha) for a rise of `scale` x the truth's: where the
/// curve's slope, 2 rise (1 - r / join) / join, equals the price ratio (kg of grain per kg
/// of N); 0 when even the first kilogram does not pay.
pub fn true_rate_optimum(scale: f64) -> f64 {
    let t = RATE_TRUTH;
    let ratio = t.n_price_per_kg / (t.grain_price_per_t / 1000.0);
    let rise = scale * t.rise_kg_ha;
    if rise <= 0.0 {
        return 0.0;
    }
    (t.join_kg_ha * (1.0 - ratio * t.join_kg_ha / (2.0 * rise))).clamp(0.0, t.join_kg_ha)
}

/// The treatments of a simulated trial with their true effects (kg/ha, before
/// `effect_scale`).
pub fn treatments(o: &SimOptions) -> &'static [(&'static str, f64)] {
    if o.rates {
        RATE_TREATMENTS
    } else {
        TREATMENTS
    }
}

/// A simulated trial, as file contents.
pub struct SimTrial {
    /// (relative path, contents) of every file, including `trial.toml` and `truth.json`. A
    /// `.gpkg` file's contents are the CSV of its points (the text form), to be written as a
    /// GeoPackage point layer by [`crate::ingest::geopackage::write_points`]; the `.taskdata`
    /// files' are too, written together as one task-data set (`monitor/TASKDATA/`, one task
    /// per file) by [`crate::ingest::formats::taskdata::write_set`]; a `.shp` file's too,
    /// written as a point Shapefile by [`crate::ingest::layers::write_point_shapefile`].
    pub files: Vec<(String, String)>,
    pub points: usize,
}

/// Generate a trial.
pub fn generate(o: &SimOptions) -> SimTrial {
    let mut rng = Rng::new(o.seed);
    let drawn = rng.range(8.0, 14.0);
    let delay = o.flow_delay_s.unwrap_or(drawn);
    let moisture_delay = (delay - 3.0).max(4.0);
    // Grain mixing: each reading is a Gaussian-weighted mean of the grain cut around
    // `delay` seconds earlier, SD 2.5 s, cut at 3 SD (about 30 m of travel at 2.2 m/s, as
    // Knight & Pettitt 2003 describe). Being symmetric, it leaves the delay unambiguous.
    let mix_sd: f64 = 2.5;
    let kernel: Vec<(f64, f64)> = {
        let half = (3.0 * mix_sd).ceil() as i64;
        let raw: Vec<(f64, f64)> = (-half..=half)
            .map(|k| (k as f64, (-0.5 * (k as f64 / mix_sd).powi(2)).exp()))
            .collect();
        let total: f64 = raw.iter().map(|x| x.1).sum();
        raw.into_iter().map(|(k, w)| (k, w / total)).collect()
    };
    // Labels: where the shifted flow of a pass start or end is off its level by more than
    // 10 % (the normal distribution's 90 % point, 1.2816 SD).
    let fill_s = 1.2816 * mix_sd;
    let empty_s = fill_s;
    let base = 11_000.0;
    // RCBD plots are two passes wide; strips one.
    let (width_plot, ncol) = if o.strips {
        (HEADER_M, 2 * treatments(o).len())
    } else {
        (2.0 * HEADER_M, treatments(o).len())
    };
    let passes_per_plot = (width_plot / HEADER_M).round() as usize;
    // Research plots (shorter than 30 m) have narrower alleys (from memory).
    let research = o.plot_length_m < 30.0;
    let alley = if research { 3.0 } else { 6.0 };
    let headland = 20.0;
    let length_u =
        2.0 * headland + o.blocks as f64 * o.plot_length_m + (o.blocks - 1) as f64 * alley;
    let site = harvest::Site {
        o,
        kernel,
        delay,
        moisture_delay,
        fill_s,
        empty_s,
        base,
        width_plot,
        ncol,
        passes_per_plot,
        research,
        alley,
        headland,
        length_u,
    };
    let mut files = Vec::new();
    let mut design = String::from("plot_id,treatment,block,field\n");
    let mut features = Vec::new();
    let mut truth_plots = Vec::new();
    let mut artifacts: BTreeMap<String, BTreeMap<&str, Vec<u64>>> = BTreeMap::new();
    let mut total_points = 0;
    let t_start = 1_789_722_000.0; // 2026-09-18T09:00:00Z
    for f in 0..o.fields {
        // A, B, ..., Z, then A2, B2, ...
        let letter = (b'A' + (f % 26) as u8) as char;
        let fname = if f < 26 {
            letter.to_string()
        } else {
            format!("{letter}{}", f / 26 + 1)
        };
        let bearing = rng.range(-30.0f64, 30.0).to_radians();
        let frame = Frame {
            lon0: o.origin_lon + 0.02 * f as f64,
            lat0: o.origin_lat + 0.004 * (f % 3) as f64,
            sin: bearing.sin(),
            cos: bearing.cos(),
        };
        let trend = Trend::new(&mut rng, 70.0, o.trend_sd_kg_ha);
        let moist = Trend::new(&mut rng, 120.0, 2.5);
        let (layout, plot_noise) = harvest::layout(&mut rng, o, ncol);
        let applied = if o.applied {
            applied_rates(o, f, &layout)
        } else {
            Vec::new()
        };
        let field = harvest::Field {
            name: fname,
            frame,
            trend,
            moist,
            layout,
            plot_noise,
            applied,
        };
        harvest::plots(&site, &field, &mut design, &mut features, &mut truth_plots);
        let mut rows = harvest::passes(&mut rng, &site, &field, t_start + 7200.0 * f as f64);
        let sensed = harvest::sensors(&mut rng, &site, &field, &mut rows);
        let (file_name, csv, labels_out, n) = harvest::export(&site, &field, &rows, &sensed);
        total_points += n;
        artifacts.insert(file_name.clone(), labels_out);
        files.push((file_name, csv));
    }
    let geo = json!({"type": "FeatureCollection", "features": features});
    if o.prescription {
        files.push((
            "prescription.geojson".into(),
            serde_json::to_string_pretty(&geo).unwrap() + "\n",
        ));
    } else if !o.labels {
        files.push((
            "plots.geojson".into(),
            serde_json::to_string_pretty(&geo).unwrap() + "\n",
        ));
        files.push(("design.csv".into(), design));
    }
    let effects: BTreeMap<&str, f64> = treatments(o)
        .iter()
        .map(|(t, e)| (*t, e * o.effect_scale / 1000.0))
        .collect();
    let mut truth = json!({
        "scenario": "Brackenmoor trial station (invented)",
        "seed": o.seed,
        "unit": "t_ha",
        "flow_delay_s": delay,
        "flow_delay_note": "centre of the symmetric grain-mixing kernel",
        "moisture_delay_s": moisture_delay,
        "mixing_sd_s": mix_sd,
        "header_width_m": HEADER_M,
        "effects_t_ha": effects,
        "plots": truth_plots,
        "artifacts": artifacts,
    });
    if o.rates {
        truth["response"] = rate_truth_json(o);
    }
    files.push((
        "truth.json".into(),
        serde_json::to_string_pretty(&truth).unwrap() + "\n",
    ));
    files.push(("trial.toml".into(), trial_file::trial_toml(o)));
    SimTrial {
        files,
        points: total_points,
    }
}

/// A rate trial's truth for truth.json: the curve, the prices, the true optimum.
fn rate_truth_json(o: &SimOptions) -> serde_json::Value {
    let t = RATE_TRUTH;
    let mut v = json!({
        "curve": "quadratic_plateau",
        "rates_kg_ha": RATES_KG_HA,
        "rise_t_ha": t.rise_kg_ha * o.effect_scale / 1000.0,
        "join_kg_ha": t.join_kg_ha,
        "grain_price_per_t": t.grain_price_per_t,
        "n_price_per_kg": t.n_price_per_kg,
        "optimum_kg_ha": true_rate_optimum(o.effect_scale),
    });
    if o.applied {
        v["applied_factors"] = json!(APPLIED_FACTORS);
    }
    v
}

struct Rec {
    /// The treatment of the plot the record was cut in.
    label: Option<&'static str>,
    /// That plot's as-applied rate (`--applied`; NaN outside plots or without it).
    applied: f64,
    t: f64,
    pu: f64,
    v: f64,
    speed: f64,
    width: f64,
    qin: f64,
    moisture: f64,
    labels: Vec<&'static str>,
    frame_lonlat: (f64, f64),
    working: bool,
}

#[cfg(test)]
mod tests;
