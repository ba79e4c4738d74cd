use super::*;

#[test]
fn locate_in_square_and_hole() {
    let sq = PlotPolygon {
        plot_id: "a".into(),
        exterior: vec![
            (0.0, 0.0),
            (10.0, 0.0),
            (10.0, 10.0),
            (0.0, 10.0),
            (0.0, 0.0),
        ],
        holes: vec![vec![
            (4.0, 4.0),
            (6.0, 4.0),
            (6.0, 6.0),
            (4.0, 6.0),
            (4.0, 4.0),
        ]],
    };
    let polys = vec![to_geo(&sq)];
    let t = index(&polys);
    assert_eq!(locate(&t, &polys, 1.0, 1.0), Some(0));
    assert_eq!(locate(&t, &polys, 5.0, 5.0), None, "inside the hole");
    assert_eq!(locate(&t, &polys, 11.0, 1.0), None);
    // Area 100 - 4 = 96 m2 by hand.
    assert!((polys[0].unsigned_area() - 96.0).abs() < 1e-9);
}

#[test]
fn trimmed_mean_by_hand() {
    // 10 values, 10 % off each tail: drop 1 and 100, mean of 2..=9 is 5.5.
    let mut v: Vec<f64> = (1..=9).map(f64::from).collect();
    v.push(100.0);
    assert_eq!(trimmed_mean(&v, 0.1), 5.5);
    assert_eq!(trimmed_mean(&[3.0], 0.4), 3.0);
}

#[test]
fn ranks_group_by_gaps() {
    assert_eq!(
        ranks(&[0.0, 66.0, 0.5, 132.0, 65.0], 30.0),
        vec![1, 2, 1, 3, 2]
    );
}
