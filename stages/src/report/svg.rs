//! The SVG and table pieces the HTML reports draw with: colour scales (viridis, PuOr,
//! Okabe-Ito), a map panel with its axes and legend, the forest plot, and tables.

use crate::adjust::TreatmentRow;
use crate::util::fmt;
use std::fmt::Write as _;

/// Fields with more records than this draw them as a raster (see `raster`).
pub(crate) const MAX_CIRCLES: usize = 8000;

pub(crate) const VIRIDIS: [&str; 10] = [
    "#440154", "#482878", "#3e4989", "#31688e", "#26828e", "#1f9e89", "#35b779", "#6ece58",
    "#b5de2b", "#fde725",
];

pub(crate) const PUOR: [&str; 11] = [
    "#2d004b", "#542788", "#8073ac", "#b2abd2", "#d8daeb", "#f7f7f7", "#fee0b6", "#fdb863",
    "#e08214", "#b35806", "#7f3b08",
];

pub(crate) const OKABE_ITO: [&str; 8] = [
    "#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7", "#000000",
];

fn hex(c: &str) -> (f64, f64, f64) {
    let v = |i: usize| u8::from_str_radix(&c[i..i + 2], 16).unwrap_or(0) as f64;
    (v(1), v(3), v(5))
}

/// Colour at t in [0, 1] on a scale given by anchors, by linear interpolation.
pub fn scale(anchors: &[&str], t: f64) -> String {
    let t = if t.is_finite() {
        t.clamp(0.0, 1.0)
    } else {
        0.5
    };
    let x = t * (anchors.len() - 1) as f64;
    let i = (x.floor() as usize).min(anchors.len() - 2);
    let w = x - i as f64;
    let (a, b) = (hex(anchors[i]), hex(anchors[i + 1]));
    let m = |p: f64, q: f64| (p + (q - p) * w).round() as u8;
    format!("#{:02x}{:02x}{:02x}", m(a.0, b.0), m(a.1, b.1), m(a.2, b.2))
}

pub(crate) fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// Map frame: projected extent to an SVG panel with axes in metres from the lower-left.
pub(crate) struct Panel {
    pub(crate) x0: f64,
    pub(crate) y0: f64,
    pub(crate) k: f64,
    pub(crate) w: f64,
    pub(crate) h: f64,
}

pub(crate) const PAD_L: f64 = 52.0;

pub(crate) const PAD_B: f64 = 36.0;

pub(crate) const PAD_T: f64 = 10.0;

pub(crate) const LEGEND_W: f64 = 120.0;

impl Panel {
    pub(crate) fn new(x0: f64, y0: f64, x1: f64, y1: f64, width: f64) -> Panel {
        let k = (width / (x1 - x0).max(1.0)).min(420.0 / (y1 - y0).max(1.0));
        Panel {
            x0,
            y0,
            k,
            w: (x1 - x0) * k,
            h: (y1 - y0) * k,
        }
    }
    pub(crate) fn px(&self, x: f64) -> f64 {
        PAD_L + (x - self.x0) * self.k
    }
    pub(crate) fn py(&self, y: f64) -> f64 {
        PAD_T + self.h - (y - self.y0) * self.k
    }
    pub(crate) fn open(&self, s: &mut String, title: &str) {
        let _ = write!(
            s,
            "<figure><figcaption>{}</figcaption><svg class=\"map\" role=\"img\" aria-label=\"{}\" width=\"{:.0}\" height=\"{:.0}\" viewBox=\"0 0 {:.0} {:.0}\" xmlns=\"http://www.w3.org/2000/svg\">",
            esc(title),
            esc(title),
            PAD_L + self.w + LEGEND_W,
            PAD_T + self.h + PAD_B,
            PAD_L + self.w + LEGEND_W,
            PAD_T + self.h + PAD_B
        );
        let _ = write!(
            s,
            "<rect x=\"{PAD_L}\" y=\"{PAD_T}\" width=\"{:.1}\" height=\"{:.1}\" class=\"frame\"/>",
            self.w, self.h
        );
    }
    pub(crate) fn axes(&self, s: &mut String) {
        let step = nice_step((self.w / self.k).max(self.h / self.k) / 4.0);
        let mut v = 0.0;
        while v <= self.w / self.k + 1e-9 {
            let x = PAD_L + v * self.k;
            let _ = write!(s, "<line x1=\"{x:.1}\" y1=\"{:.1}\" x2=\"{x:.1}\" y2=\"{:.1}\" class=\"tick\"/><text x=\"{x:.1}\" y=\"{:.1}\" class=\"tl\" text-anchor=\"middle\">{v:.0}</text>", PAD_T + self.h, PAD_T + self.h + 4.0, PAD_T + self.h + 15.0);
            v += step;
        }
        let mut v = 0.0;
        while v <= self.h / self.k + 1e-9 {
            let y = PAD_T + self.h - v * self.k;
            let _ = write!(s, "<line x1=\"{:.1}\" y1=\"{y:.1}\" x2=\"{PAD_L}\" y2=\"{y:.1}\" class=\"tick\"/><text x=\"{:.1}\" y=\"{:.1}\" class=\"tl\" text-anchor=\"end\">{v:.0}</text>", PAD_L - 4.0, PAD_L - 6.0, y + 4.0);
            v += step;
        }
        let _ = write!(s, "<text x=\"{:.1}\" y=\"{:.1}\" class=\"al\" text-anchor=\"middle\">east from map corner (m)</text>", PAD_L + self.w / 2.0, PAD_T + self.h + 31.0);
        let _ = write!(s, "<text transform=\"translate(12 {:.1}) rotate(-90)\" class=\"al\" text-anchor=\"middle\">north (m)</text>", PAD_T + self.h / 2.0);
    }
    pub(crate) fn colourbar(
        &self,
        s: &mut String,
        anchors: &[&str],
        lo: f64,
        hi: f64,
        label: &str,
        d: usize,
    ) {
        let x = PAD_L + self.w + 16.0;
        let (top, hgt) = (PAD_T + 14.0, (self.h - 28.0).max(60.0));
        let _ = write!(
            s,
            "<text x=\"{x:.1}\" y=\"{:.1}\" class=\"tl\">{}</text>",
            PAD_T + 8.0,
            esc(label)
        );
        for i in 0..20 {
            let t = 1.0 - i as f64 / 19.0;
            let _ = write!(
                s,
                "<rect x=\"{x:.1}\" y=\"{:.1}\" width=\"14\" height=\"{:.2}\" fill=\"{}\"/>",
                top + hgt * i as f64 / 20.0,
                hgt / 20.0 + 0.5,
                scale(anchors, t)
            );
        }
        let _ = write!(s, "<text x=\"{:.1}\" y=\"{:.1}\" class=\"tl\">{}</text><text x=\"{:.1}\" y=\"{:.1}\" class=\"tl\">{}</text>", x + 18.0, top + 8.0, fmt(hi, d), x + 18.0, top + hgt, fmt(lo, d));
    }
}

pub(crate) fn nice_step(x: f64) -> f64 {
    let p = 10f64.powf(x.max(1e-9).log10().floor());
    [1.0, 2.0, 5.0, 10.0]
        .iter()
        .map(|m| m * p)
        .find(|v| *v >= x)
        .unwrap_or(10.0 * p)
}

pub(crate) fn quantile(v: &[f64], q: f64) -> f64 {
    let mut s: Vec<f64> = v.iter().copied().filter(|x| x.is_finite()).collect();
    if s.is_empty() {
        return f64::NAN;
    }
    s.sort_by(|a, b| a.total_cmp(b));
    s[((s.len() - 1) as f64 * q).round() as usize]
}

pub(crate) fn ring_path(p: &Panel, ring: &[(f64, f64)]) -> String {
    let mut d = String::new();
    for (i, (x, y)) in ring.iter().enumerate() {
        let _ = write!(
            d,
            "{}{:.1},{:.1}",
            if i == 0 { "M" } else { "L" },
            p.px(*x),
            p.py(*y)
        );
    }
    d.push('Z');
    d
}

/// The forest plot of uplifts over the check, 95 % intervals (pooled rows in blue).
pub(crate) fn forest(s: &mut String, rows: &[&TreatmentRow], u: &str, caption: &str) {
    forest_labelled(s, rows, u, caption, |t| {
        format!("{} / {}", t.field, t.treatment)
    })
}

/// [`forest`] with each row's label from `label`; the label column widens for long labels.
pub(crate) fn forest_labelled(
    s: &mut String,
    rows: &[&TreatmentRow],
    u: &str,
    caption: &str,
    label: impl Fn(&TreatmentRow) -> String,
) {
    if !rows.is_empty() {
        let lo = rows
            .iter()
            .map(|t| t.uplift_lo95)
            .chain(rows.iter().map(|t| t.break_even).filter(|v| v.is_finite()))
            .fold(0.0, f64::min);
        let hi = rows
            .iter()
            .map(|t| t.uplift_hi95)
            .chain(rows.iter().map(|t| t.break_even).filter(|v| v.is_finite()))
            .fold(0.0, f64::max);
        let longest = rows
            .iter()
            .map(|t| label(t).chars().count())
            .max()
            .unwrap_or(0);
        let left = (10.0 + 6.2 * longest as f64).clamp(150.0, 480.0);
        let (w, rh) = (520.0, 18.0);
        let h = rows.len() as f64 * rh + 50.0;
        let x = |v: f64| left + (v - lo) / (hi - lo).max(1e-9) * w;
        let ticks = if rows.iter().any(|t| t.break_even.is_finite()) {
            ", ticks mark each product's break-even"
        } else {
            ""
        };
        let _ = write!(s, "<figure><figcaption>{}{ticks}</figcaption><svg class=\"forest\" role=\"img\" aria-label=\"forest plot of uplifts\" width=\"{:.0}\" height=\"{h:.0}\" viewBox=\"0 0 {:.0} {h:.0}\" xmlns=\"http://www.w3.org/2000/svg\">", esc(caption), left + w + 20.0, left + w + 20.0);
        let _ = write!(
            s,
            "<line x1=\"{:.1}\" y1=\"4\" x2=\"{:.1}\" y2=\"{:.1}\" class=\"zero\"/>",
            x(0.0),
            x(0.0),
            h - 34.0
        );
        for (k, t) in rows.iter().enumerate() {
            let y = 12.0 + k as f64 * rh;
            let c = if t.field == "all" {
                "#0072B2"
            } else {
                "#555555"
            };
            let _ = write!(s, "<text x=\"{:.1}\" y=\"{:.1}\" class=\"tl\" text-anchor=\"end\">{}</text><line x1=\"{:.1}\" y1=\"{y:.1}\" x2=\"{:.1}\" y2=\"{y:.1}\" stroke=\"{c}\" stroke-width=\"2\"/><circle cx=\"{:.1}\" cy=\"{y:.1}\" r=\"3.5\" fill=\"{c}\"/>", left - 8.0, y + 4.0, esc(&label(t)), x(t.uplift_lo95), x(t.uplift_hi95), x(t.uplift));
            if t.break_even.is_finite() {
                let _ = write!(s, "<line x1=\"{:.1}\" y1=\"{:.1}\" x2=\"{:.1}\" y2=\"{:.1}\" stroke=\"#D55E00\" stroke-width=\"2\"/>", x(t.break_even), y - 6.0, x(t.break_even), y + 6.0);
            }
        }
        let step = nice_step((hi - lo) / 5.0);
        // Ticks at whole multiples of the step (a running sum would label zero "-0.00").
        let mut k = (lo / step).ceil();
        while k * step <= hi + 1e-12 {
            let v = if k == 0.0 { 0.0 } else { k * step };
            let _ = write!(s, "<line x1=\"{:.1}\" y1=\"{:.1}\" x2=\"{:.1}\" y2=\"{:.1}\" class=\"tick\"/><text x=\"{:.1}\" y=\"{:.1}\" class=\"tl\" text-anchor=\"middle\">{}</text>", x(v), h - 34.0, x(v), h - 30.0, x(v), h - 19.0, fmt(v, 2));
            k += 1.0;
        }
        let _ = write!(s, "<text x=\"{:.1}\" y=\"{:.1}\" class=\"al\" text-anchor=\"middle\">uplift over the check ({u})</text></svg></figure>", left + w / 2.0, h - 4.0);
    }
}

/// An HTML table: the first `left` columns text, the others numbers (right-aligned).
pub(crate) fn table(s: &mut String, head: &[String], cells: &[Vec<String>], left: usize) {
    let _ = write!(s, "<table><thead><tr>");
    for h in head {
        let _ = write!(s, "<th>{}</th>", esc(h));
    }
    let _ = write!(s, "</tr></thead><tbody>");
    for row in cells {
        for (k, c) in row.iter().enumerate() {
            let row_start = if k == 0 { "<tr>" } else { "" };
            let cell = if k < left { "<td>" } else { "<td class=\"n\">" };
            let _ = write!(s, "{row_start}{cell}{}</td>", esc(c));
        }
        let _ = write!(s, "</tr>");
    }
    let _ = write!(s, "</tbody></table>");
}
