//! The report as one self-contained HTML file: inline CSS and SVG, no scripts, no
//! external resources, so it opens in any browser without a network.
//!
//! Colour scales: sequential values use viridis (van der Walt & Smith, matplotlib 2015),
//! signed values (spatial trend) use ColorBrewer's PuOr (Brewer, colorbrewer2.org), and rule
//! categories the Okabe & Ito (2008) palette; all three are readable with the common forms
//! of colour blindness. Every map has a legend and axes in metres.

use super::mean_interval;
pub(crate) use super::svg::{esc, forest, forest_labelled, nice_step, table};
pub use super::{HtmlInput, MapPoint};
use crate::adjust::TreatmentRow;
use crate::util::fmt;
use std::fmt::Write as _;

/// The decision table and forest plot: the first section after the caution and warnings.
fn decision(s: &mut String, r: &HtmlInput) {
    let rows = super::decision_rows(r.treatments);
    let _ = write!(
        s,
        "<section class=\"decision\"><h2>{}</h2>",
        esc(&super::decision_heading(r.check))
    );
    if rows.is_empty() {
        let _ = write!(
            s,
            "<p>No product could be compared with the check.</p></section>"
        );
        return;
    }
    let _ = write!(s, "<p class=\"note\">{}</p>", esc(super::DECISION_WORDS));
    let (head, cells) = super::decision_cells(
        &rows,
        r.decimals,
        r.unit_label,
        super::area_of(r.money),
        Vec::new(),
        super::fields_summary(r.treatments, r.decimals),
    );
    table(s, &head, &cells, 1);
    if let Some(p) = super::prices_line(r.money) {
        let _ = write!(s, "<p class=\"note\">{}</p>", esc(&p));
    }
    forest_labelled(
        s,
        &rows,
        r.unit_label,
        "Each product pooled over the fields: uplift over the check with its 95 % interval; the line is zero (each field's own estimates are in the per-field section below)",
        |t| t.treatment.clone(),
    );
    let _ = write!(s, "</section>");
}

/// Render the report.
pub fn render(r: &HtmlInput) -> String {
    let mut s = String::new();
    let _ = write!(s, "<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'unsafe-inline'; img-src data:\"><title>plotsieve report: {}</title><style>{CSS}</style></head><body>", esc(r.trial_name));
    let _ = write!(
        s,
        "<header><h1>{}</h1><p class=\"sub\">plotsieve report: the decision first, then its quality control</p></header>",
        esc(r.trial_name)
    );
    let _ = write!(
        s,
        "<aside class=\"caution\"><strong>Caution.</strong> {}</aside>",
        esc(super::CAUTION)
    );
    if !r.warnings.is_empty() {
        let _ = write!(
            s,
            "<section class=\"warnings\"><h2>{}</h2><ul>",
            super::heading::WARNINGS
        );
        for w in r.warnings {
            let _ = write!(s, "<li><strong>{}</strong></li>", esc(w));
        }
        let _ = write!(s, "</ul></section>");
    }
    if let Some(rt) = r.rates {
        super::rates::html(&mut s, rt, r.unit_label, super::prices_line(r.money));
    }
    decision(&mut s, r);
    quality(&mut s, r);
    super::maps::fields(&mut s, r);
    treatments(&mut s, r);
    model(&mut s, r);
    let _ = write!(
        s,
        "<footer><p>{}</p></footer></body></html>\n",
        esc(super::CAUTION)
    );
    s
}

/// Counts per stage, removals by rule and source file, points per export and field, how each
/// export was read, the delays applied and the settings.
fn quality(s: &mut String, r: &HtmlInput) {
    let _ = write!(s, "<section><h2>{}</h2><table><thead><tr><th>stage</th><th>counted</th><th>in</th><th>kept</th><th>rejected</th></tr></thead><tbody>", super::heading::COUNTS);
    for x in r.summaries {
        let _ = write!(s, "<tr><td>{}</td><td>{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td></tr>", x.stage, x.unit, x.count_in, x.kept, x.rejected);
        if let Some(p) = &x.plots {
            let _ = write!(s, "<tr><td>{}</td><td>plots</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td></tr>", x.stage, p.count_in, p.kept, p.set_aside);
        }
    }
    let _ = write!(s, "</tbody></table>");
    // By rule and by source file.
    let _ = write!(s, "<h3>{}</h3><table><thead><tr><th>stage</th><th>source file</th><th>rule</th><th>removed</th></tr></thead><tbody>", super::heading::REMOVED);
    for x in r.summaries {
        for (file, rules) in &x.by_file {
            for (rule, n) in rules {
                let _ = write!(
                    s,
                    "<tr><td>{}</td><td>{}</td><td>{}</td><td class=\"n\">{}</td></tr>",
                    x.stage,
                    esc(file),
                    esc(rule),
                    n
                );
            }
        }
    }
    let _ = write!(s, "</tbody></table>");
    if let Some(pl) = r.summaries.iter().find(|x| x.stage == "plots") {
        if let Some(serde_json::Value::Object(m)) = pl.details.get("points_per_export_and_field") {
            let _ = write!(s, "<h3>Points kept in plots, by source file and field</h3><table><thead><tr><th>source file</th><th>field</th><th>points</th></tr></thead><tbody>");
            for (file, fields) in m {
                if let serde_json::Value::Object(f) = fields {
                    for (field, n) in f {
                        let _ = write!(
                            s,
                            "<tr><td>{}</td><td>{}</td><td class=\"n\">{}</td></tr>",
                            esc(file),
                            esc(field),
                            n
                        );
                    }
                }
            }
            let _ = write!(s, "</tbody></table>");
        }
    }
    let read_as = super::exports_read_as(r.summaries);
    if !read_as.is_empty() {
        let _ = write!(s, "<h3>{}</h3><table><thead><tr><th>export</th><th>format and mapping</th></tr></thead><tbody>", super::heading::READ_AS);
        for (e, how) in &read_as {
            let _ = write!(s, "<tr><td>{}</td><td>{}</td></tr>", esc(e), esc(how));
        }
        let _ = write!(s, "</tbody></table>");
    }
    let delays = super::delays_applied(r.summaries);
    if !delays.is_empty() {
        let _ = write!(s, "<h3>{}</h3><table><thead><tr><th>export</th><th>flow delay (s)</th><th>how</th><th>moisture delay (s)</th><th>how</th></tr></thead><tbody>", super::heading::DELAYS);
        for d in &delays {
            let _ = write!(s, "<tr><td>{}</td><td class=\"n\">{}</td><td>{}</td><td class=\"n\">{}</td><td>{}</td></tr>", esc(&d.export), esc(&d.flow_s), esc(&d.flow_source), esc(&d.moisture_s), esc(&d.moisture_source));
        }
        let _ = write!(s, "</tbody></table>");
        let notes: Vec<String> = delays
            .iter()
            .flat_map(|d| {
                d.notes
                    .iter()
                    .map(move |n| format!("<li>{}: {}</li>", esc(&d.export), esc(n)))
            })
            .collect();
        if !notes.is_empty() {
            let _ = write!(s, "<ul class=\"note\">{}</ul>", notes.concat());
        }
    }
    let _ = write!(
        s,
        "<h3>{}</h3><p class=\"note\">Every setting each stage ran with (config/defaults.toml says what each means and where its default comes from); the delays above are the ones applied.</p>",
        super::heading::SETTINGS
    );
    for (stage, rows) in super::settings_by_stage(r.settings) {
        let cells: Vec<Vec<String>> = rows.into_iter().map(|(k, v)| vec![k, v]).collect();
        let _ = write!(s, "<details><summary>{}</summary>", esc(stage));
        table(s, &["setting".to_string(), "value".to_string()], &cells, 2);
        let _ = write!(s, "</details>");
    }
    let _ = write!(s, "</section>");
}

/// The treatment table per field, the forest of every field and the new-field predictions.
fn treatments(s: &mut String, r: &HtmlInput) {
    let (d, u) = (r.decimals, r.unit_label);
    let _ = write!(
        s,
        "<section><h2>{}</h2>",
        esc(&super::per_field_heading(r.check))
    );
    // Economics columns only when a price was given (otherwise they would all be blank).
    let economics = r.treatments.iter().any(|t| t.break_even.is_finite());
    let _ = write!(s, "<table><thead><tr><th>field</th><th>treatment</th><th>plots</th><th>estimate ({u})</th><th>uplift ({u})</th><th>95 % interval</th><th>prior (mean &plusmn; SD)</th><th>P(uplift &gt; 0)</th>");
    if economics {
        let _ = write!(
            s,
            "<th>break-even ({u})</th><th>P(uplift &gt; break-even)</th><th>expected net return per {}</th>",
            super::area_of(r.money)
        );
    }
    let _ = write!(s, "</tr></thead><tbody>");
    for t in r.treatments {
        let up = if t.uplift.is_nan() {
            "(check)".to_string()
        } else {
            fmt(t.uplift, d)
        };
        let ci = if t.uplift.is_nan() {
            String::new()
        } else {
            format!("{} to {}", fmt(t.uplift_lo95, d), fmt(t.uplift_hi95, d))
        };
        let p0 = if t.uplift.is_nan() {
            String::new()
        } else {
            super::prob3(t.p_uplift_gt0)
        };
        let pbe = if t.p_uplift_gt_break_even.is_nan() {
            String::new()
        } else {
            super::prob3(t.p_uplift_gt_break_even)
        };
        let prior = if t.prior_sd.is_nan() {
            String::new()
        } else {
            format!("{} &plusmn; {}", fmt(t.prior_mean, d), fmt(t.prior_sd, d))
        };
        let _ = write!(s, "<tr><td>{}</td><td>{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td>{}</td><td>{}</td><td class=\"n\">{}</td>", esc(&t.field), esc(&t.treatment), t.plots, fmt(t.estimate, d), up, ci, prior, p0);
        if economics {
            let _ = write!(
                s,
                "<td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td>",
                fmt(t.break_even, d),
                pbe,
                fmt(
                    t.expected_net_return_per_ha * super::area_of(r.money).ha(),
                    0
                )
            );
        }
        let _ = write!(s, "</tr>");
    }
    let _ = write!(s, "</tbody></table>");
    // The forest of every field, product by product: the pooled row (blue) leads each
    // product's fields (grey).
    let pooled = super::decision_rows(r.treatments);
    if r.treatments
        .iter()
        .any(|t| t.field != "all" && t.uplift.is_finite())
    {
        let mut grouped: Vec<&TreatmentRow> = Vec::new();
        for p in &pooled {
            grouped.push(p);
            grouped.extend(r.treatments.iter().filter(|t| {
                t.field != "all" && t.treatment == p.treatment && t.uplift.is_finite()
            }));
        }
        if pooled.is_empty() {
            grouped.extend(r.treatments.iter().filter(|t| t.uplift.is_finite()));
        }
        forest_labelled(
            s,
            &grouped,
            u,
            "Each product pooled over the fields (blue, first) and in each field (grey): uplift over the check with its 95 % interval",
            |t| {
                if t.field == "all" {
                    format!("{}: pooled", t.treatment)
                } else {
                    format!("{} / field {}", t.treatment, t.field)
                }
            },
        );
    }
    let nf = super::new_field_rows(r.treatments);
    if !nf.is_empty() {
        let economics = nf.iter().any(|t| t.p_new_field_gt_break_even.is_finite());
        let _ = write!(s, "<h3>{}</h3><p class=\"note\">{}</p><table><thead><tr><th>treatment</th><th>average field: uplift ({u})</th><th>95 % interval</th><th>new field: uplift ({u})</th><th>90 % interval</th><th>95 % interval</th><th>P(uplift &gt; 0)</th>{}</tr></thead><tbody>", super::heading::NEW_FIELD, esc(super::NEW_FIELD_WORDS), if economics { "<th>P(uplift &gt; break-even)</th>" } else { "" });
        for t in nf {
            let _ = write!(s, "<tr><td>{}</td><td class=\"n\">{}</td><td>{} to {}</td><td class=\"n\">{}</td><td>{} to {}</td><td>{} to {}</td><td class=\"n\">{}</td>", esc(&t.treatment), fmt(t.uplift, d), fmt(t.uplift_lo95, d), fmt(t.uplift_hi95, d), fmt(t.new_field_uplift, d), fmt(t.new_field_lo90, d), fmt(t.new_field_hi90, d), fmt(t.new_field_lo95, d), fmt(t.new_field_hi95, d), super::prob3(t.p_new_field_gt0));
            if economics {
                let _ = write!(
                    s,
                    "<td class=\"n\">{}</td>",
                    super::prob3(t.p_new_field_gt_break_even)
                );
            }
            let _ = write!(s, "</tr>");
        }
        let _ = write!(s, "</tbody></table>");
    }
    let _ = write!(s, "</section>");
}

/// The spatial model per field, random design factors and the comparison without the
/// spatial field.
fn model(s: &mut String, r: &HtmlInput) {
    let (d, u) = (r.decimals, r.unit_label);
    let _ = write!(s, "<section><h2>{}</h2><p class=\"note\">Posterior means with 95 % intervals. Row <code>all</code> of a joint fit holds the shared range and the SD of the treatment &times; field interaction.</p><table><thead><tr><th>field</th><th>plots</th><th>range (m)</th><th>spatial SD ({u})</th><th>noise SD ({u})</th><th>spatial share</th><th>interaction SD ({u})</th><th>method</th><th>note</th></tr></thead><tbody>", super::heading::SPATIAL);
    let ci = mean_interval;
    for h in r.hyper {
        let range = if h.range_across.mean.is_nan() {
            ci(h.range_m, h.range_lo95_m, h.range_hi95_m, 0)
        } else {
            format!(
                "along {}; across {}",
                ci(h.range_m, h.range_lo95_m, h.range_hi95_m, 0),
                ci(
                    h.range_across.mean,
                    h.range_across.lo95,
                    h.range_across.hi95,
                    0
                )
            )
        };
        let (a, b, c, e) = (
            h.spatial_sd_ci,
            h.noise_sd_ci,
            h.spatial_share_ci,
            h.interaction_sd,
        );
        let _ = write!(s, "<tr><td>{}</td><td class=\"n\">{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>", esc(&h.field), h.plots, range, ci(a.mean, a.lo95, a.hi95, d + 1), ci(b.mean, b.lo95, b.hi95, d + 1), ci(c.mean, c.lo95, c.hi95, 2), ci(e.mean, e.lo95, e.hi95, d + 1), esc(&super::method_words(&h.method)), esc(&h.warning));
    }
    let _ = write!(s, "</tbody></table>");
    let factors = super::random_factors(r.hyper);
    if !factors.is_empty() {
        let _ = write!(s, "<h3>Random design factors</h3><p class=\"note\">Fitted beside the spatial field (<code>adjust.random_effects</code>); posterior means with 95 % intervals.</p><table><thead><tr><th>field</th><th>factor</th><th>SD ({u})</th></tr></thead><tbody>");
        for (field, name, x) in &factors {
            let _ = write!(
                s,
                "<tr><td>{}</td><td>{name}</td><td>{}</td></tr>",
                esc(field),
                ci(x.mean, x.lo95, x.hi95, d + 1)
            );
        }
        let _ = write!(s, "</tbody></table>");
    }
    let _ = write!(s, "<h3>Spatial model against the same model without the spatial field</h3><table><thead><tr><th>field</th><th>log marginal likelihood, spatial</th><th>without</th><th>efficiency (contrast variance ratio)</th><th>residual Moran's I without</th><th>with</th><th>rank correlation of the products</th><th>top quarter shared</th></tr></thead><tbody>");
    for c in r.comparisons {
        let _ = write!(s, "<tr><td>{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td></tr>", esc(&c.field), fmt(c.log_ml_spatial, 2), fmt(c.log_ml_without_spatial, 2), fmt(c.efficiency, 2), fmt(c.moran_without_spatial, 3), fmt(c.moran_spatial, 3), fmt(c.rank_correlation, 2), fmt(c.top_overlap, 2));
    }
    let _ = write!(s, "</tbody></table></section>");
}

pub(crate) const CSS: &str = "body{font:14px/1.45 system-ui,sans-serif;margin:0 auto;max-width:1500px;padding:0 24px 40px;color:#1d2528;background:#fbfaf6}\
header{border-bottom:3px solid #2f5d50;margin-bottom:12px}h1{font-size:24px;margin:18px 0 2px;color:#2f5d50}.sub{margin:0 0 10px;color:#5b6b66}\
h2{font-size:18px;color:#2f5d50;border-bottom:1px solid #d9d4c7;padding-bottom:3px;margin-top:28px}h3{font-size:15px;margin:18px 0 6px}\
.caution{background:#fff4d6;border-left:5px solid #b58a00;padding:8px 12px;margin:10px 0}\
table{border-collapse:collapse;margin:6px 0;font-size:13px}th,td{border:1px solid #d9d4c7;padding:3px 8px;text-align:left}th{background:#eef0ea}td.n{text-align:right;font-variant-numeric:tabular-nums}\
.maps{display:flex;flex-wrap:wrap;gap:14px}figure{margin:4px 0;background:#fff;border:1px solid #e2ddd0;padding:6px}figcaption{font-weight:600;font-size:13px;margin-bottom:4px}\
svg text{font:11px system-ui,sans-serif;fill:#1d2528}.al{font-size:11px;fill:#3d4a46}.frame{fill:#f3f1ea;stroke:#b9b3a3}.tick{stroke:#6b756f}\
.outline{fill:none;stroke:#1d2528;stroke-width:.6;stroke-opacity:.55}.plot{stroke:#1d2528;stroke-width:.5}.missing{fill:#cfcac0;stroke:#8c877c;stroke-dasharray:2 2}\
.zero{stroke:#1d2528;stroke-dasharray:4 3}pre{background:#f3f1ea;padding:6px;font-size:12px}.note{color:#5b6b66;font-size:12px}footer{margin-top:30px;color:#5b6b66;font-size:12px}";

#[cfg(test)]
mod tests {
    use super::super::svg::{scale, PUOR, VIRIDIS};
    use super::*;

    #[test]
    fn scale_ends_and_middle() {
        assert_eq!(scale(&VIRIDIS, 0.0), "#440154");
        assert_eq!(scale(&VIRIDIS, 1.0), "#fde725");
        assert_eq!(scale(&PUOR, 0.5), "#f7f7f7");
        assert_eq!(nice_step(23.0), 50.0);
        assert_eq!(nice_step(7.0), 10.0);
    }
}
