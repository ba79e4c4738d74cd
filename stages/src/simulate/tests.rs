use super::*;

#[test]
fn iso_round_trip() {
    assert_eq!(iso(946_684_800.0), "2000-01-01T00:00:00Z");
    assert_eq!(iso(1_789_722_000.0), "2026-09-18T09:00:00Z");
    assert_eq!(
        crate::ingest::parse_iso8601(&iso(1_789_722_061.0)),
        Some(1_789_722_061.0)
    );
}

#[test]
fn same_seed_same_trial() {
    let a = generate(&SimOptions::default());
    let b = generate(&SimOptions::default());
    assert_eq!(a.files, b.files);
    let c = generate(&SimOptions {
        seed: 2,
        ..Default::default()
    });
    assert_ne!(a.files[0].1, c.files[0].1);
    assert!(a.points > 3000, "{}", a.points);
}
