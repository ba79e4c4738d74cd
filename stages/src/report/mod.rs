//! Report: a Markdown summary of a run: counts per stage and rule, the fitted spatial
//! hyperparameters and the treatment table, with the cautions that go with them.

use crate::adjust::settings::Money;
use crate::adjust::{AdjustedPlot, Comparison, FieldHyper, TreatmentRow};
use crate::crop::AreaUnit;
use crate::table::{PlotPolygon, PlotStats, StageSummary};
use crate::util::fmt;
use std::fmt::Write as _;

/// `[report]` settings.
#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ReportSettings {
    pub decimals: i64,
}

impl ReportSettings {
    /// Range problems, each naming its key.
    pub fn problems(&self, p: &mut Vec<String>) {
        if !(0..=6).contains(&self.decimals) {
            p.push(format!(
                "report.decimals must be between 0 and 6 (got {})",
                self.decimals
            ));
        }
    }
}

/// What the report is made from.
pub struct ReportInput<'a> {
    pub trial_name: &'a str,
    pub unit_label: &'a str,
    pub check: &'a str,
    pub decimals: usize,
    pub summaries: &'a [StageSummary],
    pub treatments: &'a [TreatmentRow],
    pub hyper: &'a [FieldHyper],
    pub warnings: &'a [String],
    /// The prices as the trial gave them (None: no economics).
    pub money: Option<&'a Money>,
    /// A rate trial's curves (None: products).
    pub rates: Option<&'a rates::RateReport>,
}

/// A point for the maps: position, yield and the rule that removed it (empty if kept).
#[derive(Clone, Debug)]
pub struct MapPoint {
    pub x: f64,
    pub y: f64,
    pub yield_unit: f64,
    /// The rule that removed the record (shared text), empty when kept.
    pub rule: std::sync::Arc<str>,
}

/// Everything the HTML report shows.
pub struct HtmlInput<'a> {
    pub trial_name: &'a str,
    pub unit_label: &'a str,
    pub check: &'a str,
    pub decimals: usize,
    pub summaries: &'a [StageSummary],
    /// Settings each stage ran with (stage name, JSON).
    pub settings: &'a [(String, serde_json::Value)],
    pub points: &'a [MapPoint],
    pub polygons: &'a [PlotPolygon],
    pub plots: &'a [PlotStats],
    pub adjusted: &'a [AdjustedPlot],
    pub treatments: &'a [TreatmentRow],
    pub hyper: &'a [FieldHyper],
    pub comparisons: &'a [Comparison],
    pub warnings: &'a [String],
    /// The prices as the trial gave them (None: no economics).
    pub money: Option<&'a crate::adjust::settings::Money>,
    /// A rate trial's curves (None: products).
    pub rates: Option<&'a rates::RateReport>,
}

/// The area net returns are shown per: the trial's cost unit (hectares without prices).
pub(crate) fn area_of(money: Option<&Money>) -> AreaUnit {
    money.map_or(AreaUnit::Hectare, |m| m.product_cost_unit)
}

/// The prices line under a decision table, or None without a grain price.
pub(crate) fn prices_line(money: Option<&Money>) -> Option<String> {
    money
        .filter(|m| m.grain_price > 0.0)
        .map(|m| format!("Prices: {}.", m.words()))
}

/// The cautions printed with every report.
pub const CAUTION: &str = "Results are statistical estimates under the model's assumptions \
(a Gaussian-process spatial trend, independent plot noise, effects constant within a field, \
hyperparameters given penalised-complexity priors). They are not proof of product performance. \
Product claims must follow local regulations and licensed agronomic advice.";

/// The reports' section headings, one list for the Markdown and the HTML form.
pub(crate) mod heading {
    pub const WARNINGS: &str = "Warnings";
    pub const COUNTS: &str = "Points and plots through the stages";
    pub const REMOVED: &str = "Removed, by rule";
    pub const READ_AS: &str = "How each export was read";
    pub const DELAYS: &str = "Delays applied per export";
    pub const SETTINGS: &str = "Settings each stage ran with";
    pub const SPATIAL: &str = "Spatial model per field";
    pub const NEW_FIELD: &str = "In a field that was not in the trial";
}

/// "the check", with its name in brackets when it is not simply `check`.
pub(crate) fn the_check(check: &str) -> String {
    if check == "check" {
        "the check".into()
    } else {
        format!("the check ({check})")
    }
}

/// The decision section's heading.
pub(crate) fn decision_heading(check: &str) -> String {
    format!("Decision: products against {}", the_check(check))
}

/// The per-field section's heading.
pub(crate) fn per_field_heading(check: &str) -> String {
    format!("Products against {}, per field", the_check(check))
}

/// A probability to three decimals; a value that rounds to zero prints as 0.000, never
/// -0.000.
pub(crate) fn prob3(p: f64) -> String {
    if p.is_nan() {
        String::new()
    } else {
        format!("{:.3}", if p.abs() < 5e-4 { 0.0 } else { p })
    }
}

/// The adjust stage's `method` (as `hyperparameters.csv` has it) in words.
pub(crate) fn method_words(method: &str) -> String {
    if method == "exact" {
        return "exact kernel".into();
    }
    if let Some(basis) = method.strip_prefix("hsgp ") {
        return format!(
            "reduced-rank kernel, {} basis functions",
            basis.replace('x', " x ")
        );
    }
    if let Some(rest) = method.strip_prefix("joint, ") {
        // "joint, N draws, ESS E, K kept"
        let nums: Vec<&str> = rest
            .split(", ")
            .filter_map(|part| part.split(' ').find(|w| w.parse::<f64>().is_ok()))
            .collect();
        if let [draws, ess, kept] = nums[..] {
            return format!(
                "all fields fitted together; the model settings averaged over {draws} weighted draws (worth about {ess} equally weighted ones; the {kept} with any weight kept)"
            );
        }
    }
    method.to_string()
}

/// A stage's settings as `key = value` rows (nested keys joined with dots; unset values and
/// empty lists left out), in key order.
pub(crate) fn settings_rows(v: &serde_json::Value) -> Vec<(String, String)> {
    fn walk(prefix: &str, v: &serde_json::Value, out: &mut Vec<(String, String)>) {
        match v {
            serde_json::Value::Object(m) => {
                for (k, x) in m {
                    let key = if prefix.is_empty() {
                        k.clone()
                    } else {
                        format!("{prefix}.{k}")
                    };
                    walk(&key, x, out);
                }
            }
            serde_json::Value::Null => {}
            serde_json::Value::Array(a) if a.is_empty() => {}
            serde_json::Value::String(t) => out.push((prefix.to_string(), t.clone())),
            other => out.push((prefix.to_string(), other.to_string())),
        }
    }
    let mut out = Vec::new();
    walk("", v, &mut out);
    out
}

/// The stages' settings that have any, as (stage, rows).
pub(crate) fn settings_by_stage(
    settings: &[(String, serde_json::Value)],
) -> Vec<(&str, Vec<(String, String)>)> {
    settings
        .iter()
        .map(|(stage, v)| (stage.as_str(), settings_rows(v)))
        .filter(|(_, rows)| !rows.is_empty())
        .collect()
}

/// The decision table's extra column for a trial of several fields: how the product's
/// per-field uplifts spread (their median, lowest and highest, and in how many fields the
/// product was surely ahead, P(uplift > 0) >= 0.95).
pub(crate) fn fields_summary<'a>(all: &'a [TreatmentRow], d: usize) -> Vec<ExtraColumn<'a>> {
    let fields = |t: &str| -> Vec<&'a TreatmentRow> {
        all.iter()
            .filter(|r| r.field != "all" && r.treatment == t && r.uplift.is_finite())
            .collect()
    };
    if !all
        .iter()
        .filter(|t| t.field == "all")
        .any(|t| fields(&t.treatment).len() >= 2)
    {
        return Vec::new();
    }
    vec![(
        "fields: median uplift (lowest to highest); surely ahead".into(),
        Box::new(move |t: &TreatmentRow| {
            let f = fields(&t.treatment);
            if f.is_empty() {
                return String::new();
            }
            let mut u: Vec<f64> = f.iter().map(|r| r.uplift).collect();
            u.sort_by(f64::total_cmp);
            let ahead = f.iter().filter(|r| r.p_uplift_gt0 >= 0.95).count();
            format!(
                "{} ({} to {}); {ahead} of {}",
                fmt(crate::util::median(&u), d),
                fmt(u[0], d),
                fmt(u[u.len() - 1], d),
                f.len()
            )
        }),
    )]
}

/// The decision table's rows: each product's pooled ("all") row.
pub(crate) fn decision_rows(rows: &[TreatmentRow]) -> Vec<&TreatmentRow> {
    rows.iter()
        .filter(|t| t.field == "all" && t.uplift.is_finite())
        .collect()
}

/// The decision table's columns: (heading, cell), each only when some product has a value.
#[allow(clippy::type_complexity)]
pub(crate) fn decision_columns(
    rows: &[&TreatmentRow],
    d: usize,
    u: &str,
    area: AreaUnit,
) -> Vec<(String, Box<dyn Fn(&TreatmentRow) -> String>)> {
    let mut cols: Vec<(String, Box<dyn Fn(&TreatmentRow) -> String>)> = vec![
        (
            format!("uplift ({u})"),
            Box::new(move |t: &TreatmentRow| fmt(t.uplift, d)),
        ),
        (
            "95 % interval".into(),
            Box::new(move |t: &TreatmentRow| {
                format!("{} to {}", fmt(t.uplift_lo95, d), fmt(t.uplift_hi95, d))
            }),
        ),
        (
            "P(uplift > 0)".into(),
            Box::new(|t: &TreatmentRow| prob3(t.p_uplift_gt0)),
        ),
    ];
    let any = |f: fn(&TreatmentRow) -> f64| rows.iter().any(|t| f(t).is_finite());
    let prob = prob3;
    if any(|t| t.p_uplift_gt_break_even) {
        cols.push((
            "P(uplift > break-even)".into(),
            Box::new(move |t: &TreatmentRow| prob(t.p_uplift_gt_break_even)),
        ));
    }
    if any(|t| t.p_new_field_gt0) {
        cols.push((
            "new field: P(uplift > 0)".into(),
            Box::new(move |t: &TreatmentRow| prob(t.p_new_field_gt0)),
        ));
    }
    if any(|t| t.p_new_field_gt_break_even) {
        cols.push((
            "new field: P(uplift > break-even)".into(),
            Box::new(move |t: &TreatmentRow| prob(t.p_new_field_gt_break_even)),
        ));
    }
    if any(|t| t.expected_net_return_per_ha) {
        let per = area.ha();
        cols.push((
            format!("expected net return per {area}"),
            Box::new(move |t: &TreatmentRow| fmt(t.expected_net_return_per_ha * per, 0)),
        ));
    }
    cols
}

/// An extra decision-table column: heading and cell.
pub(crate) type ExtraColumn<'a> = (String, Box<dyn Fn(&TreatmentRow) -> String + 'a>);

/// The decision table as headings and cells: the product, the `extra` columns,
/// [`decision_columns`], then the `after` columns.
pub(crate) fn decision_cells(
    rows: &[&TreatmentRow],
    d: usize,
    u: &str,
    area: AreaUnit,
    extra: Vec<ExtraColumn>,
    after: Vec<ExtraColumn>,
) -> (Vec<String>, Vec<Vec<String>>) {
    let cols = decision_columns(rows, d, u, area);
    let head = std::iter::once("product".to_string())
        .chain(extra.iter().map(|c| c.0.clone()))
        .chain(cols.iter().map(|c| c.0.clone()))
        .chain(after.iter().map(|c| c.0.clone()))
        .collect();
    let cells = rows
        .iter()
        .map(|t| {
            std::iter::once(t.treatment.clone())
                .chain(extra.iter().map(|c| c.1(t)))
                .chain(cols.iter().map(|c| c.1(t)))
                .chain(after.iter().map(|c| c.1(t)))
                .collect()
        })
        .collect();
    (head, cells)
}

/// A Markdown table: the first `left` columns left-aligned, the others right-aligned.
pub(crate) fn markdown_table(s: &mut String, head: &[String], cells: &[Vec<String>], left: usize) {
    let _ = writeln!(s, "| {} |", head.join(" | "));
    let _ = writeln!(
        s,
        "|{}{}",
        "---|".repeat(left),
        "---:|".repeat(head.len().saturating_sub(left))
    );
    for row in cells {
        let _ = writeln!(s, "| {} |", row.join(" | "));
    }
}

/// What the decision table says, in plain words (both reports).
pub(crate) const DECISION_WORDS: &str = "Each product against the check over the trial's fields (the pooled estimate). P(uplift > 0) is the probability that the product gains yield on average over fields like these; P(uplift > break-even) that the gain pays for the product at the given price and cost; the new-field columns give the same for a field that was not in the trial, which varies more. Quality control (counts, rules, maps, the spatial model) follows below.";

/// What the new-field rows mean, in plain words (both reports).
pub(crate) const NEW_FIELD_WORDS: &str = "The average-field uplift is the effect the fields share: how good the product is on average over fields like these. A new field adds that field's own departure from the average (the treatment x field interaction, estimated from how much the fields differed), so its interval is wider: it is what a grower whose field was not in the trial can expect, and P(uplift > 0) is the chance the product gains yield there. Only a joint fit of two or more fields can say this.";

/// Pooled rows with a new-field predictive.
pub(crate) fn new_field_rows(rows: &[TreatmentRow]) -> Vec<&TreatmentRow> {
    rows.iter()
        .filter(|t| t.field == "all" && t.new_field_uplift.is_finite())
        .collect()
}
/// The flow and moisture delays clean applied to one export, and how each was chosen.
pub(crate) struct DelayApplied {
    /// What an unusual estimate suggests and how to act on it, in plain words (empty when
    /// there is nothing to say).
    pub notes: Vec<String>,
    pub export: String,
    pub flow_s: String,
    pub flow_source: String,
    pub moisture_s: String,
    pub moisture_source: String,
}

/// The delays applied per export, from clean's summary (`details.exports`).
/// (export, format and mapping) from ingest's summary, in export order.
pub(crate) fn exports_read_as(summaries: &[StageSummary]) -> Vec<(String, String)> {
    summaries
        .iter()
        .filter(|x| x.stage == "ingest")
        .filter_map(|x| x.details.get("read_as"))
        .filter_map(|v| v.as_object())
        .flat_map(|m| {
            m.iter()
                .map(|(k, v)| (k.clone(), v.as_str().unwrap_or_default().to_string()))
        })
        .collect()
}

pub(crate) fn delays_applied(summaries: &[StageSummary]) -> Vec<DelayApplied> {
    let Some(exports) = summaries
        .iter()
        .find(|x| x.stage == "clean")
        .and_then(|x| x.details.get("exports"))
        .and_then(|e| e.as_object())
    else {
        return Vec::new();
    };
    let text = |v: &serde_json::Value, k: &str| -> String {
        match &v[k] {
            serde_json::Value::Number(n) => fmt(n.as_f64().unwrap_or(f64::NAN), 2),
            serde_json::Value::String(t) => t.clone(),
            _ => String::new(),
        }
    };
    exports
        .iter()
        .map(|(export, v)| DelayApplied {
            notes: ["flow", "moisture"]
                .iter()
                .filter_map(|what| delay_note(what, &v[format!("{what}_delay_estimate")]))
                .collect(),
            export: export.clone(),
            flow_s: text(v, "flow_delay_s"),
            flow_source: text(v, "flow_delay_source"),
            moisture_s: text(v, "moisture_delay_s"),
            moisture_source: text(v, "moisture_delay_source"),
        })
        .collect()
}

/// A plain-words note on an estimated delay that is negative, about zero, or at an edge of
/// the lags scanned; None for an ordinary estimate (or none).
fn delay_note(what: &str, est: &serde_json::Value) -> Option<String> {
    let lag = est["lag_s"].as_f64()?;
    let lags: Vec<f64> = est["curve"]
        .as_array()?
        .iter()
        .filter_map(|p| p[0].as_f64())
        .collect();
    let (lo, hi) = (
        lags.iter().cloned().fold(f64::INFINITY, f64::min),
        lags.iter().cloned().fold(f64::NEG_INFINITY, f64::max),
    );
    let fixed = if what == "flow" {
        "clean.flow_delay_s"
    } else {
        "clean.moisture_delay_s"
    };
    if lag <= lo || lag >= hi {
        Some(format!(
            "The {what} delay estimate ({lag} s) lies at the edge of the lags scanned ({lo} to {hi} s): the best lag may lie beyond it, or the export's passes do not pair well. It was applied as found; check the export, or set clean.delay.mode = \"fixed\" with {fixed} to the delay you know."
        ))
    } else if lag < -0.5 {
        Some(format!(
            "The {what} delay estimate is negative ({lag} s): the readings already lead the positions, which happens when the software that wrote the export corrected the delay itself, by more than the true delay. plotsieve applied {lag} s, which moves the readings back by that much; if the export is known to be corrected, set clean.delay.mode = \"fixed\" with {fixed} = 0 to apply none."
        ))
    } else if lag.abs() <= 0.5 {
        Some(format!(
            "The {what} delay estimate is about zero ({lag} s): the export looks delay-corrected already (a raw monitor log lags by several seconds), so next to nothing was shifted."
        ))
    } else {
        None
    }
}

/// "mean (lo to hi)" with `k` decimals, empty for NaN.
pub(crate) fn mean_interval(m: f64, lo: f64, hi: f64, k: usize) -> String {
    if m.is_nan() {
        String::new()
    } else {
        format!("{} ({} to {})", fmt(m, k), fmt(lo, k), fmt(hi, k))
    }
}

pub mod html;
mod maps;
pub mod markdown;
pub mod raster;
pub mod rates;
pub mod season;
pub mod svg;

/// (field, factor, SD summary) for each random design factor fitted (rows, columns,
/// incomplete blocks), for the reports.
pub(crate) fn random_factors(
    hyper: &[FieldHyper],
) -> Vec<(String, &'static str, crate::adjust::Summary)> {
    hyper
        .iter()
        .flat_map(|h| {
            [
                ("row", h.row_sd),
                ("column", h.column_sd),
                ("block", h.block_sd),
            ]
            .into_iter()
            .filter(|(_, x)| !x.mean.is_nan())
            .map(|(n, x)| (h.field.clone(), n, x))
        })
        .collect()
}

#[cfg(test)]
mod tests;
