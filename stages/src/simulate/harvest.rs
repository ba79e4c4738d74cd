//! One simulated field: its plots, the combine's passes over it, the sensors' view of the
//! grain and the export's records. The random draws are taken in the order `generate`
//! always took them, so a seed gives the same trial.

use super::geometry::{iso, Frame, Trend};
use super::{Rec, SimForm, SimOptions, HEADER_M};
use crate::util::Rng;
use serde_json::json;
use std::collections::BTreeMap;
use std::fmt::Write as _;

/// What every field of a simulated trial shares.
pub(super) struct Site<'a> {
    pub o: &'a SimOptions,
    /// The grain-mixing kernel: (offset s, weight).
    pub kernel: Vec<(f64, f64)>,
    pub delay: f64,
    pub moisture_delay: f64,
    /// Seconds labelled as fill at a pass start and empty at its end.
    pub fill_s: f64,
    pub empty_s: f64,
    /// The yield without trend or effects, kg/ha.
    pub base: f64,
    pub width_plot: f64,
    pub ncol: usize,
    pub passes_per_plot: usize,
    /// Research plots (shorter than 30 m): narrower alleys, a slower pace.
    pub research: bool,
    pub alley: f64,
    pub headland: f64,
    /// The field's length along travel, m.
    pub length_u: f64,
}

/// One field: its frame, trends and plot layout.
pub(super) struct Field {
    pub name: String,
    pub frame: Frame,
    pub trend: Trend,
    pub moist: Trend,
    /// Per block (range), the treatment index of each column.
    pub layout: Vec<Vec<usize>>,
    /// Per block and column, the plot's own yield noise, kg/ha.
    pub plot_noise: Vec<Vec<f64>>,
    /// Per block and column, the as-applied N rate (`--applied`; empty without it).
    pub applied: Vec<Vec<f64>>,
}

impl Field {
    /// The true effect of the treatment in plot (b, c), kg/ha before `effect_scale` is
    /// applied to a product's: with `--applied`, the response at the plot's applied rate.
    fn effect(&self, o: &SimOptions, b: usize, c: usize) -> f64 {
        let t = self.layout[b][c];
        match self.applied.get(b) {
            Some(row) => super::true_rate_gain(row[c], o.effect_scale),
            None => super::treatments(o)[t].1 * o.effect_scale,
        }
    }
}

impl Field {
    /// The plot (block, column) at a position along and across travel, if any.
    fn plot_at(&self, site: &Site, u: f64, v: f64) -> Option<(usize, usize)> {
        let (o, ncol, width_plot, headland, alley) = (
            site.o,
            site.ncol,
            site.width_plot,
            site.headland,
            site.alley,
        );
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
    }
}

/// The sensors' view of one field's records, per second.
pub(super) struct Sensed {
    /// The grain flow after mixing (before the transport delay).
    mixed: Vec<f64>,
    flows: Vec<f64>,
    moisture: Vec<f64>,
    hdop: Vec<f64>,
}

/// RCBD: each block a range, treatments shuffled across its columns (strips: the check
/// alternating with `prod-d`); each plot's own noise.
pub(super) fn layout(
    rng: &mut Rng,
    o: &SimOptions,
    ncol: usize,
) -> (Vec<Vec<usize>>, Vec<Vec<f64>>) {
    let mut layout = vec![vec![0usize; ncol]; o.blocks];
    let mut plot_noise = vec![vec![0.0; ncol]; o.blocks];
    let prod_d = super::treatments(o)
        .iter()
        .position(|t| t.0 == "prod-d")
        .unwrap_or(1);
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
    (layout, plot_noise)
}

/// The field's plots: design rows, polygons (or prescription polygons) and truth.
pub(super) fn plots(
    site: &Site,
    field: &Field,
    design: &mut String,
    features: &mut Vec<serde_json::Value>,
    truth_plots: &mut Vec<serde_json::Value>,
) {
    let (o, ncol, width_plot, headland, alley, base) = (
        site.o,
        site.ncol,
        site.width_plot,
        site.headland,
        site.alley,
        site.base,
    );
    let (fname, frame, trend, layout, plot_noise) = (
        &field.name,
        &field.frame,
        &field.trend,
        &field.layout,
        &field.plot_noise,
    );
    for b in 0..o.blocks {
        for c in 0..ncol {
            let id = format!("{fname}-{}{:02}", b + 1, c + 1);
            let t = super::treatments(o)[layout[b][c]].0;
            let eff = field.effect(o, b, c);
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
            let mut truth = json!({
                "plot_id": id, "field": fname, "treatment": t, "block": (b + 1).to_string(),
                "trend_t_ha": tr / 1000.0,
                "true_yield_t_ha": (base + tr + eff + plot_noise[b][c]) / 1000.0,
            });
            if let Some(row) = field.applied.get(b) {
                truth["applied_kg_ha"] = json!(row[c]);
            }
            truth_plots.push(truth);
        }
    }
}

/// The harvest: serpentine passes, one header width apart, from time `t0`, with speed
/// dips, a partial swath and header-up turns; each second a record of the grain cut.
pub(super) fn passes(rng: &mut Rng, site: &Site, field: &Field, t0: f64) -> Vec<Rec> {
    let (o, ncol, passes_per_plot, research, length_u, base) = (
        site.o,
        site.ncol,
        site.passes_per_plot,
        site.research,
        site.length_u,
        site.base,
    );
    let (fill_s, empty_s) = (site.fill_s, site.empty_s);
    let (frame, trend, moist, layout, plot_noise) = (
        &field.frame,
        &field.trend,
        &field.moist,
        &field.layout,
        &field.plot_noise,
    );
    let npass = passes_per_plot * ncol;
    let partial_pass = rng.below(npass);
    let mut rows: Vec<Rec> = Vec::new();
    let mut t = t0;
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
                + field
                    .plot_at(site, pu, v)
                    .map(|(b, c)| field.effect(o, b, c) + plot_noise[b][c])
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
            let cell = field.plot_at(site, pu, v);
            let label = cell.map(|(b, c)| super::treatments(site.o)[layout[b][c]].0);
            let applied = cell
                .and_then(|(b, c)| field.applied.get(b).map(|row| row[c]))
                .unwrap_or(f64::NAN);
            rows.push(Rec {
                label,
                applied,
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
                    applied: f64::NAN,
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
    rows
}

/// Sensors: mixing then transport delay for flow; delay for moisture; noise, spikes and GPS
/// jumps (labelled on the records they land on).
pub(super) fn sensors(rng: &mut Rng, site: &Site, field: &Field, rows: &mut [Rec]) -> Sensed {
    let (kernel, delay, moisture_delay) = (&site.kernel, site.delay, site.moisture_delay);
    let frame = &field.frame;
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
    let mut flows_out = Vec::with_capacity(n);
    let mut moist_out = Vec::with_capacity(n);
    let mut hdop_out = Vec::with_capacity(n);
    for i in 0..n {
        let mut flow = lag(&mixed, i, delay) * (1.0 + 0.02 * rng.normal());
        let mut moisture = lag(&moist_series, i, moisture_delay).max(14.0) + 0.15 * rng.normal();
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
    Sensed {
        mixed,
        flows: flows_out,
        moisture: moist_out,
        hdop: hdop_out,
    }
}

/// The export of one field as text (the simulator's forms): its name, its text, the lines
/// of each artifact label and the number of records logged.
pub(super) fn export(
    site: &Site,
    field: &Field,
    rows: &[Rec],
    sensed: &Sensed,
) -> (String, String, BTreeMap<&'static str, Vec<u64>>, usize) {
    let o = site.o;
    let (fname, frame) = (&field.name, &field.frame);
    let (mixed, flows_out, moist_out, hdop_out) =
        (&sensed.mixed, &sensed.flows, &sensed.moisture, &sensed.hdop);
    let n = rows.len();
    let mut csv = header(o);
    // The spreader's log varies a little along a plot (1 % per record), from its own stream.
    let mut spread = crate::util::Rng::new(
        o.seed.wrapping_mul(999_983).wrapping_add(
            fname
                .bytes()
                .fold(0u64, |h, b| h.wrapping_mul(31).wrapping_add(b as u64)),
        ),
    );
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
            last_cell(&mut csv, o.form, rows[i].label.unwrap_or(""));
        }
        if o.applied {
            let a = rows[i].applied;
            let text = if a.is_finite() {
                let logged = format!("{:.2}", (a * (1.0 + 0.01 * spread.normal())).max(0.0));
                match o.form {
                    SimForm::DistanceText => logged.replace('.', ","),
                    _ => logged,
                }
            } else {
                String::new()
            };
            last_cell(&mut csv, o.form, &text);
        }
    }
    (file_name, csv, labels_out, logged.len())
}

/// Append a last cell to the line just written (its delimiter first).
fn last_cell(csv: &mut String, form: SimForm, text: &str) {
    csv.pop();
    csv.push(if form == SimForm::DistanceText {
        ';'
    } else {
        ','
    });
    csv.push_str(text);
    csv.push('\n');
}

/// The header line of an export in the simulator's form `o.form`.
fn header(o: &SimOptions) -> String {
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
    if o.applied {
        csv.pop();
        csv.push_str(match o.form {
            SimForm::DistanceText => ";Applied_N_kg_ha\n",
            SimForm::Shapefile => ",applied_n\n",
            _ => ",applied_n_kg_ha\n",
        });
    }
    csv
}
