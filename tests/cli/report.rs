//! report.html in headless Chromium, without the network.

use crate::common::*;

#[test]
fn report_html_renders_in_headless_chromium_without_the_network() {
    let w = Workdir::new("html");
    let out = w.path("run");
    ok(&plotsieve(
        &w.0,
        &[
            "run",
            repo().join("sample-input/trial.toml").to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
            "--quiet",
        ],
    ));
    let html = std::fs::read_to_string(out.join("5-report/report.html")).unwrap();
    // Self-contained: no scripts, no external references; a policy that forbids fetching.
    for bad in ["<script", "src=", "href=", "url(", "@import"] {
        assert!(!html.contains(bad), "report.html contains {bad}");
    }
    assert!(html.contains("default-src 'none'; style-src 'unsafe-inline'; img-src data:\""));
    assert!(html.contains("statistical estimates") && html.contains("licensed agronomic advice"));
    // Maps (5 per field), the forest plot, legends and axis units.
    assert_eq!(html.matches("<svg class=\"map\"").count(), 10);
    // Two forest plots: the decision's (pooled rows only) and the per-field section's.
    assert_eq!(html.matches("<svg class=\"forest\"").count(), 2);
    assert_eq!(html.matches("east from map corner (m)").count(), 10);
    assert!(html.contains("uplift over the check (t/ha)"));
    let chromium = ["/usr/bin/chromium", "/usr/bin/chromium-browser"]
        .into_iter()
        .find(|p| Path::new(p).exists());
    let Some(chromium) = chromium else {
        assert!(
            std::env::var("CI").is_err(),
            "CI must install chromium (.ci/run does)"
        );
        eprintln!("skipped the browser part: no chromium here (install Debian's chromium package)");
        return;
    };
    let netlog = w.path("netlog.json");
    let o = Command::new(chromium)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--host-resolver-rules=MAP * ~NOTFOUND",
        ])
        .arg(format!("--user-data-dir={}", w.path("profile").display()))
        .arg(format!("--log-net-log={}", netlog.display()))
        .arg("--dump-dom")
        .arg(format!(
            "file://{}",
            out.join("5-report/report.html").display()
        ))
        .output()
        .expect("chromium runs");
    assert!(
        o.status.success(),
        "chromium failed: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    let dom = String::from_utf8_lossy(&o.stdout);
    assert_eq!(
        dom.matches("<svg class=\"map\"").count(),
        10,
        "the browser built every map"
    );
    assert!(dom.matches("<table").count() >= 6, "tables present");
    // The report starts with the answer: the first table the browser built is the decision
    // table (one row per product, pooled over fields), with the forest plot beside it.
    let first = dom.find("<table").unwrap();
    let heading = &dom[dom[..first].rfind("<h2").unwrap()..first];
    assert!(
        heading.contains("Decision: products against the check<"),
        "{heading}"
    );
    let table = &dom[first..first + dom[first..].find("</table>").unwrap()];
    assert!(table.contains("<th>product</th>") && table.contains("P(uplift &gt; 0)"));
    assert_eq!(
        table.matches("<tr>").count(),
        1 + 5,
        "a header and the five products"
    );
    for p in ["prod-a", "prod-b", "prod-c", "prod-d", "prod-e"] {
        assert!(table.contains(&format!("<td>{p}</td>")), "{p}");
    }
    let decision_end = first + dom[first..].find("</section>").unwrap();
    assert!(dom[first..decision_end].contains("<svg class=\"forest\""));
    assert!(dom.find("Points and plots through the stages").unwrap() > decision_end);
    // report.md opens the same way: after the caution (and warnings), the decision.
    let md = read(&out.join("5-report/report.md"));
    let sections: Vec<&str> = md.lines().filter(|l| l.starts_with("## ")).collect();
    let first_md = sections
        .iter()
        .find(|l| !l.starts_with("## Warnings"))
        .unwrap();
    assert_eq!(*first_md, "## Decision: products against the check");
    assert!(dom.contains("<circle"), "points drawn");
    // The page itself asked for nothing: every URL in the network log is the report's own
    // file or the browser's own background services (which the flags and the host rules keep
    // from resolving).
    let log = std::fs::read_to_string(&netlog).unwrap_or_default();
    for url in log
        .split("\"url\":\"")
        .skip(1)
        .map(|s| s.split('"').next().unwrap_or(""))
    {
        let ok_url = url.starts_with("file://")
            || url.starts_with("data:")
            || ["google.com/", "googleapis.com/", "gstatic.com/"]
                .iter()
                .any(|h| url.contains(h));
        assert!(ok_url, "unexpected network request {url}");
    }
}

#[test]
fn a_field_of_many_records_is_mapped_as_an_image_of_cell_means() {
    // One field of 24 blocks (about 9,500 records, more than the 8,000 drawn one by one):
    // the two record maps are PNG images embedded as data URIs (the only references in the
    // page), their captions count the records, and the page stays small.
    let w = Workdir::new("report-raster");
    ok(&plotsieve(
        &w.0,
        &[
            "simulate", "sim", "--fields", "1", "--blocks", "24", "--seed", "3", "--quiet",
        ],
    ));
    ok(&plotsieve(
        &w.0,
        &["run", "sim/trial.toml", "--out", "run", "--quiet"],
    ));
    let html = read(&w.path("run/5-report/report.html"));
    let images: Vec<&str> = html.split("<image ").skip(1).collect();
    assert_eq!(images.len(), 2, "raw yield and removed records");
    assert_eq!(
        html.matches("href=").count(),
        html.matches("href=\"data:image/png;base64,").count()
    );
    assert!(!html.contains("<circle cx") || html.matches("<circle").count() < 100);
    let caption = html
        .split("every record, raw yield (t/ha); ")
        .nth(1)
        .expect("raster caption");
    let records: usize = caption.split(' ').next().unwrap().parse().unwrap();
    assert!(records > 8000 && records < 20_000, "{records}");
    assert!(caption.starts_with(&format!("{records} records, each 2-pixel cell their mean")));
    for img in images {
        let b64 = img
            .split("base64,")
            .nth(1)
            .unwrap()
            .split('"')
            .next()
            .unwrap();
        // PNG signature 89 50 4E 47 0D 0A 1A 0A is "iVBORw0KGgo" in base64.
        assert!(b64.starts_with("iVBORw0KGgo"), "{}", &b64[..20]);
        assert!(b64.len() < 60_000);
    }
    assert!(html.len() < 1_500_000, "{} bytes", html.len());
}

#[test]
fn economics_columns_appear_only_with_a_price() {
    let w = Workdir::new("report-economics");
    let t = repo().join("sample-input/trial.toml");
    let t = t.to_str().unwrap();
    ok(&plotsieve(&w.0, &["run", t, "--out", "plain", "--quiet"]));
    let html = read(&w.path("plain/5-report/report.html"));
    assert!(html.contains("<th>P(uplift &gt; 0)</th>"));
    assert!(
        !html.contains("<th>break-even"),
        "no price: no blank economics columns"
    );
    run_trial(&w, Path::new(t), "priced", &["adjust.grain_price=180"]);
    let html = read(&w.path("priced/5-report/report.html"));
    assert!(
        html.contains("<th>break-even (t/ha)</th>")
            && html.contains("<th>expected net return per ha</th>")
    );
    // A new field's odds: pooled rows only, wider than the average field's, in both
    // reports with P(uplift > break-even) only when priced.
    for r in csv_rows(&w.path("priced/4-adjust/treatments.csv")) {
        let v = &r["new_field_uplift_t_ha"];
        if r["field"] != "all" || r["treatment"] == "check" {
            assert_eq!(v, "", "{r:?}");
            continue;
        }
        let f = |k: &str| -> f64 { r[k].parse().unwrap() };
        assert!(f("new_field_sd_t_ha") > f("uplift_sd_t_ha"), "{r:?}");
        assert!(f("new_field_lo95_t_ha") < f("uplift_lo95_t_ha"), "{r:?}");
        assert!(
            (0.0..=1.0).contains(&f("p_new_field_gt_break_even")),
            "{r:?}"
        );
    }
    assert!(html.contains("<h3>In a field that was not in the trial</h3>"));
    let md = read(&w.path("plain/5-report/report.md"));
    assert!(
        md.contains("### In a field that was not in the trial")
            && !md.contains("P(uplift > break-even) |\n|---"),
        "{md}"
    );
    // comparison.csv: how far the spatial and non-spatial rankings agree.
    let rows = csv_rows(&w.path("plain/4-adjust/comparison.csv"));
    for r in &rows {
        let rho: f64 = r["rank_correlation"].parse().unwrap();
        let top: f64 = r["top_quarter_overlap"].parse().unwrap();
        assert!(
            (-1.0..=1.0).contains(&rho) && (0.0..=1.0).contains(&top),
            "{r:?}"
        );
    }
}
