//! Unit tests of the report's plain-words helpers.

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
