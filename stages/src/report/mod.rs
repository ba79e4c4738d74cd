//! Report: a Markdown summary of a run: counts per stage and rule, the fitted spatial
//! hyperparameters and the treatment table, with the cautions that go with them.

use crate::adjust::settings::Money;
use crate::adjust::{FieldHyper, TreatmentRow};
use crate::crop::AreaUnit;
use crate::table::StageSummary;
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

/// Render the Markdown report.
pub fn markdown(r: &ReportInput) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "# plotsieve report: {}\n", r.trial_name);
    let _ = writeln!(s, "> **Caution.** {CAUTION}\n");
    if !r.warnings.is_empty() {
        let _ = writeln!(s, "## {}\n", heading::WARNINGS);
        for w in r.warnings {
            let _ = writeln!(s, "- **{w}**");
        }
        let _ = writeln!(s);
    }
    decision_markdown(&mut s, r);
    md_counts(&mut s, r);
    md_removed(&mut s, r);
    md_exports(&mut s, r);
    md_spatial(&mut s, r);
    md_per_field(&mut s, r);
    md_new_field(&mut s, r);
    s
}

/// The points and plots in, kept and rejected, per stage.
fn md_counts(s: &mut String, r: &ReportInput) {
    let _ = writeln!(s, "## {}\n", heading::COUNTS);
    let _ = writeln!(s, "| stage | counted | in | kept | rejected |");
    let _ = writeln!(s, "|---|---|---:|---:|---:|");
    for x in r.summaries {
        let _ = writeln!(
            s,
            "| {} | {} | {} | {} | {} |",
            x.stage, x.unit, x.count_in, x.kept, x.rejected
        );
        if let Some(p) = &x.plots {
            let _ = writeln!(
                s,
                "| {} | plots | {} | {} | {} |",
                x.stage, p.count_in, p.kept, p.set_aside
            );
        }
    }
}

/// What each rule removed, per stage.
fn md_removed(s: &mut String, r: &ReportInput) {
    let _ = writeln!(s, "\n## {}\n", heading::REMOVED);
    let _ = writeln!(s, "| stage | rule | removed |");
    let _ = writeln!(s, "|---|---|---:|");
    for x in r.summaries {
        for (rule, n) in &x.by_rule {
            let _ = writeln!(s, "| {} | {} | {} |", x.stage, rule, n);
        }
        if let Some(p) = &x.plots {
            for (rule, n) in &p.by_rule {
                let _ = writeln!(s, "| {} | {} (plots) | {} |", x.stage, rule, n);
            }
        }
    }
}

/// How each export was read, and the delays applied to it.
fn md_exports(s: &mut String, r: &ReportInput) {
    let read_as = exports_read_as(r.summaries);
    if !read_as.is_empty() {
        let _ = writeln!(s, "\n## {}\n", heading::READ_AS);
        let _ = writeln!(s, "| export | format and mapping |");
        let _ = writeln!(s, "|---|---|");
        for (e, how) in &read_as {
            let _ = writeln!(s, "| {e} | {} |", how.replace('|', "/"));
        }
    }
    let delays = delays_applied(r.summaries);
    if !delays.is_empty() {
        let _ = writeln!(s, "\n## {}\n", heading::DELAYS);
        let _ = writeln!(
            s,
            "| export | flow delay (s) | how | moisture delay (s) | how |"
        );
        let _ = writeln!(s, "|---|---:|---|---:|---|");
        for d in &delays {
            let _ = writeln!(
                s,
                "| {} | {} | {} | {} | {} |",
                d.export, d.flow_s, d.flow_source, d.moisture_s, d.moisture_source
            );
        }
        let notes: Vec<String> = delays
            .iter()
            .flat_map(|d| d.notes.iter().map(move |n| format!("- {}: {n}", d.export)))
            .collect();
        if !notes.is_empty() {
            let _ = writeln!(s, "\n{}", notes.join("\n"));
        }
    }
}

/// The spatial model per field, and any random design factors.
fn md_spatial(s: &mut String, r: &ReportInput) {
    let d = r.decimals;
    let _ = writeln!(s, "\n## {}\n", heading::SPATIAL);
    let _ = writeln!(s, "Posterior means with 95 % intervals; row `all` of a joint fit holds the shared range and the SD of the treatment x field interaction.\n");
    let _ = writeln!(
        s,
        "| field | plots | range (m) | spatial SD ({u}) | noise SD ({u}) | spatial share | interaction SD ({u}) | method | note |",
        u = r.unit_label
    );
    let _ = writeln!(s, "|---|---:|---|---|---|---|---|---|---|");
    let ci = mean_interval;
    for h in r.hyper {
        let mut range = ci(h.range_m, h.range_lo95_m, h.range_hi95_m, 0);
        if !h.range_across.mean.is_nan() {
            let a = h.range_across;
            range = format!("along {range}; across {}", ci(a.mean, a.lo95, a.hi95, 0));
        }
        let (a, b, c, e) = (
            h.spatial_sd_ci,
            h.noise_sd_ci,
            h.spatial_share_ci,
            h.interaction_sd,
        );
        let _ = writeln!(
            s,
            "| {} | {} | {} | {} | {} | {} | {} | {} | {} |",
            h.field,
            h.plots,
            range,
            ci(a.mean, a.lo95, a.hi95, d + 1),
            ci(b.mean, b.lo95, b.hi95, d + 1),
            ci(c.mean, c.lo95, c.hi95, 2),
            ci(e.mean, e.lo95, e.hi95, d + 1),
            method_words(&h.method),
            h.warning
        );
    }
    let factors = random_factors(r.hyper);
    if !factors.is_empty() {
        let _ = writeln!(s, "\nRandom design factors (`adjust.random_effects`), fitted beside the spatial field; posterior means with 95 % intervals:\n");
        let _ = writeln!(s, "| field | factor | SD ({}) |", r.unit_label);
        let _ = writeln!(s, "|---|---|---|");
        for (field, name, x) in &factors {
            let _ = writeln!(
                s,
                "| {field} | {name} | {} |",
                ci(x.mean, x.lo95, x.hi95, d + 1)
            );
        }
    }
}

/// Each product against the check, per field and pooled.
fn md_per_field(s: &mut String, r: &ReportInput) {
    let d = r.decimals;
    let _ = writeln!(s, "\n## {}\n", per_field_heading(r.check));
    let _ = writeln!(s, "Yields in {u} at standard moisture; uplift = treatment minus check; 95 % intervals. Field `all` is the effect shared by the fields in the joint model (the fields' own rows include the treatment x field interaction), or with `adjust.pooling = \"separate\"` the inverse-variance combination of the separate field fits.\n", u = r.unit_label);
    let _ = writeln!(s, "| field | treatment | plots | estimate | SD | uplift | uplift 95 % interval | prior (mean +- SD) | P(uplift > 0) |");
    let _ = writeln!(s, "|---|---|---:|---:|---:|---:|---|---|---:|");
    for t in r.treatments {
        let (up, ci, p) = if t.uplift.is_nan() {
            ("(check)".to_string(), String::new(), String::new())
        } else {
            (
                fmt(t.uplift, d),
                format!("{} to {}", fmt(t.uplift_lo95, d), fmt(t.uplift_hi95, d)),
                prob3(t.p_uplift_gt0),
            )
        };
        let prior = if t.prior_sd.is_nan() {
            String::new()
        } else {
            format!("{} +- {}", fmt(t.prior_mean, d), fmt(t.prior_sd, d))
        };
        let _ = writeln!(
            s,
            "| {} | {} | {} | {} | {} | {} | {} | {} | {} |",
            t.field,
            t.treatment,
            t.plots,
            fmt(t.estimate, d),
            fmt(t.sd, d),
            up,
            ci,
            prior,
            p
        );
    }
}

/// The uplift in a field that was not in the trial.
fn md_new_field(s: &mut String, r: &ReportInput) {
    let d = r.decimals;
    let nf = new_field_rows(r.treatments);
    if !nf.is_empty() {
        let economics = nf.iter().any(|t| t.p_new_field_gt_break_even.is_finite());
        let _ = writeln!(s, "\n### {}\n", heading::NEW_FIELD);
        let _ = writeln!(s, "{NEW_FIELD_WORDS}\n");
        let _ = write!(s, "| treatment | average field: uplift (95 % interval) | new field: uplift | 90 % interval | 95 % interval | P(uplift > 0) |");
        let _ = writeln!(
            s,
            "{}",
            if economics {
                " P(uplift > break-even) |"
            } else {
                ""
            }
        );
        let _ = writeln!(
            s,
            "|---|---|---:|---|---|---:|{}",
            if economics { "---:|" } else { "" }
        );
        for t in nf {
            let _ = write!(
                s,
                "| {} | {} ({} to {}) | {} | {} to {} | {} to {} | {} |",
                t.treatment,
                fmt(t.uplift, d),
                fmt(t.uplift_lo95, d),
                fmt(t.uplift_hi95, d),
                fmt(t.new_field_uplift, d),
                fmt(t.new_field_lo90, d),
                fmt(t.new_field_hi90, d),
                fmt(t.new_field_lo95, d),
                fmt(t.new_field_hi95, d),
                prob3(t.p_new_field_gt0)
            );
            let _ = writeln!(
                s,
                "{}",
                if economics {
                    format!(" {} |", prob3(t.p_new_field_gt_break_even))
                } else {
                    String::new()
                }
            );
        }
    }
}

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

fn decision_markdown(s: &mut String, r: &ReportInput) {
    let rows = decision_rows(r.treatments);
    let _ = writeln!(s, "## {}\n", decision_heading(r.check));
    if rows.is_empty() {
        let _ = writeln!(s, "No product could be compared with the check.\n");
        return;
    }
    let _ = writeln!(s, "{DECISION_WORDS}\n");
    let (head, cells) = decision_cells(
        &rows,
        r.decimals,
        r.unit_label,
        area_of(r.money),
        Vec::new(),
        fields_summary(r.treatments, r.decimals),
    );
    markdown_table(s, &head, &cells, 1);
    let _ = writeln!(s);
    if let Some(p) = prices_line(r.money) {
        let _ = writeln!(s, "{p}\n");
    }
}

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
pub mod raster;
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
mod tests {
    use super::{delay_note, fields_summary, method_words, prob3, settings_rows};
    use crate::adjust::TreatmentRow;

    #[test]
    fn plain_words_for_the_method_probabilities_and_settings() {
        assert_eq!(prob3(-0.0001), "0.000");
        assert_eq!(prob3(0.9996), "1.000");
        assert_eq!(prob3(f64::NAN), "");
        assert_eq!(method_words("exact"), "exact kernel");
        assert_eq!(
            method_words("hsgp 20x16"),
            "reduced-rank kernel, 20 x 16 basis functions"
        );
        assert_eq!(
            method_words("joint, 5804 draws, ESS 2703, 2556 kept"),
            "all fields fitted together; the model settings averaged over 5804 weighted draws (worth about 2703 equally weighted ones; the 2556 with any weight kept)"
        );
        let v = serde_json::json!({"a": {"b": 1, "c": null, "d": []}, "e": "x", "f": [1, 2]});
        assert_eq!(
            settings_rows(&v),
            vec![
                ("a.b".to_string(), "1".to_string()),
                ("e".to_string(), "x".to_string()),
                ("f".to_string(), "[1,2]".to_string())
            ]
        );
    }

    #[test]
    fn the_field_summary_gives_median_range_and_fields_surely_ahead() {
        let row = |field: &str, uplift: f64, p: f64| TreatmentRow {
            field: field.into(),
            treatment: "prod-a".into(),
            uplift,
            p_uplift_gt0: p,
            ..Default::default()
        };
        let rows = vec![
            row("A", 0.30, 0.97),
            row("B", 0.10, 0.80),
            row("C", 0.50, 0.99),
            row("all", 0.31, 0.99),
        ];
        let cols = fields_summary(&rows, 2);
        assert_eq!(cols.len(), 1);
        assert_eq!(cols[0].1(&rows[3]), "0.30 (0.10 to 0.50); 2 of 3");
        // One field only: no column.
        assert!(fields_summary(&rows[2..], 2).is_empty());
    }

    #[test]
    fn unusual_delay_estimates_are_explained() {
        let est = |lag: f64| serde_json::json!({"lag_s": lag, "pairs": 500, "curve": [[-20.0, 1.0], [0.0, 0.5], [20.0, 1.0]]});
        let neg = delay_note("flow", &est(-3.3)).unwrap();
        assert!(
            neg.starts_with("The flow delay estimate is negative (-3.3 s)")
                && neg.contains("set clean.delay.mode = \"fixed\" with clean.flow_delay_s = 0"),
            "{neg}"
        );
        assert!(delay_note("moisture", &est(0.2))
            .unwrap()
            .contains("looks delay-corrected already"));
        assert!(delay_note("flow", &est(20.0))
            .unwrap()
            .contains("lies at the edge of the lags scanned (-20 to 20 s)"));
        assert_eq!(delay_note("flow", &est(11.0)), None);
        assert_eq!(delay_note("flow", &serde_json::Value::Null), None);
    }
}
