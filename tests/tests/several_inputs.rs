//! CHECKS.md "Several inputs": two inputs with their own dither frequencies on a coupled
//! quadratic, against the averaged error dynamics `dx/dt = -diag(gain_i ReH_i) Q x`
//! (Rotea 2000, ACC; Ghaffari et al. 2012; details from memory).

use ridgeline::config::Range;
use ridgeline::seek::filter::highpass_gain_at;

use crate::drive::{decay_time_constant, input, run, seeker, settings};

const Q: [[f64; 2]; 2] = [[2.0, 0.5], [0.5, 1.0]];
const X_STAR: [f64; 2] = [1.0, -1.0];
const PERIODS_S: [f64; 2] = [20.0, 100.0 / 7.0];
const GAINS: [f64; 2] = [0.003, 0.002];
const HIGHPASS_HZ: f64 = 0.01;
/// 100 s holds 5 periods of the first dither and 7 of the second, so window means
/// cancel both.
const WINDOW: usize = 100;

fn objective(x: &[f64]) -> f64 {
    let e = [x[0] - X_STAR[0], x[1] - X_STAR[1]];
    5.0 - 0.5 * (Q[0][0] * e[0] * e[0] + 2.0 * Q[0][1] * e[0] * e[1] + Q[1][1] * e[1] * e[1])
}

#[test]
fn slow_mode_decays_with_the_smaller_eigenvalue_of_the_averaged_system() {
    let k: Vec<f64> =
        (0..2).map(|i| GAINS[i] * highpass_gain_at(1.0 / PERIODS_S[i], HIGHPASS_HZ, 1.0)).collect();
    // A = diag(k) Q; its eigenvalues from the 2x2 characteristic polynomial.
    let a = [[k[0] * Q[0][0], k[0] * Q[0][1]], [k[1] * Q[1][0], k[1] * Q[1][1]]];
    let (tr, det) = (a[0][0] + a[1][1], a[0][0] * a[1][1] - a[0][1] * a[1][0]);
    let slow = 0.5 * (tr - (tr * tr - 4.0 * det).sqrt());
    // Left eigenvector of the slow mode: w' A = slow w', so w' x decays at that rate alone.
    let w = [a[1][0], slow - a[0][0]];

    let inputs = (0..2).map(|i| input(0.1, PERIODS_S[i], GAINS[i])).collect();
    let mut core =
        seeker(&settings(1.0, HIGHPASS_HZ, 0.0, inputs), Range { min: -3.0, max: 3.0 }, &[0.6, -0.6]);
    let predicted = -1.0 / (1.0 - slow).ln();
    let t = run(&mut core, (12.0 * predicted) as u64, objective);
    let projected: Vec<f64> =
        t.estimates.iter().map(|x| w[0] * (x[0] - X_STAR[0]) + w[1] * (x[1] - X_STAR[1])).collect();
    let measured = decay_time_constant(&projected, WINDOW, 0.8, 0.02);
    // Source: averaged multivariable system (Rotea 2000): slow time constant 1/lambda_min of diag(gain_i ReH_i) Q.
    assert!(
        (measured / predicted - 1.0).abs() < 0.03,
        "measured {measured:.1} s, predicted {predicted:.1} s"
    );
    let last = t.estimates.last().unwrap();
    assert!((last[0] - X_STAR[0]).abs() < 0.01 && (last[1] - X_STAR[1]).abs() < 0.01, "ended at {last:?}");
}
