//! The report as Markdown: the same sections as the HTML report, in the same order.

use super::*;

/// Render the Markdown report.
pub fn render(r: &ReportInput) -> String {
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
    if let Some(rt) = r.rates {
        super::rates::markdown(&mut s, rt, r.unit_label, prices_line(r.money));
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
