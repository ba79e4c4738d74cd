//! The season report (`plotsieve season`): the decision table first, then per product a
//! forest plot across the season's fields, a map of where the fields are, the per-field
//! estimates beside their stage-one inputs, the spread between fields and the method. One
//! self-contained HTML file (inline CSS and SVG) and a Markdown twin.

use super::html::{esc, forest, forest_labelled, nice_step, table, CSS};
use super::{
    area_of, decision_cells, decision_rows, markdown_table, prices_line, ExtraColumn, CAUTION,
};
use crate::adjust::{Summary, TreatmentRow};
use crate::season::LocationRow;
use crate::util::fmt;
use std::collections::BTreeMap;
use std::fmt::Write as _;

/// One trial of the season as the report lists it.
#[derive(Clone, Debug)]
pub struct SeasonTrial {
    pub trial: String,
    pub run_folder: String,
    pub fields: usize,
    pub contrasts_sha256: String,
}

/// Everything the season report shows; yields in the output unit.
pub struct SeasonInput<'a> {
    pub name: &'a str,
    pub unit_label: &'a str,
    pub check: &'a str,
    pub crop: &'a str,
    pub decimals: usize,
    pub products: &'a [TreatmentRow],
    pub locations: &'a [LocationRow],
    /// The product x field SD.
    pub interaction_sd: Summary,
    pub trials: &'a [SeasonTrial],
    pub warnings: &'a [String],
    /// The prices as the season file gave them (None: no economics).
    pub money: Option<&'a crate::adjust::settings::Money>,
    /// A season of rate trials: the curve across all the fields (None: products).
    pub rates: Option<&'a super::rates::RateReport>,
}

/// What the season's decision table says, in plain words (both reports).
pub const SEASON_WORDS: &str = "Each product against the check over all the season's fields, every field of every trial counted as one location. The uplift is the product's mean effect over fields like these, with its 95 % interval; P(uplift > 0) is the probability that this mean effect is a gain. The new-field columns are for a field that was not in the season: its uplift is the mean effect plus that field's own departure, drawn from the spread between fields measured below, so it is less certain. P(uplift > break-even) appears when a grain price and product costs are given.";

/// The method, in plain words (both reports).
pub const SEASON_METHOD: &str = "Two-stage analysis of a series of trials (Piepho, Möhring, Schulz-Streeck & Ogutu 2012, Biometrical Journal 54:844-860, fully efficient form). Stage one is each trial's adjust stage: every field fitted alone with its spatial model gives its products' contrasts with the check and their covariance, mixed over the field's spatial hyperparameters with flat priors on the contrasts (4-adjust/contrasts.json). Stage two, here: a field's contrasts are its products' effects there plus estimation error with that covariance; a product's effect in a field is its mean effect plus a product x field departure with one SD shared by all products. The mean effects have the weak normal priors of a trial's joint fit and the SD its penalised-complexity prior; given the SD everything is normal and exact, and the SD is integrated over a ladder of values. Each field's effect is shrunk toward the product's mean as far as its own precision and the spread between fields say. Checked against a one-stage joint fit of the same fields (means within 0.05 posterior SD on simulated 40-plot fields, 0.23 on 25-plot fields) and on simulated seasons of known truth (95 % intervals covered 94.7 % of new fields' true uplifts and 95.0 % of true mean effects on 40-plot fields; 92.6 % and 96.6 % on 25-plot fields).";

/// The decision table's extra column: how many fields hold the product.
fn fields_column<'a>(r: &'a SeasonInput) -> Vec<ExtraColumn<'a>> {
    vec![(
        "fields".into(),
        Box::new(move |t: &TreatmentRow| {
            r.locations
                .iter()
                .filter(|l| l.product == t.treatment)
                .count()
                .to_string()
        }),
    )]
}

/// The per-field table: headings and cells.
fn per_field(r: &SeasonInput) -> (Vec<String>, Vec<Vec<String>>) {
    let (d, u) = (r.decimals, r.unit_label);
    let head = [
        "trial".to_string(),
        "field".into(),
        "product".into(),
        "plots".into(),
        format!("stage one ({u})"),
        "SD".into(),
        format!("shrunk ({u})"),
        "95 % interval".into(),
        "P(uplift > 0)".into(),
    ];
    let cells = r
        .locations
        .iter()
        .map(|l| {
            vec![
                l.trial.clone(),
                l.field.clone(),
                l.product.clone(),
                l.plots.to_string(),
                fmt(l.stage_one_uplift, d),
                fmt(l.stage_one_sd, d),
                fmt(l.uplift, d),
                format!("{} to {}", fmt(l.uplift_lo95, d), fmt(l.uplift_hi95, d)),
                super::prob3(l.p_uplift_gt0),
            ]
        })
        .collect();
    (head.to_vec(), cells)
}

fn label(r: &LocationRow) -> String {
    format!("{} · {}", r.trial, r.field)
}

/// Per product, its forest rows: each field's shrunk effect, the season mean ("all") and a
/// new field.
fn forest_rows(r: &SeasonInput, product: &TreatmentRow) -> Vec<TreatmentRow> {
    let mut rows: Vec<TreatmentRow> = r
        .locations
        .iter()
        .filter(|l| l.product == product.treatment)
        .map(|l| TreatmentRow {
            field: label(l),
            treatment: l.product.clone(),
            uplift: l.uplift,
            uplift_lo95: l.uplift_lo95,
            uplift_hi95: l.uplift_hi95,
            break_even: product.break_even,
            ..Default::default()
        })
        .collect();
    rows.push(product.clone());
    if product.new_field_uplift.is_finite() {
        rows.push(TreatmentRow {
            field: "new field".into(),
            treatment: product.treatment.clone(),
            uplift: product.new_field_uplift,
            uplift_lo95: product.new_field_lo95,
            uplift_hi95: product.new_field_hi95,
            break_even: product.break_even,
            ..Default::default()
        });
    }
    rows
}

/// The fields with a position: (trial, field, lon, lat), one per field.
fn places(r: &SeasonInput) -> Vec<(String, String, f64, f64)> {
    let mut seen: BTreeMap<(String, String), (f64, f64)> = BTreeMap::new();
    for l in r.locations {
        if l.lon.is_finite() && l.lat.is_finite() {
            seen.insert((l.trial.clone(), l.field.clone()), (l.lon, l.lat));
        }
    }
    seen.into_iter()
        .map(|((t, f), (x, y))| (t, f, x, y))
        .collect()
}

const TRIAL_COLOURS: [&str; 8] = [
    "#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000", "#F0E442",
];

/// The map of the season's fields: longitude scaled by cos(latitude) so distances look
/// right, coloured by trial.
fn map(s: &mut String, r: &SeasonInput) {
    let pl = places(r);
    let missing = r
        .locations
        .iter()
        .filter(|l| !(l.lon.is_finite() && l.lat.is_finite()))
        .map(label)
        .collect::<std::collections::BTreeSet<_>>();
    if pl.is_empty() {
        let _ = write!(s, "<p>No field has a known position (plot-table runs without coordinates in a known CRS have none).</p>");
        return;
    }
    let lat0 = pl.iter().map(|p| p.3).sum::<f64>() / pl.len() as f64;
    let kx = lat0.to_radians().cos().max(0.05);
    let (mut x0, mut x1, mut y0, mut y1) = (f64::MAX, f64::MIN, f64::MAX, f64::MIN);
    for p in &pl {
        x0 = x0.min(p.2);
        x1 = x1.max(p.2);
        y0 = y0.min(p.3);
        y1 = y1.max(p.3);
    }
    // At least about 2 km across, with a margin.
    let pad = (0.15 * (x1 - x0).max(y1 - y0)).max(0.01);
    let (x0, x1, y0, y1) = (x0 - pad / kx, x1 + pad / kx, y0 - pad, y1 + pad);
    let (w, h) = (560.0, 360.0);
    let k = (w / ((x1 - x0) * kx)).min(h / (y1 - y0));
    let (pw, ph) = ((x1 - x0) * kx * k, (y1 - y0) * k);
    let longest = pl.iter().map(|p| p.0.chars().count()).max().unwrap_or(0);
    let (left, top, bottom) = (70.0, 10.0, 40.0);
    let right = (40.0 + 6.2 * longest as f64).clamp(120.0, 420.0);
    let px = |x: f64| left + (x - x0) * kx * k;
    let py = |y: f64| top + ph - (y - y0) * k;
    let _ = write!(s, "<figure><figcaption>Where the season's fields are (WGS 84; each dot a field, coloured by trial)</figcaption><svg class=\"map\" role=\"img\" aria-label=\"map of the season's fields\" width=\"{:.0}\" height=\"{:.0}\" viewBox=\"0 0 {:.0} {:.0}\" xmlns=\"http://www.w3.org/2000/svg\"><rect x=\"{left}\" y=\"{top}\" width=\"{pw:.1}\" height=\"{ph:.1}\" class=\"frame\"/>", left + pw + right, top + ph + bottom, left + pw + right, top + ph + bottom);
    let step = nice_step((x1 - x0).max(y1 - y0) / 4.0);
    let dec = (-step.log10()).ceil().max(0.0) as usize;
    let mut v = (x0 / step).ceil() * step;
    while v <= x1 {
        let _ = write!(s, "<line x1=\"{:.1}\" y1=\"{:.1}\" x2=\"{:.1}\" y2=\"{:.1}\" class=\"tick\"/><text x=\"{:.1}\" y=\"{:.1}\" class=\"tl\" text-anchor=\"middle\">{v:.dec$}</text>", px(v), top + ph, px(v), top + ph + 4.0, px(v), top + ph + 15.0);
        v += step;
    }
    let mut v = (y0 / step).ceil() * step;
    while v <= y1 {
        let _ = write!(s, "<line x1=\"{:.1}\" y1=\"{:.1}\" x2=\"{:.1}\" y2=\"{:.1}\" class=\"tick\"/><text x=\"{:.1}\" y=\"{:.1}\" class=\"tl\" text-anchor=\"end\">{v:.dec$}</text>", left - 4.0, py(v), left, py(v), left - 6.0, py(v) + 4.0);
        v += step;
    }
    let _ = write!(s, "<text x=\"{:.1}\" y=\"{:.1}\" class=\"al\" text-anchor=\"middle\">longitude (degrees)</text><text transform=\"translate(14 {:.1}) rotate(-90)\" class=\"al\" text-anchor=\"middle\">latitude (degrees)</text>", left + pw / 2.0, top + ph + 32.0, top + ph / 2.0);
    let trials: Vec<&str> = {
        let mut t: Vec<&str> = pl.iter().map(|p| p.0.as_str()).collect();
        t.dedup();
        t
    };
    let colour = |t: &str| TRIAL_COLOURS[trials.iter().position(|x| *x == t).unwrap_or(0) % 8];
    for p in &pl {
        let _ = write!(s, "<circle cx=\"{:.1}\" cy=\"{:.1}\" r=\"5\" fill=\"{}\" stroke=\"#1d2528\" stroke-width=\"0.6\"><title>{} · {} ({:.5}, {:.5})</title></circle><text x=\"{:.1}\" y=\"{:.1}\" class=\"tl\">{}</text>", px(p.2), py(p.3), colour(&p.0), esc(&p.0), esc(&p.1), p.2, p.3, px(p.2) + 7.0, py(p.3) - 5.0, esc(&p.1));
    }
    for (i, t) in trials.iter().enumerate() {
        let y = top + 12.0 + 16.0 * i as f64;
        let _ = write!(s, "<circle cx=\"{:.1}\" cy=\"{:.1}\" r=\"5\" fill=\"{}\"/><text x=\"{:.1}\" y=\"{:.1}\" class=\"tl\">{}</text>", left + pw + 16.0, y, colour(t), left + pw + 26.0, y + 4.0, esc(t));
    }
    let _ = write!(s, "</svg></figure>");
    if !missing.is_empty() {
        let v: Vec<String> = missing.into_iter().collect();
        let _ = write!(
            s,
            "<p class=\"note\">Not on the map (position unknown): {}</p>",
            esc(&v.join(", "))
        );
    }
}

fn spread_words(r: &SeasonInput) -> String {
    let d = r.decimals;
    let i = r.interaction_sd;
    format!(
        "How much a product's effect differs from field to field (the product x field SD, shared by all products): {} {} (95 % interval {} to {}). A field's own estimate is pulled toward the product's mean the more, the smaller this spread is against the field's own uncertainty.",
        fmt(i.mean, d),
        r.unit_label,
        fmt(i.lo95, d),
        fmt(i.hi95, d)
    )
}

/// The HTML season report.
pub fn render(r: &SeasonInput) -> String {
    let d = r.decimals;
    let u = r.unit_label;
    let mut s = String::new();
    let _ = write!(s, "<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'unsafe-inline'\"><title>plotsieve season report: {}</title><style>{CSS}</style></head><body>", esc(r.name));
    let _ = write!(
        s,
        "<header><h1>{}</h1><p class=\"sub\">plotsieve season report: {} trials, {} fields, {}</p></header>",
        esc(r.name),
        r.trials.len(),
        r.trials.iter().map(|t| t.fields).sum::<usize>(),
        esc(r.crop)
    );
    let _ = write!(
        s,
        "<aside class=\"caution\"><strong>Caution.</strong> {}</aside>",
        esc(CAUTION)
    );
    if !r.warnings.is_empty() {
        let _ = write!(s, "<section class=\"warnings\"><h2>Warnings</h2><ul>");
        for w in r.warnings {
            let _ = write!(s, "<li><strong>{}</strong></li>", esc(w));
        }
        let _ = write!(s, "</ul></section>");
    }
    if let Some(rt) = r.rates {
        super::rates::html(&mut s, rt, r.unit_label, super::prices_line(r.money));
    }
    let rows = decision_rows(r.products);
    let _ = write!(
        s,
        "<section class=\"decision\"><h2>{} across the season</h2><p class=\"note\">{}</p>",
        esc(&super::decision_heading(r.check)),
        esc(SEASON_WORDS)
    );
    let (head, cells) = decision_cells(&rows, d, u, area_of(r.money), fields_column(r), Vec::new());
    table(&mut s, &head, &cells, 1);
    if let Some(p) = prices_line(r.money) {
        let _ = write!(s, "<p class=\"note\">{}</p>", esc(&p));
    }
    let all: Vec<&TreatmentRow> = rows.clone();
    forest(
        &mut s,
        &all,
        u,
        "Season mean uplift over the check with 95 % intervals; the dashed line is zero",
    );
    let _ = write!(s, "</section>");
    let _ = write!(s, "<section><h2>Each product across the fields</h2><p class=\"note\">Grey: the product's effect in each field (trial · field), shrunk toward its mean; blue: the season mean (all); the last row: a new field.</p><div class=\"maps\">");
    for p in &rows {
        let fr = forest_rows(r, p);
        let refs: Vec<&TreatmentRow> = fr.iter().collect();
        forest_labelled(
            &mut s,
            &refs,
            u,
            &format!("{}: uplift per field with 95 % intervals", p.treatment),
            |t| t.field.clone(),
        );
    }
    let _ = write!(s, "</div></section>");
    let _ = write!(s, "<section><h2>Where the fields are</h2>");
    map(&mut s, r);
    let _ = write!(s, "</section>");
    let _ = write!(s, "<section><h2>Per field: stage one and shrunk</h2><p class=\"note\">Stage one: the field's own estimate from its trial's adjust stage. Shrunk: its effect there given the whole season.</p>");
    let (head, cells) = per_field(r);
    table(&mut s, &head, &cells, 3);
    let _ = write!(s, "</section>");
    let _ = write!(
        s,
        "<section><h2>Spread between fields</h2><p>{}</p></section>",
        esc(&spread_words(r))
    );
    let _ = write!(
        s,
        "<section><h2>Method</h2><p>{}</p></section>",
        esc(SEASON_METHOD)
    );
    let _ = write!(s, "<section><h2>Trials read</h2><table><thead><tr><th>trial</th><th>run folder</th><th>fields</th><th>contrasts file SHA-256</th></tr></thead><tbody>");
    for t in r.trials {
        let _ = write!(
            s,
            "<tr><td>{}</td><td>{}</td><td class=\"n\">{}</td><td><code>{}</code></td></tr>",
            esc(&t.trial),
            esc(&t.run_folder),
            t.fields,
            esc(&t.contrasts_sha256)
        );
    }
    let _ = writeln!(
        s,
        "</tbody></table></section><footer>plotsieve season report</footer></body></html>"
    );
    s
}

/// The Markdown season report.
pub fn markdown(r: &SeasonInput) -> String {
    let d = r.decimals;
    let u = r.unit_label;
    let mut s = String::new();
    let _ = writeln!(s, "# {}: season report\n", r.name);
    let _ = writeln!(
        s,
        "{} trials, {} fields, {}.\n",
        r.trials.len(),
        r.trials.iter().map(|t| t.fields).sum::<usize>(),
        r.crop
    );
    let _ = writeln!(s, "> **Caution.** {CAUTION}\n");
    if !r.warnings.is_empty() {
        let _ = writeln!(s, "## Warnings\n");
        for w in r.warnings {
            let _ = writeln!(s, "- **{w}**");
        }
        let _ = writeln!(s);
    }
    if let Some(rt) = r.rates {
        super::rates::markdown(&mut s, rt, r.unit_label, super::prices_line(r.money));
    }
    let rows = decision_rows(r.products);
    let _ = writeln!(
        s,
        "## {} across the season\n\n{SEASON_WORDS}\n",
        super::decision_heading(r.check)
    );
    let (head, cells) = decision_cells(&rows, d, u, area_of(r.money), fields_column(r), Vec::new());
    markdown_table(&mut s, &head, &cells, 1);
    if let Some(p) = prices_line(r.money) {
        let _ = writeln!(s, "\n{p}");
    }
    let _ = writeln!(s, "\n## Per field: stage one and shrunk\n");
    let (head, cells) = per_field(r);
    markdown_table(&mut s, &head, &cells, 3);
    let _ = writeln!(s, "\n## Spread between fields\n\n{}\n", spread_words(r));
    let _ = writeln!(s, "## Where the fields are\n");
    let pl = places(r);
    if pl.is_empty() {
        let _ = writeln!(s, "No field has a known position.\n");
    } else {
        let _ = writeln!(
            s,
            "| trial | field | longitude | latitude |\n|---|---|---:|---:|"
        );
        for p in &pl {
            let _ = writeln!(s, "| {} | {} | {:.5} | {:.5} |", p.0, p.1, p.2, p.3);
        }
        let _ = writeln!(s);
    }
    let _ = writeln!(s, "## Method\n\n{SEASON_METHOD}\n");
    let _ = writeln!(s, "## Trials read\n\n| trial | run folder | fields | contrasts file SHA-256 |\n|---|---|---:|---|");
    for t in r.trials {
        let _ = writeln!(
            s,
            "| {} | {} | {} | `{}` |",
            t.trial, t.run_folder, t.fields, t.contrasts_sha256
        );
    }
    s
}
