//! CHECKS.md "Plant lag and phase": with a first-order plant lag the convergence rate
//! scales with the plant's response at the dither frequency and the demodulation phase
//! (averaging with plant dynamics; survey by Tan, Moase, Manzie, Nešić & Mareels 2010,
//! Proc. 29th Chinese Control Conference; details from memory).

use ridgeline::config::Range;
use ridgeline::seek::filter::FirstOrder;
use ridgeline::sim::{Plant, parse};
use ridgeline_tests::python_json;

use crate::drive::{decay_time_constant, input, seeker, settings};

const LAG_S: f64 = 4.0;
const PERIOD_S: f64 = 20.0;
const A: f64 = 0.1;
const HIGHPASS_HZ: f64 = 0.01;
const GAIN: f64 = 0.00125;
const C: f64 = 2.0;
const START: f64 = 2.7;

fn plant(expression: &str) -> Plant {
    let text = format!(
        "step_s = 0.1\n[[inputs]]\nname = \"u\"\ninitial = {START}\nholding_register = 0\n\
         [[outputs]]\nname = \"y\"\ninput_register = 0\nexpression = \"{expression}\"\nlag_s = {LAG_S}\n"
    );
    Plant::new(&parse(&text, "lag-plant").expect("valid plant"))
}

/// Complex response of the simulated plant at the dither frequency, from the setpoint
/// written at one tick to the value read at the next, measured by lock-in.
fn measured_plant_response() -> (f64, f64) {
    let mut p = plant("u");
    let w = std::f64::consts::TAU / PERIOD_S;
    let (mut re, mut im, mut n_sum) = (0.0, 0.0, 0.0);
    for n in 0..4000u32 {
        p.advance_to(f64::from(n));
        let y = p.output(0);
        // Reference: the phase of the setpoint written at the previous tick.
        let prev = w * (f64::from(n) - 1.0);
        if n >= 2000 {
            re += y * prev.sin();
            im += y * prev.cos();
            n_sum += 1.0;
        }
        p.set_input(0, (w * f64::from(n)).sin());
    }
    (2.0 * re / n_sum, 2.0 * im / n_sum)
}

/// The same response from SciPy: zero-order-hold discretisation of 1/(tau s + 1) at the
/// tick, evaluated at the dither frequency, without its one-tick delay.
fn scipy_plant_response() -> (f64, f64) {
    let v = python_json(&format!(
        r#"
import json, numpy as np
from scipy.signal import cont2discrete, freqz
num, den, _ = cont2discrete(([1.0], [{LAG_S:?}, 1.0]), 1.0, method="zoh")
_, h = freqz(np.ravel(num), np.ravel(den), worN=[1 / {PERIOD_S:?}], fs=1.0)
g = h[0] * np.exp(2j * np.pi / {PERIOD_S:?})
print(json.dumps({{"re": float(g.real), "im": float(g.imag)}}))
"#
    ));
    (v["re"].as_f64().unwrap(), v["im"].as_f64().unwrap())
}

/// Time constant predicted by averaging: `lambda = 2 gain c Re{HP(f) G(f) e^{j phase}}`.
/// With a small high-pass phase lead this is DESIGN.md's `ReH |G| cos(lag - phase_deg)`.
fn predicted_time_constant(g: (f64, f64), phase_deg: f64) -> f64 {
    let (hr, hi) = FirstOrder::highpass(HIGHPASS_HZ, 1.0).response(1.0 / PERIOD_S, 1.0);
    let (pr, pi) = (hr * g.0 - hi * g.1, hr * g.1 + hi * g.0);
    let (s, c) = phase_deg.to_radians().sin_cos();
    let real = pr * c - pi * s;
    let lambda = 2.0 * GAIN * C * real;
    -1.0 / (1.0 - lambda).ln()
}

fn lag_deg(g: (f64, f64)) -> f64 {
    -g.1.atan2(g.0).to_degrees()
}

/// Runs the loop on the lagged plant and returns the per-tick estimate error.
fn estimate_error(phase_deg: f64, ticks: u32) -> Vec<f64> {
    let mut p = plant("10 - 2 * (u - 3)^2");
    let mut core = seeker(
        &settings(1.0, HIGHPASS_HZ, phase_deg, vec![input(A, PERIOD_S, GAIN)]),
        Range { min: 0.0, max: 6.0 },
        &[START],
    );
    (0..ticks)
        .map(|n| {
            p.advance_to(f64::from(n));
            core.step(u64::from(n), p.output(0));
            p.set_input(0, core.inputs()[0].applied);
            core.inputs()[0].estimate - 3.0
        })
        .collect()
}

#[test]
fn simulated_lag_responds_like_scipy_zero_order_hold_discretisation() {
    let measured = measured_plant_response();
    let reference = scipy_plant_response();
    // Source: reference library SciPy (scipy.signal.cont2discrete 'zoh', freqz).
    assert!((measured.0 - reference.0).abs() < 1e-9, "re {measured:?} vs {reference:?}");
    assert!((measured.1 - reference.1).abs() < 1e-9, "im {measured:?} vs {reference:?}");
}

#[test]
fn convergence_rate_scales_with_the_plant_response_and_demodulation_phase() {
    let g = measured_plant_response();
    let lag = lag_deg(g);
    let mut taus = Vec::new();
    for phase in [0.0, lag - 30.0, lag, lag + 30.0] {
        let predicted = predicted_time_constant(g, phase);
        let ticks = (12.0 * predicted) as u32;
        let measured = decay_time_constant(&estimate_error(phase, ticks), PERIOD_S as usize, 0.8, 0.02);
        // Source: averaging with plant dynamics (Tan et al. 2010 survey), DESIGN.md §4:
        // the rate scales by |G| cos(lag - phase_deg) at the dither frequency.
        assert!(
            (measured / predicted - 1.0).abs() < 0.03,
            "phase {phase:.1} deg: measured {measured:.1} s, predicted {predicted:.1} s"
        );
        taus.push((phase, measured));
    }
    let fastest = taus.iter().min_by(|a, b| a.1.total_cmp(&b.1)).unwrap();
    // Source: DESIGN.md §4, compensating the plant's lag with phase_deg gives the fastest rate.
    assert_eq!(fastest.0, lag, "{taus:?}");
}

#[test]
fn a_phase_error_of_120_degrees_makes_the_loop_run_the_wrong_way() {
    let lag = lag_deg(measured_plant_response());
    let error = estimate_error(lag + 120.0, 4000);
    // Source: DESIGN.md §4, past 90 degrees of uncompensated lag the loop runs the wrong way.
    assert!(error[3999].abs() > 5.0 * error[0].abs(), "error went from {} to {}", error[0], error[3999]);
    assert!(
        error.windows(200).step_by(200).all(|w| w[199].abs() >= w[0].abs() - 1e-9),
        "error shrank somewhere"
    );
}
