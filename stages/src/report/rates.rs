//! A rate trial's decision section: the optimum rate and its interval first, the curves'
//! probabilities, and (HTML) the averaged curve with its band and the adjusted plot yields,
//! and the net return against rate.

use super::svg::{esc, table};
use crate::adjust::applied::AppliedRow;
use crate::adjust::{ResponseCurveRow, ResponseRow};
use std::fmt::Write as _;

/// What the rate section shows; yields in the output unit.
pub struct RateReport {
    pub rows: Vec<ResponseRow>,
    pub curve: Vec<ResponseCurveRow>,
    /// Each kept plot: field, rate, and its adjusted yield less the mean adjusted yield of
    /// the field's lowest-rate plots.
    pub plots: Vec<(String, f64, f64)>,
    pub rate_unit: String,
    /// The input's price in words ("input 1.1 per kg"), empty without one.
    pub input_price: String,
    pub decimals: usize,
    /// The area net returns are shown per (the trial's `product_cost_unit`).
    pub area: crate::crop::AreaUnit,
    /// As-applied rates against the targets over the trial (`all` rows; empty without
    /// `columns.applied_rate`), and whether the curve places the treatments at them.
    pub applied: Vec<AppliedRow>,
    pub at_applied: bool,
}

/// The as-applied table's heading, columns and rows, and the sentence under it.
fn applied_cells(r: &RateReport) -> (Vec<String>, Vec<Vec<String>>, &'static str) {
    let u = &r.rate_unit;
    let head = vec![
        "treatment".to_string(),
        format!("target ({u})"),
        "plots with a rate".into(),
        format!("as applied, mean ({u})"),
        format!("SD between plots ({u})"),
        "difference (%)".into(),
    ];
    let cells = r
        .applied
        .iter()
        .map(|a| {
            vec![
                a.treatment.clone(),
                f(a.target_rate, 1),
                format!("{} of {}", a.plots_with_rate, a.plots),
                f(a.applied_mean, 1),
                f(a.applied_sd, 1),
                format!("{:+.1}", a.difference_pct),
            ]
        })
        .collect();
    let words = if r.at_applied {
        "Each plot's rate is the mean of what the machine logged on the records it keeps. The curves place each treatment at its as-applied mean (adjust.rate_source = \"applied\"). A zero target's difference is a percentage of the highest target."
    } else {
        "Each plot's rate is the mean of what the machine logged on the records it keeps. The curves place each treatment at its target rate; a treatment far from its target is a warning (adjust.rate_source = \"applied\" places it where it was applied). A zero target's difference is a percentage of the highest target."
    };
    (head, cells, words)
}

/// The input's price in words, for [`RateReport::input_price`].
pub fn input_price_words(
    price: f64,
    unit: crate::crop::InputUnit,
    rate_unit: crate::crop::RateUnit,
) -> String {
    if price > 0.0 {
        format!("Input: {price} per {unit} (rates in {rate_unit}).")
    } else {
        "No input price: the optimum pays for the grain only.".into()
    }
}

pub(crate) const HEADING: &str = "Decision: the rate that pays best";

/// The cautions of a rate trial.
pub const RATE_CAUTION: &str = "The optimum depends on the prices given; one season is one \
season's weather, so an optimum from one trial year is not the rate for every year; local \
rules and limits on nutrient rates come first.";

const WORDS: &str = "The optimum is the rate with the highest expected net return over the \
lowest rate tested (without prices, the highest expected yield), averaged over the \
quadratic, quadratic-plateau and linear-plateau curves by their probabilities; its \
intervals hold 90 and 95 % of the posterior's optima. A rate is never extrapolated: an \
optimum at the highest rate tested says the best rate may lie beyond it. The flat top is \
the range of rates whose expected net return is within reach of the best. With several \
fields, the new-field interval is where the optimum lies in a field that was not in the \
trial (the pooled curve plus that field's own departure at each rate, as the fields \
departed from it).";

fn f(x: f64, d: usize) -> String {
    if x.is_finite() {
        format!("{x:.d$}")
    } else {
        String::new()
    }
}

/// The decision table: one row per field and pooled, the averaged curve.
fn decision_cells(r: &RateReport, unit_label: &str) -> (Vec<String>, Vec<Vec<String>>) {
    let u = &r.rate_unit;
    let head = vec![
        "field".into(),
        format!("optimum rate ({u})"),
        "90 % interval".into(),
        "95 % interval".into(),
        "P(optimum at highest rate)".into(),
        format!("gain at optimum ({unit_label})"),
        format!("net return at optimum (per {})", r.area),
        format!("flat top ({u})"),
        "P(optimum beats lowest)".into(),
        "P(optimum beats current)".into(),
        "note".into(),
    ];
    let new_field = r
        .rows
        .iter()
        .any(|x| x.model == "averaged" && x.new_field_lo90.is_finite());
    let mut head = head;
    if new_field {
        head.insert(4, "new field: 90 % interval".into());
    }
    let cells = r
        .rows
        .iter()
        .filter(|x| x.model == "averaged")
        .map(|x| {
            let mut row = vec![
                x.field.clone(),
                f(x.optimum_rate, 0),
                format!("{}-{}", f(x.optimum_lo90, 0), f(x.optimum_hi90, 0)),
                format!("{}-{}", f(x.optimum_lo95, 0), f(x.optimum_hi95, 0)),
                super::prob3(x.p_optimum_at_highest),
                f(x.gain_at_optimum, r.decimals),
                f(x.net_return_at_optimum_per_ha * r.area.ha(), 2),
                format!("{}-{}", f(x.flat_top_lo, 0), f(x.flat_top_hi, 0)),
                super::prob3(x.p_optimum_beats_lowest),
                super::prob3(x.p_optimum_beats_current),
                x.note.clone(),
            ];
            if new_field {
                let nf = if x.new_field_lo90.is_finite() {
                    format!("{}-{}", f(x.new_field_lo90, 0), f(x.new_field_hi90, 0))
                } else {
                    String::new()
                };
                row.insert(4, nf);
            }
            row
        })
        .collect();
    (head, cells)
}

/// Each curve's probability and optimum.
fn curve_cells(r: &RateReport) -> (Vec<String>, Vec<Vec<String>>) {
    let head = vec![
        "field".into(),
        "curve".into(),
        "probability".into(),
        "log Bayes factor against unordered rates".into(),
        format!("optimum ({})", r.rate_unit),
        "90 % interval".into(),
    ];
    let cells = r
        .rows
        .iter()
        .filter(|x| x.model != "averaged")
        .map(|x| {
            vec![
                x.field.clone(),
                x.model.replace('_', "-"),
                super::prob3(x.probability),
                f(x.log_bayes_factor, 1),
                f(x.optimum_rate, 0),
                format!("{}-{}", f(x.optimum_lo90, 0), f(x.optimum_hi90, 0)),
            ]
        })
        .collect();
    (head, cells)
}

/// The Markdown section.
pub fn markdown(s: &mut String, r: &RateReport, unit_label: &str, prices: Option<String>) {
    let _ = writeln!(s, "## {HEADING}\n");
    if r.rows.is_empty() {
        let _ = writeln!(s, "No response curve could be fitted.\n");
        return;
    }
    let _ = writeln!(s, "{WORDS}\n");
    let (head, cells) = decision_cells(r, unit_label);
    super::markdown_table(s, &head, &cells, 1);
    let _ = writeln!(s);
    if let Some(p) = prices {
        let _ = writeln!(s, "{p} {}\n", r.input_price);
    }
    let _ = writeln!(s, "> {RATE_CAUTION}\n");
    let _ = writeln!(s, "### Response curves\n");
    let (head, cells) = curve_cells(r);
    super::markdown_table(s, &head, &cells, 2);
    let _ = writeln!(s);
    if !r.applied.is_empty() {
        let (head, cells, words) = applied_cells(r);
        let _ = writeln!(s, "### As applied against target\n\n{words}\n");
        super::markdown_table(s, &head, &cells, 1);
        let _ = writeln!(s);
    }
}

/// The HTML section, with the pooled curve and net return drawn.
pub fn html(s: &mut String, r: &RateReport, unit_label: &str, prices: Option<String>) {
    let _ = write!(s, "<section class=\"decision\"><h2>{HEADING}</h2>");
    if r.rows.is_empty() {
        let _ = write!(s, "<p>No response curve could be fitted.</p></section>");
        return;
    }
    let _ = write!(s, "<p class=\"note\">{}</p>", esc(WORDS));
    let (head, cells) = decision_cells(r, unit_label);
    table(s, &head, &cells, 1);
    if let Some(p) = prices {
        let _ = write!(
            s,
            "<p class=\"note\">{}</p>",
            esc(&format!("{p} {}", r.input_price))
        );
    }
    let _ = write!(
        s,
        "<p class=\"note\"><strong>{}</strong></p>",
        esc(RATE_CAUTION)
    );
    let pooled: Vec<&ResponseCurveRow> = r.curve.iter().filter(|c| c.field == "all").collect();
    let dots: Vec<(f64, f64)> = r.plots.iter().map(|p| (p.1, p.2)).collect();
    let band = |c: &&ResponseCurveRow| (c.rate, c.gain, c.gain_lo95, c.gain_hi95);
    chart(
        s,
        &pooled.iter().map(band).collect::<Vec<_>>(),
        &dots,
        &format!("rate ({})", r.rate_unit),
        &format!("gain over the lowest rate ({unit_label})"),
        "The averaged response curve (pooled) with its 95 % band; dots: each plot's yield adjusted for the spatial trend, less its field's mean at the lowest rate",
    );
    let money: Vec<(f64, f64, f64, f64)> = pooled
        .iter()
        .map(|c| {
            (
                c.rate,
                c.net_return_per_ha * r.area.ha(),
                c.net_return_lo95_per_ha * r.area.ha(),
                c.net_return_hi95_per_ha * r.area.ha(),
            )
        })
        .filter(|x| x.1.is_finite())
        .collect();
    if !money.is_empty() {
        chart(
            s,
            &money,
            &[],
            &format!("rate ({})", r.rate_unit),
            &format!("net return over the lowest rate (per {})", r.area),
            "Expected net return against rate (pooled) with its 95 % band",
        );
    }
    let _ = write!(s, "<h3>Response curves</h3>");
    let (head, cells) = curve_cells(r);
    table(s, &head, &cells, 2);
    if !r.applied.is_empty() {
        let (head, cells, words) = applied_cells(r);
        let _ = write!(
            s,
            "<h3>As applied against target</h3><p class=\"note\">{}</p>",
            esc(words)
        );
        table(s, &head, &cells, 1);
    }
    let _ = write!(s, "</section>");
}

/// A line with its band (x, mean, lo, hi) and dots, with axes and a caption.
fn chart(
    s: &mut String,
    line: &[(f64, f64, f64, f64)],
    dots: &[(f64, f64)],
    xl: &str,
    yl: &str,
    caption: &str,
) {
    if line.len() < 2 {
        return;
    }
    let (w, h, l, b, t, rm) = (640.0, 300.0, 70.0, 45.0, 12.0, 16.0);
    let xs = line.iter().map(|p| p.0).chain(dots.iter().map(|d| d.0));
    let (x0, x1) = xs.fold((f64::INFINITY, f64::NEG_INFINITY), |a, x| {
        (a.0.min(x), a.1.max(x))
    });
    let ys = line
        .iter()
        .flat_map(|p| [p.2, p.3])
        .chain(dots.iter().map(|d| d.1))
        .chain(std::iter::once(0.0))
        .filter(|y| y.is_finite());
    let (y0, y1) = ys.fold((f64::INFINITY, f64::NEG_INFINITY), |a, y| {
        (a.0.min(y), a.1.max(y))
    });
    let (y0, y1) = if y1 > y0 {
        (y0, y1)
    } else {
        (y0 - 1.0, y0 + 1.0)
    };
    let px = |x: f64| l + (x - x0) / (x1 - x0).max(1e-12) * (w - l - rm);
    let py = |y: f64| t + (y1 - y) / (y1 - y0) * (h - t - b);
    let _ = write!(s, "<figure><svg viewBox=\"0 0 {w} {h}\" width=\"{w}\" height=\"{h}\" role=\"img\" aria-label=\"{}\">", esc(caption));
    let mut band = String::new();
    for (i, p) in line.iter().enumerate() {
        let _ = write!(
            band,
            "{}{:.1},{:.1}",
            if i == 0 { "M" } else { "L" },
            px(p.0),
            py(p.3)
        );
    }
    for p in line.iter().rev() {
        let _ = write!(band, "L{:.1},{:.1}", px(p.0), py(p.2));
    }
    let _ = write!(
        s,
        "<path d=\"{band}Z\" fill=\"#56B4E9\" fill-opacity=\"0.3\" stroke=\"none\"/>"
    );
    let mut mean = String::new();
    for (i, p) in line.iter().enumerate() {
        let _ = write!(
            mean,
            "{}{:.1},{:.1}",
            if i == 0 { "M" } else { "L" },
            px(p.0),
            py(p.1)
        );
    }
    let _ = write!(
        s,
        "<path d=\"{mean}\" fill=\"none\" stroke=\"#0072B2\" stroke-width=\"2\"/>"
    );
    let _ = write!(s, "<line x1=\"{l}\" x2=\"{:.1}\" y1=\"{:.1}\" y2=\"{:.1}\" stroke=\"#999\" stroke-dasharray=\"4 3\"/>", w - rm, py(0.0), py(0.0));
    for d in dots {
        let _ = write!(
            s,
            "<circle cx=\"{:.1}\" cy=\"{:.1}\" r=\"3\" fill=\"#D55E00\" fill-opacity=\"0.7\"/>",
            px(d.0),
            py(d.1)
        );
    }
    // Axes with five ticks each.
    let _ = write!(s, "<line x1=\"{l}\" x2=\"{l}\" y1=\"{t}\" y2=\"{:.1}\" stroke=\"#333\"/><line x1=\"{l}\" x2=\"{:.1}\" y1=\"{:.1}\" y2=\"{:.1}\" stroke=\"#333\"/>", h - b, w - rm, h - b, h - b);
    for k in 0..=4 {
        let (xv, yv) = (
            x0 + (x1 - x0) * k as f64 / 4.0,
            y0 + (y1 - y0) * k as f64 / 4.0,
        );
        let _ = write!(
            s,
            "<text x=\"{:.1}\" y=\"{:.1}\" font-size=\"11\" text-anchor=\"middle\">{}</text>",
            px(xv),
            h - b + 16.0,
            crate::util::fmt(xv, 0)
        );
        let _ = write!(
            s,
            "<text x=\"{:.1}\" y=\"{:.1}\" font-size=\"11\" text-anchor=\"end\">{}</text>",
            l - 6.0,
            py(yv) + 4.0,
            crate::util::fmt(yv, 2)
        );
    }
    let _ = write!(
        s,
        "<text x=\"{:.1}\" y=\"{:.1}\" font-size=\"12\" text-anchor=\"middle\">{}</text>",
        (l + w - rm) / 2.0,
        h - 8.0,
        esc(xl)
    );
    let _ = write!(s, "<text x=\"14\" y=\"{:.1}\" font-size=\"12\" text-anchor=\"middle\" transform=\"rotate(-90 14 {:.1})\">{}</text>", (t + h - b) / 2.0, (t + h - b) / 2.0, esc(yl));
    let _ = write!(
        s,
        "</svg><figcaption>{}</figcaption></figure>",
        esc(caption)
    );
}
