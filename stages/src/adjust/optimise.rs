//! Nelder-Mead simplex minimisation (Nelder & Mead 1965, The Computer Journal 7:308), used
//! to find each field's posterior mode.

/// Nelder-Mead minimisation (Nelder & Mead 1965) with standard coefficients.
pub fn nelder_mead(
    f: &dyn Fn(&[f64]) -> f64,
    start: &[f64],
    step: f64,
    iters: usize,
) -> (Vec<f64>, f64) {
    let d = start.len();
    let mut simplex: Vec<Vec<f64>> = vec![start.to_vec()];
    for i in 0..d {
        let mut v = start.to_vec();
        v[i] += step;
        simplex.push(v);
    }
    let mut vals: Vec<f64> = simplex.iter().map(|v| f(v)).collect();
    for _ in 0..iters {
        let mut order: Vec<usize> = (0..=d).collect();
        order.sort_by(|&a, &b| vals[a].total_cmp(&vals[b]));
        simplex = order.iter().map(|&i| simplex[i].clone()).collect();
        vals = order.iter().map(|&i| vals[i]).collect();
        if (vals[d] - vals[0]).abs() < 1e-9 {
            break;
        }
        let centroid: Vec<f64> = (0..d)
            .map(|k| simplex[..d].iter().map(|v| v[k]).sum::<f64>() / d as f64)
            .collect();
        let along = |t: f64| -> Vec<f64> {
            (0..d)
                .map(|k| centroid[k] + t * (simplex[d][k] - centroid[k]))
                .collect()
        };
        let xr = along(-1.0);
        let fr = f(&xr);
        if fr < vals[0] {
            let xe = along(-2.0);
            let fe = f(&xe);
            if fe < fr {
                simplex[d] = xe;
                vals[d] = fe;
            } else {
                simplex[d] = xr;
                vals[d] = fr;
            }
        } else if fr < vals[d - 1] {
            simplex[d] = xr;
            vals[d] = fr;
        } else {
            let xc = if fr < vals[d] {
                along(-0.5)
            } else {
                along(0.5)
            };
            let fc = f(&xc);
            if fc < vals[d].min(fr) {
                simplex[d] = xc;
                vals[d] = fc;
            } else {
                for i in 1..=d {
                    for k in 0..d {
                        simplex[i][k] = simplex[0][k] + 0.5 * (simplex[i][k] - simplex[0][k]);
                    }
                    vals[i] = f(&simplex[i]);
                }
            }
        }
    }
    let best = (0..=d)
        .min_by(|&a, &b| vals[a].total_cmp(&vals[b]))
        .unwrap_or(0);
    (simplex[best].clone(), vals[best])
}
