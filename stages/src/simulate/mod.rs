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
mod trial_file;
use crate::util::Rng;
pub use geometry::iso;
use geometry::{Frame, Trend};
use serde_json::json;
use std::collections::BTreeMap;
use std::fmt::Write as _;

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
        (HEADER_M, 2 * TREATMENTS.len())
    } else {
        (2.0 * HEADER_M, TREATMENTS.len())
    };
    let passes_per_plot = (width_plot / HEADER_M).round() as usize;
    // Research plots (shorter than 30 m) have narrower alleys (from memory).
    let research = o.plot_length_m < 30.0;
    let alley = if research { 3.0 } else { 6.0 };
    let headland = 20.0;
    let length_u =
        2.0 * headland + o.blocks as f64 * o.plot_length_m + (o.blocks - 1) as f64 * alley;
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
        // RCBD: each block a range, treatments shuffled across its columns.
        let mut layout = vec![vec![0usize; ncol]; o.blocks];
        let mut plot_noise = vec![vec![0.0; ncol]; o.blocks];
        let prod_d = TREATMENTS.iter().position(|t| t.0 == "prod-d").unwrap_or(1);
        for (b, row) in layout.iter_mut().enumerate() {
            if o.strips {
                *row = (0..ncol)
                    .map(|c| if c % 2 == 0 { 0 } else { prod_d })
                    .collect();
            } else {
                let mut perm: Vec<usize> = (0..ncol).collect();
                rng.shuffle(&mut perm);
                *row = perm;
            }
            for c in 0..ncol {
                plot_noise[b][c] = 250.0 * rng.normal();
            }
        }
        let plot_at = |u: f64, v: f64| -> Option<(usize, usize)> {
            if v < 0.0 || v >= ncol as f64 * width_plot {
                return None;
            }
            let c = (v / width_plot) as usize;
            let uu = u - headland;
            if uu < 0.0 {
                return None;
            }
            let b = (uu / (o.plot_length_m + alley)) as usize;
            if b >= o.blocks || uu - b as f64 * (o.plot_length_m + alley) > o.plot_length_m {
                return None;
            }
            Some((b, c))
        };
        for b in 0..o.blocks {
            for c in 0..ncol {
                let id = format!("{fname}-{}{:02}", b + 1, c + 1);
                let (t, eff) = TREATMENTS[layout[b][c]];
                let _ = writeln!(design, "{id},{t},{},{fname}", b + 1);
                let u0 = headland + b as f64 * (o.plot_length_m + alley);
                let (u1, v0, v1) = (
                    u0 + o.plot_length_m,
                    c as f64 * width_plot,
                    (c + 1) as f64 * width_plot,
                );
                let mut ring: Vec<(f64, f64)> = [(u0, v0), (u1, v0), (u1, v1), (u0, v1), (u0, v0)]
                    .iter()
                    .map(|&(u, v)| frame.lonlat(u, v))
                    .collect();
                // RFC 7946: exterior rings counterclockwise.
                let area2: f64 = ring
                    .windows(2)
                    .map(|w| w[0].0 * w[1].1 - w[1].0 * w[0].1)
                    .sum();
                if area2 < 0.0 {
                    ring.reverse();
                }
                let coords: Vec<serde_json::Value> = ring
                    .iter()
                    .map(|&(x, y)| json!([(x * 1e8).round() / 1e8, (y * 1e8).round() / 1e8]))
                    .collect();
                let properties = if o.prescription {
                    json!({"product": t})
                } else {
                    json!({"plot_id": id, "field": fname})
                };
                features.push(json!({
                    "type": "Feature",
                    "properties": properties,
                    "geometry": {"type": "Polygon", "coordinates": [coords]}
                }));
                let (cu, cv) = (0.5 * (u0 + u1), 0.5 * (v0 + v1));
                let (ce, cn) = frame.en(cu, cv);
                let tr = trend.at(ce, cn);
                truth_plots.push(json!({
                    "plot_id": id, "field": fname, "treatment": t, "block": (b + 1).to_string(),
                    "trend_t_ha": tr / 1000.0,
                    "true_yield_t_ha": (base + tr + eff * o.effect_scale + plot_noise[b][c]) / 1000.0,
                }));
            }
        }
        // The harvest: serpentine passes, one header width apart.
        let npass = passes_per_plot * ncol;
        let partial_pass = rng.below(npass);
        let mut rows: Vec<Rec> = Vec::new();
        let mut t = t_start + 7200.0 * f as f64;
        for k in 0..npass {
            let v = (k as f64 + 0.5) * HEADER_M;
            let forward = k % 2 == 0;
            // Research plots (shorter than 30 m) are cut at a slower pace (from memory).
            let speed0 = if research {
                rng.range(1.0, 1.3)
            } else {
                rng.range(2.0, 2.4)
            };
            let width = if k == partial_pass {
                HEADER_M * rng.range(0.5, 0.75)
            } else {
                HEADER_M
            };
            let mut u = 0.0;
            let mut pass_t = 0.0;
            let mut dip_left = 0.0f64;
            let mut dip_speed = 0.0;
            let mut after_dip = 0.0f64;
            while u <= length_u {
                if dip_left <= 0.0 && rng.uniform() < 0.006 && pass_t > 15.0 {
                    dip_left = rng.range(4.0, 8.0);
                    dip_speed = rng.range(0.5, 0.9);
                }
                let speed = if dip_left > 0.0 {
                    dip_speed
                } else {
                    speed0 + 0.05 * rng.normal()
                };
                let pu = if forward { u } else { length_u - u };
                let (e, n) = frame.en(pu, v);
                let std = base
                    + trend.at(e, n)
                    + plot_at(pu, v)
                        .map(|(b, c)| {
                            TREATMENTS[layout[b][c]].1 * o.effect_scale + plot_noise[b][c]
                        })
                        .unwrap_or(0.0)
                    + o.point_noise_kg_ha * rng.normal();
                let m = (18.0 + moist.at(e, n) + 0.2 * rng.normal()).clamp(14.0, 24.0);
                let mut labels = Vec::new();
                if pass_t < fill_s {
                    labels.push("pass_fill");
                }
                if dip_left > 0.0 || after_dip > 0.0 {
                    labels.push("speed_dip");
                    if dip_left > 0.0
                        && !rows
                            .last()
                            .is_some_and(|r: &Rec| r.labels.contains(&"speed_dip"))
                    {
                        // Mixing spreads the dip's low flow onto the records just before it.
                        let from = rows.len().saturating_sub(2);
                        for r in rows[from..].iter_mut().filter(|r| r.working) {
                            r.labels.push("speed_dip");
                        }
                    }
                }
                if k == partial_pass {
                    labels.push("partial_swath");
                }
                let label = plot_at(pu, v).map(|(b, c)| TREATMENTS[layout[b][c]].0);
                rows.push(Rec {
                    label,
                    t,
                    pu,
                    v,
                    speed,
                    width,
                    qin: std * (100.0 - 15.5) / (100.0 - m) * speed * width / 10_000.0,
                    moisture: m,
                    labels,
                    frame_lonlat: (0.0, 0.0),
                    working: true,
                });
                if dip_left > 0.0 {
                    dip_left -= 1.0;
                    if dip_left <= 0.0 {
                        after_dip = 3.0;
                    }
                } else if after_dip > 0.0 {
                    after_dip -= 1.0;
                }
                u += speed;
                t += 1.0;
                pass_t += 1.0;
            }
            let pass_end_t = t - 1.0;
            for r in rows
                .iter_mut()
                .rev()
                .take_while(|r| r.working && pass_end_t - r.t < empty_s)
            {
                r.labels.push("pass_empty");
            }
            // Header-up turn: a half circle beyond the end of the pass at 1.5 m/s.
            if k + 1 < npass {
                let r = 0.5 * HEADER_M;
                let steps = (std::f64::consts::PI * r / 1.5).ceil() as usize;
                let end_u = if forward { length_u } else { 0.0 };
                for s in 1..=steps {
                    let a = std::f64::consts::PI * s as f64 / steps as f64;
                    let du = r * a.sin();
                    let pu = if forward { end_u + du } else { end_u - du };
                    let pv = v + r * (1.0 - a.cos());
                    rows.push(Rec {
                        label: None,
                        t,
                        pu,
                        v: pv,
                        speed: 1.5,
                        width,
                        qin: 0.0,
                        moisture: 18.0,
                        labels: vec!["turn"],
                        frame_lonlat: (0.0, 0.0),
                        working: false,
                    });
                    t += 1.0;
                }
            }
        }
        // Sensors: mixing then transport delay for flow; delay for moisture.
        let n = rows.len();
        let mixed: Vec<f64> = (0..n)
            .map(|i| {
                kernel
                    .iter()
                    .map(|&(k, w)| {
                        let j = i as i64 + k as i64;
                        if j < 0 || j >= n as i64 {
                            0.0
                        } else {
                            w * rows[j as usize].qin
                        }
                    })
                    .sum()
            })
            .collect();
        let lag = |series: &[f64], i: usize, d: f64| -> f64 {
            let x = i as f64 - d;
            if x <= 0.0 {
                return 0.0;
            }
            let j = x.floor() as usize;
            let w = x - j as f64;
            series[j] * (1.0 - w) + series[(j + 1).min(n - 1)] * w
        };
        let moist_series: Vec<f64> = rows.iter().map(|r| r.moisture).collect();
        let mut csv = String::from(match o.form {
            SimForm::Text | SimForm::GeoPackage | SimForm::TaskData => "time_utc,lon_deg,lat_deg,mass_flow_lb_s,speed_mph,swath_ft,moisture_pct,heading_deg,header_state,hdop\n",
            SimForm::DistanceText => "Date;Time;Longitude;Latitude;Flow_lb_s;Distance_in;Interval_s;Swath_ft;Moisture_pct;Heading_deg;Header;HDOP\n",
            SimForm::YieldPoints => "time_utc,lon_deg,lat_deg,dry_yield_t_ha,moisture_pct,heading_deg,header_state\n",
            SimForm::Shapefile => "time_utc,lon_deg,lat_deg,flow_lb_s,speed_mph,swath_ft,moist_pct,heading,header,hdop\n",
        });
        if o.labels {
            csv.pop();
            csv.push_str(match o.form {
                SimForm::DistanceText => ";Treatment\n",
                _ => ",treatment\n",
            });
        }
        let file_name = format!(
            "monitor/field-{fname}.{}",
            match o.form {
                SimForm::GeoPackage => "gpkg",
                SimForm::TaskData => "taskdata",
                SimForm::Shapefile => "shp",
                _ => "csv",
            }
        );
        let mut labels_out: BTreeMap<&str, Vec<u64>> = BTreeMap::new();
        let mut flows_out = Vec::with_capacity(n);
        let mut moist_out = Vec::with_capacity(n);
        let mut hdop_out = Vec::with_capacity(n);
        for i in 0..n {
            let mut flow = lag(&mixed, i, delay) * (1.0 + 0.02 * rng.normal());
            let mut moisture =
                lag(&moist_series, i, moisture_delay).max(14.0) + 0.15 * rng.normal();
            if i as f64 <= moisture_delay {
                moisture = 18.0;
            }
            if rng.uniform() < 0.004 {
                flow *= if rng.uniform() < 0.5 {
                    rng.range(3.0, 5.0)
                } else {
                    0.1
                };
                // After the shift back by the delay the spike lands mostly on the position
                // logged `delay` earlier (the nearer of the two records it is interpolated to).
                let src = (i as f64 - delay).round();
                if src >= 0.0 && !rows[src as usize].labels.contains(&"spike") {
                    rows[src as usize].labels.push("spike");
                }
            }
            flows_out.push(flow);
            let r = &mut rows[i];
            let (mut pu, mut pv) = (r.pu, r.v);
            if rng.uniform() < 0.003 {
                let a = rng.range(0.0, 2.0 * std::f64::consts::PI);
                let d = rng.range(25.0, 60.0);
                pu += d * a.cos();
                pv += d * a.sin();
                r.labels.push("gps_jump");
            }
            r.frame_lonlat = frame.lonlat(pu, pv);
            moist_out.push(moisture);
            hdop_out.push(rng.range(0.6, 1.4));
        }
        // Logged records: every `interval_s`-th second; each reports the flow averaged over
        // its interval and the distance travelled in it.
        let every = o.interval_s.max(1);
        let logged: Vec<usize> = (0..n).filter(|i| i % every == 0).collect();
        for (k, &i) in logged.iter().enumerate() {
            let line = k as u64 + 2;
            let from = (i + 1).saturating_sub(every);
            for j in from..=i {
                for l in &rows[j].labels {
                    let v = labels_out.entry(l).or_default();
                    if every == 1 || v.last() != Some(&line) {
                        v.push(line);
                    }
                }
            }
            let heading = if i + 1 < n {
                let (e0, n0) = frame.en(rows[i].pu, rows[i].v);
                let (e1, n1) = frame.en(rows[i + 1].pu, rows[i + 1].v);
                (e1 - e0).atan2(n1 - n0).to_degrees().rem_euclid(360.0)
            } else {
                0.0
            };
            let r = &rows[i];
            let span = (i + 1 - from) as f64;
            let flow = flows_out[from..=i].iter().map(|f| f.max(0.0)).sum::<f64>() / span;
            let distance: f64 = rows[from..=i].iter().map(|r| r.speed).sum();
            match o.form {
                SimForm::Text | SimForm::GeoPackage | SimForm::TaskData | SimForm::Shapefile => {
                    let _ = writeln!(
                        csv,
                        "{},{:.8},{:.8},{:.4},{:.3},{:.2},{:.2},{:.1},{},{:.2}",
                        iso(r.t),
                        r.frame_lonlat.0,
                        r.frame_lonlat.1,
                        flow / 0.45359237,
                        r.speed / 0.44704,
                        r.width / 0.3048,
                        moist_out[i].clamp(5.0, 40.0),
                        heading,
                        u8::from(r.working),
                        hdop_out[i]
                    );
                }
                SimForm::YieldPoints => {
                    // The software's yield: the grain that reached the sensor for this
                    // position (mixing, no transport delay), at standard moisture.
                    let dry: f64 = (from..=i)
                        .map(|j| {
                            let q = &rows[j];
                            mixed[j] * 10_000.0 / (q.speed * q.width) * (100.0 - q.moisture)
                                / (100.0 - 15.5)
                        })
                        .sum::<f64>()
                        / span;
                    let _ = writeln!(
                        csv,
                        "{},{:.8},{:.8},{:.4},15.50,{:.1},{}",
                        iso(r.t),
                        r.frame_lonlat.0,
                        r.frame_lonlat.1,
                        dry.max(0.0) / 1000.0,
                        heading,
                        u8::from(r.working),
                    );
                }
                SimForm::DistanceText => {
                    let stamp = iso(r.t);
                    let date = format!("{}/{}/{}", &stamp[8..10], &stamp[5..7], &stamp[0..4]);
                    let line = format!(
                        "{date};{};{:.8};{:.8};{:.4};{:.1};{};{:.2};{:.2};{:.1};{};{:.2}",
                        &stamp[11..19],
                        r.frame_lonlat.0,
                        r.frame_lonlat.1,
                        flow / 0.45359237,
                        distance / 0.0254,
                        span as usize,
                        r.width / 0.3048,
                        moist_out[i].clamp(5.0, 40.0),
                        heading,
                        u8::from(r.working),
                        hdop_out[i]
                    );
                    // Decimal commas (the delimiter is a semicolon).
                    let _ = writeln!(csv, "{}", line.replace('.', ","));
                }
            }
            if o.labels {
                csv.pop();
                csv.push(if o.form == SimForm::DistanceText {
                    ';'
                } else {
                    ','
                });
                csv.push_str(rows[i].label.unwrap_or(""));
                csv.push('\n');
            }
        }
        let n = logged.len();
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
    let effects: BTreeMap<&str, f64> = TREATMENTS
        .iter()
        .map(|(t, e)| (*t, e * o.effect_scale / 1000.0))
        .collect();
    let truth = json!({
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

struct Rec {
    /// The treatment of the plot the record was cut in.
    label: Option<&'static str>,
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
