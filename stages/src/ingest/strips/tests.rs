use super::*;

/// A point at (x, y) with the given time and width, in export `file`.
fn pt(file: u32, t: f64, x: f64, y: f64, w: f64) -> Point {
    Point {
        id: 0,
        file,
        row: 0,
        time_s: t,
        lon: 0.0,
        lat: 0.0,
        x_m: x,
        y_m: y,
        flow_kg_s: 1.0,
        speed_m_s: 2.0,
        width_m: w,
        moisture_pct: 18.0,
        work_state: 1.0,
        hdop: f64::NAN,
        fix_quality: f64::NAN,
        applied_rate: f64::NAN,
        yield_kg_ha: f64::NAN,
    }
}

/// `build` on one export named `name`.
fn build_one(
    (points, labels, table): (&[Point], &[u32], &[[String; 3]]),
    name: &str,
    s: &StripSettings,
) -> Result<Built, String> {
    build(points, labels, table, &[name.to_string()], s)
}

fn settings() -> StripSettings {
    StripSettings {
        plot_length_m: 0.0,
        min_records: 20,
        fallback_width_m: None,
        source: "column \"treatment\" (columns.treatment)".into(),
    }
}

/// Strips `w` wide running north, driven back and forth, one pass each, records every
/// 2 m from y = 0 to 200: treatments as given, west to east.
fn strip_field(treatments: &[&str], w: f64) -> (Vec<Point>, Vec<u32>, Vec<[String; 3]>) {
    let mut table: Vec<[String; 3]> = vec![Default::default()];
    let mut points = Vec::new();
    let mut labels = Vec::new();
    let mut t = 0.0;
    for (k, tr) in treatments.iter().enumerate() {
        let l = intern(&mut table, &treatment_key(tr));
        let x = 500_000.0 + (k as f64 + 0.5) * w;
        for j in 0..=100 {
            let y = if k % 2 == 0 {
                2.0 * j as f64
            } else {
                200.0 - 2.0 * j as f64
            };
            points.push(pt(0, t, x, 4_000_000.0 + y, w));
            labels.push(l);
            t += 1.0;
        }
    }
    (points, labels, table)
}

#[test]
fn alternating_strips_become_one_plot_each_with_pair_replicates() {
    let f = strip_field(&["check", "prod", "check", "prod", "check", "prod"], 9.0);
    let b = build_one((&f.0, &f.1, &f.2), "monitor/north-40.csv", &settings()).unwrap();
    assert_eq!(b.polygons.len(), 6);
    let ids: Vec<&str> = b.design.iter().map(|d| d.plot_id.as_str()).collect();
    assert_eq!(ids[0], "north-40-S01-P01");
    assert!(b.design.iter().all(|d| d.field == "north-40"));
    // Treatments in strip order west to east (the across axis points west or east; the
    // order is either the written one or its reverse), replicates in pairs.
    let tr: Vec<&str> = b.design.iter().map(|d| d.treatment.as_str()).collect();
    let written = ["check", "prod", "check", "prod", "check", "prod"];
    let mut rev = written;
    rev.reverse();
    assert!(tr == written || tr == rev, "{tr:?}");
    let blocks: Vec<&str> = b.design.iter().map(|d| d.block.as_str()).collect();
    assert!(
        blocks == ["1", "1", "2", "2", "3", "3"] || blocks == ["3", "3", "2", "2", "1", "1"],
        "{blocks:?}"
    );
    // Each strip: 9 m across its pass centre, from 1 m before the first record to 1 m
    // after the last along travel (half a step each end): 9 x 202 m.
    for p in &b.polygons {
        let xs: Vec<f64> = p.exterior.iter().map(|q| q.0).collect();
        let ys: Vec<f64> = p.exterior.iter().map(|q| q.1).collect();
        let span = |v: &[f64]| {
            v.iter().cloned().fold(f64::MIN, f64::max) - v.iter().cloned().fold(f64::MAX, f64::min)
        };
        assert!((span(&xs) - 9.0).abs() < 1e-6, "{}", span(&xs));
        assert!((span(&ys) - 202.0).abs() < 1e-6, "{}", span(&ys));
    }
    assert_eq!(b.details["fields"]["north-40"]["strips"], 6);
    assert!(b.warnings.is_empty(), "{:?}", b.warnings);
}

#[test]
fn adjacent_passes_of_one_treatment_are_one_strip_cut_into_plots() {
    // Two passes of the check, two of the product, two of the check.
    let f = strip_field(&["check", "check", "prod", "prod", "check", "check"], 9.0);
    let s = StripSettings {
        plot_length_m: 50.0,
        ..settings()
    };
    let b = build_one((&f.0, &f.1, &f.2), "f.csv", &s).unwrap();
    // Three strips 18 m wide, each 202 m cut into 4 plots of 50.5 m.
    assert_eq!(b.details["fields"]["f"]["strips"], 3);
    assert_eq!(b.polygons.len(), 12);
    let area: f64 = b.polygons.iter().map(|p| ring_area(&p.exterior)).sum();
    assert!((area - 3.0 * 18.0 * 202.0).abs() < 1e-3, "{area}");
    assert_eq!(b.design.iter().filter(|d| d.treatment == "prod").count(), 4);
}

fn ring_area(r: &[(f64, f64)]) -> f64 {
    0.5 * r
        .windows(2)
        .map(|w| w[0].0 * w[1].1 - w[1].0 * w[0].1)
        .sum::<f64>()
}

#[test]
fn stray_labels_and_gps_jumps_make_no_plot_and_are_reported() {
    let (mut points, mut labels, mut table) = strip_field(&["check", "prod"], 9.0);
    // A GPS jump 40 m sideways in the first strip's run, and six records of a typo'd
    // label beyond the strips.
    points[50].x_m += 40.0;
    let chek = intern(&mut table, &treatment_key("chek"));
    let mut t = 1000.0;
    for j in 0..6 {
        points.push(pt(0, t, 500_100.0, 4_000_000.0 + 2.0 * j as f64, 9.0));
        labels.push(chek);
        t += 1.0;
    }
    let b = build_one((&points, &labels, &table), "f.csv", &settings()).unwrap();
    assert_eq!(b.polygons.len(), 2);
    assert_eq!(b.details["fields"]["f"]["records_in_short_runs"], 6);
    assert_eq!(b.details["fields"]["f"]["isolated_records"], 1);
    assert!(
        b.warnings
            .iter()
            .any(|w| w.contains("chek (6 at 0 to 10 m along")),
        "{:?}",
        b.warnings
    );
    // The jump does not widen the strip: still 9 m by 202 m.
    let area = ring_area(&b.polygons[0].exterior).abs();
    assert!((area - 9.0 * 202.0).abs() < 1e-3, "{area}");
}

#[test]
fn named_strips_and_replicates_are_taken_from_their_columns() {
    let (points, mut labels, mut table) = strip_field(&["check", "prod", "check", "prod"], 9.0);
    // Replicates I, I, II, II named on the records; strips named too.
    let names = [("1", "I"), ("2", "I"), ("3", "II"), ("4", "II")];
    let base = table.clone();
    table.truncate(1);
    for (k, l) in labels.iter_mut().enumerate() {
        let strip = k / 101;
        let e = [
            base[*l as usize][0].clone(),
            names[strip].0.to_string(),
            names[strip].1.to_string(),
        ];
        *l = intern(&mut table, &e);
    }
    let b = build_one((&points, &labels, &table), "f.csv", &settings()).unwrap();
    assert_eq!(b.polygons.len(), 4);
    let mut pairs: Vec<(String, String)> = b
        .design
        .iter()
        .map(|d| (d.treatment.clone(), d.block.clone()))
        .collect();
    pairs.sort();
    assert_eq!(
        pairs,
        [
            ("check", "I"),
            ("check", "II"),
            ("prod", "I"),
            ("prod", "II")
        ]
        .map(|(a, b)| (a.to_string(), b.to_string()))
    );
    assert_eq!(
        b.details["fields"]["f"]["replicates"],
        "from columns.replicate"
    );
}

#[test]
fn no_label_at_all_is_an_error_naming_the_key() {
    let (points, _, table) = strip_field(&["check"], 9.0);
    let labels = vec![0; points.len()];
    let e = build_one((&points, &labels, &table), "f.csv", &settings()).unwrap_err();
    assert!(e.contains("columns.treatment"), "{e}");
}
