use super::*;

#[test]
fn the_work_counters_count_forms_evaluations_and_searches() {
    // Other tests run in this process at the same time: the counts can only have grown
    // by at least this test's own work.
    let d = Design {
        y: (0..30).map(|i| (i as f64 * 0.37).sin()).collect(),
        x: vec![1.0; 30],
        p: 1,
        coords: (0..30)
            .map(|i| (10.0 * (i % 6) as f64, 40.0 * (i / 6) as f64))
            .collect(),
        kernel: Kernel::Matern52,
        groups: Vec::new(),
        basis_cache: Default::default(),
    };
    let a = work_counts();
    let r = Repr::exact(&d, (30.0, 30.0)).unwrap();
    let b = work_counts();
    assert!(b.eigendecompositions > a.eigendecompositions);
    r.evaluate(0.5, 0.3).unwrap();
    r.reml_groups(0.5, 0.3, &[]).unwrap();
    let c = work_counts();
    assert!(c.evaluations >= b.evaluations + 2);
    assert!(c.searches > b.searches);
}

#[test]
fn reduced_rank_kernel_matches_the_exact_kernel_where_the_basis_rule_is_met() {
    // 10 x 10 points 7 m x 6 m apart, Matern 5/2 at l = 10 m, boundary factor 2 and the
    // basis size from the rule: U diag(w) U' against the kernel, at the centre and at a
    // corner, within 2 % of the variance (the truncated high frequencies take ~1 %; with
    // a boundary factor of 1.5 the corner variance came out 7 % low, hence the default 2).
    let coords: Vec<(f64, f64)> = (0..100)
        .map(|i| (7.0 * (i % 10) as f64, 6.0 * (i / 10) as f64))
        .collect();
    let n = coords.len();
    let d = Design {
        y: vec![0.0; n],
        x: vec![1.0; n],
        p: 1,
        coords: coords.clone(),
        kernel: Kernel::Matern52,
        groups: Vec::new(),
        basis_cache: Default::default(),
    };
    let r = Repr::hsgp(&d, (10.0, 10.0), 2500, 2.0).unwrap();
    assert!(!r.basis.unwrap().2);
    let u = r.u(&d);
    for (i, j) in [
        (55, 55),
        (55, 56),
        (55, 65),
        (55, 77),
        (0, 0),
        (0, 1),
        (0, 11),
    ] {
        let approx: f64 = (0..r.w.len()).map(|k| u[(i, k)] * r.w[k] * u[(j, k)]).sum();
        let (a, b) = (coords[i], coords[j]);
        let h = ((a.0 - b.0).powi(2) + (a.1 - b.1).powi(2)).sqrt();
        let exact = Kernel::Matern52.cov(h, 10.0, 1.0);
        assert!(
            (approx - exact).abs() < 0.02,
            "{i},{j}: {approx} vs {exact}"
        );
    }
    // Anisotropic length scales (10 m along x, 25 m along y): the same check.
    let r = Repr::hsgp(&d, (10.0, 25.0), 2500, 2.0).unwrap();
    let u = r.u(&d);
    for (i, j) in [(55, 55), (55, 56), (55, 65), (0, 0), (0, 11)] {
        let approx: f64 = (0..r.w.len()).map(|k| u[(i, k)] * r.w[k] * u[(j, k)]).sum();
        let (a, b) = (coords[i], coords[j]);
        let h = (((a.0 - b.0) / 10.0).powi(2) + ((a.1 - b.1) / 25.0).powi(2)).sqrt();
        let exact = Kernel::Matern52.cov(h, 1.0, 1.0);
        assert!(
            (approx - exact).abs() < 0.02,
            "anisotropic {i},{j}: {approx} vs {exact}"
        );
    }
    // The spectral density integrates to the variance: (1/4pi^2) int S dw = 1, here by a
    // radial midpoint sum for the squared exponential and Matern 3/2 at l = 3.
    for k in [Kernel::SquaredExponential, Kernel::Matern32] {
        let dr = 0.001;
        let total: f64 = (0..200_000)
            .map(|i| {
                let r = (i as f64 + 0.5) * dr;
                k.spectral_density((r, 0.0), (3.0, 3.0)) * 2.0 * std::f64::consts::PI * r * dr
            })
            .sum::<f64>()
            / (4.0 * std::f64::consts::PI.powi(2));
        assert!((total - 1.0).abs() < 0.01, "{k:?}: {total}");
    }
}

#[test]
fn log_sum_by_products_equals_the_sum_of_logarithms() {
    // Eigenvalue-like numbers over many orders of magnitude, and extremes whose products
    // leave f64's normal range (the chunk then takes one logarithm per number): the sum
    // agrees with the plain sum of logarithms to rounding.
    let mut rng = crate::util::Rng::new(7);
    for n in [0usize, 1, 7, 8, 9, 360, 1001] {
        let xs: Vec<f64> = (0..n).map(|_| 10f64.powf(rng.range(-6.0, 12.0))).collect();
        let mut s = super::LogSum::default();
        xs.iter().for_each(|&x| s.add(x));
        let plain: f64 = xs.iter().map(|x| x.ln()).sum();
        let got = s.total();
        assert!(
            (got - plain).abs() <= 1e-12 * plain.abs().max(1.0),
            "{n}: {got} vs {plain}"
        );
    }
    let extremes = [1e-300, 1e300, 1e-200, 5e-310, 1e308, 2.0, 1e-30, 1e30, 3.0];
    let mut s = super::LogSum::default();
    extremes.iter().for_each(|&x| s.add(x));
    let plain: f64 = extremes.iter().map(|x| x.ln()).sum();
    let got = s.total();
    assert!(
        (got - plain).abs() <= 1e-12 * plain.abs(),
        "{got} vs {plain}"
    );
}

#[test]
fn length_scales_sharing_a_capped_basis_share_its_products_and_agree_with_a_fresh_design() {
    // 400 plots on a 20 x 20 grid, basis capped at 64 functions: at 5 m and 7 m the rule
    // asks for more, so both use the capped basis (same size and box). The second length
    // scale reuses the first's Phi (the same allocation) and gives, bit for bit, what a
    // design without the stored products gives; a length scale with another box does not
    // reuse it.
    let coords: Vec<(f64, f64)> = (0..400)
        .map(|i| (6.0 * (i % 20) as f64, 9.0 * (i / 20) as f64))
        .collect();
    let d = Design {
        y: (0..400).map(|i| (i as f64 * 0.11).sin()).collect(),
        x: (0..800)
            .map(|k| if k % 2 == 0 { 1.0 } else { (k / 2 % 3) as f64 })
            .collect(),
        p: 2,
        coords,
        kernel: Kernel::Matern52,
        groups: Vec::new(),
        basis_cache: Default::default(),
    };
    let phi = |r: &Repr| r.phi_b.as_ref().map(|(p, _)| p.clone()).unwrap();
    let a = Repr::hsgp(&d, (5.0, 5.0), 64, 2.0).unwrap();
    let b = Repr::hsgp(&d, (7.0, 7.0), 64, 2.0).unwrap();
    assert!(a.basis.unwrap().2 && b.basis.unwrap().2, "both capped");
    assert!(Arc::ptr_eq(&phi(&a), &phi(&b)), "the products were reused");
    let fresh = Repr::hsgp(&d.clone(), (7.0, 7.0), 64, 2.0).unwrap();
    assert!(
        !Arc::ptr_eq(&phi(&b), &phi(&fresh)),
        "a clone starts without them"
    );
    let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
    assert_eq!(bits(&b.w), bits(&fresh.w));
    assert_eq!(bits(&b.uy), bits(&fresh.uy));
    assert_eq!(bits(&b.ux), bits(&fresh.ux));
    assert_eq!(bits(&b.xx_c), bits(&fresh.xx_c));
    assert_eq!(
        bits(
            b.u(&d)
                .as_ref()
                .col(3)
                .try_as_col_major()
                .unwrap()
                .as_slice()
        ),
        bits(
            fresh
                .u(&d)
                .as_ref()
                .col(3)
                .try_as_col_major()
                .unwrap()
                .as_slice()
        )
    );
    // A long length scale: a larger box (boundary factor from the rule), another basis.
    let c = Repr::hsgp(&d, (400.0, 400.0), 64, 2.0).unwrap();
    assert!(!Arc::ptr_eq(&phi(&b), &phi(&c)));
}
