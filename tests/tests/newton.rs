//! CHECKS.md "Newton-based extremum seeking" (Ghaffari, Krstić & Nešić 2012, Automatica
//! 48(8):1759-1767; Moase, Manzie & Brear 2010, IEEE TAC 55:2094-2105; from memory): the
//! Hessian demodulation against NumPy, and a convergence time that does not depend on
//! the curvature, rehearsed, contrasted with the sine method's.

use ridgeline::seek::newton::demodulate;
use ridgeline_tests::{python_json, write_file};

use crate::check_command::config;
use crate::drive::decay_time_constant;
use crate::rehearse_command::{read_csv, rehearse};

const H: [[f64; 2]; 2] = [[2.0, 0.5], [0.5, 1.0]];
const ERROR: [f64; 2] = [0.3, -0.2];
const AMPLITUDES: [f64; 2] = [0.1, 0.2];
/// Samples over one common period `2 pi` of integer angular frequencies: the mean of a
/// trigonometric polynomial of lower degree is then exact.
const SAMPLES: usize = 4096;

/// The objective `y = (e + d)' H (e + d) / 2` with `d_i = a_i sin(w_i t)`, over one period.
fn objective_and_sines(w: [f64; 2]) -> Vec<(f64, [f64; 2])> {
    (0..SAMPLES)
        .map(|k| {
            let t = std::f64::consts::TAU * k as f64 / SAMPLES as f64;
            let s = [(w[0] * t).sin(), (w[1] * t).sin()];
            let x = [ERROR[0] + AMPLITUDES[0] * s[0], ERROR[1] + AMPLITUDES[1] * s[1]];
            let y = 0.5
                * (0..2)
                    .flat_map(|i| (0..2).map(move |j| (i, j)))
                    .map(|(i, j)| x[i] * H[i][j] * x[j])
                    .sum::<f64>();
            (y, s)
        })
        .collect()
}

/// Ridgeline's demodulation averaged over the period: (mean `N y` row-major, mean `M y`).
fn ridgeline_means(w: [f64; 2]) -> ([f64; 4], [f64; 2]) {
    let (mut hessian, mut gradient) = ([0.0; 4], [0.0; 2]);
    let (mut h, mut g) = ([0.0; 4], [0.0; 2]);
    for (y, s) in objective_and_sines(w) {
        demodulate(&AMPLITUDES, &s, y, &mut g, &mut h);
        for k in 0..4 {
            hessian[k] += h[k] / SAMPLES as f64;
        }
        for k in 0..2 {
            gradient[k] += g[k] / SAMPLES as f64;
        }
    }
    (hessian, gradient)
}

/// NumPy's means of the same demodulation, written from CHECKS.md's formulas.
fn numpy_means(w: [f64; 2]) -> ([f64; 4], [f64; 2]) {
    let r = python_json(&format!(
        r#"
import json
import numpy as np
n = {SAMPLES}
t = 2 * np.pi * np.arange(n) / n
H = np.array([[2.0, 0.5], [0.5, 1.0]]); e = np.array([0.3, -0.2]); a = np.array([0.1, 0.2])
s = np.array([np.sin({w0:?} * t), np.sin({w1:?} * t)])
x = e[:, None] + a[:, None] * s
y = 0.5 * np.einsum("in,ij,jn->n", x, H, x)
N = [[(16 / a[i]**2) * (s[i]**2 - 0.5) if i == j else 4 / (a[i] * a[j]) * s[i] * s[j] for j in range(2)] for i in range(2)]
print(json.dumps({{"hessian": [float(np.mean(N[i][j] * y)) for i in range(2) for j in range(2)],
                  "gradient": [float(np.mean(2 / a[i] * s[i] * y)) for i in range(2)]}}))
"#,
        w0 = w[0],
        w1 = w[1]
    ));
    let v = |key: &str, k: usize| r[key][k].as_f64().expect("a number from NumPy");
    (
        [v("hessian", 0), v("hessian", 1), v("hessian", 2), v("hessian", 3)],
        [v("gradient", 0), v("gradient", 1)],
    )
}

#[test]
fn the_averaged_demodulation_gives_the_hessian_and_h_times_the_error_as_numpy_does() {
    let (hessian, gradient) = ridgeline_means([3.0, 5.0]);
    let (np_hessian, np_gradient) = numpy_means([3.0, 5.0]);
    for k in 0..4 {
        assert!((hessian[k] - np_hessian[k]).abs() < 1e-9, "N y [{k}]: {hessian:?} vs NumPy {np_hessian:?}");
        // Source: CHECKS.md, the mean of N y equals H to 1e-9.
        assert!((hessian[k] - H[k / 2][k % 2]).abs() < 1e-9, "{hessian:?}");
    }
    for k in 0..2 {
        assert!((gradient[k] - np_gradient[k]).abs() < 1e-9, "M y: {gradient:?} vs NumPy {np_gradient:?}");
    }
    // H e = (2 * 0.3 - 0.5 * 0.2, 0.5 * 0.3 - 1 * 0.2) = (0.5, -0.05).
    assert!((gradient[0] - 0.5).abs() < 1e-9 && (gradient[1] + 0.05).abs() < 1e-9, "{gradient:?}");
}

#[test]
fn a_dither_at_three_times_another_spoils_the_curvature_estimate_and_check_refuses_it() {
    let (hessian, _) = ridgeline_means([1.0, 3.0]);
    let (np_hessian, _) = numpy_means([1.0, 3.0]);
    assert!((hessian[0] - np_hessian[0]).abs() < 1e-9, "{hessian:?} vs NumPy {np_hessian:?}");
    // Source: CHECKS.md, with w = (1, 3) the mean of N_11 y is 0, not 2.
    assert!(hessian[0].abs() < 1e-9, "{hessian:?}");

    let two_inputs = config(&[
        ("tick_s = 1.0", "tick_s = 1.0\nmethod = \"newton\""),
        (
            "[loops.watchdog]",
            "[loops.newton]\ntime_constant_s = 600\nhessian_hz = 0.002\ninitial_curvature = 4\n\n[loops.watchdog]",
        ),
        (
            "dither_period_s = 20\ngain = 0.00125",
            "dither_period_s = 60\n\n[[loops.inputs]]\nname = \"v\"\nwrite = { link = \"plc\", holding_register = 2, type = \"f32\" }\nlimits = [0.0, 6.0]\nbounds = [0.0, 6.0]\nsafe = 2.7\nmax_rate_per_s = 1.0\ndither_amplitude = 0.1\ndither_period_s = 20",
        ),
    ]);
    let dir = tempfile::tempdir().unwrap();
    let path = write_file(dir.path(), "third.toml", &two_inputs);
    let run = ridgeline_tests::ridgeline(&["check", "--config", path.to_str().unwrap()]);
    assert_eq!(run.code, Some(2), "{}", run.stdout);
    assert!(
        run.stderr
            .contains("loops[0].inputs[1].dither_period_s: the dither of `v` collides with three times"),
        "{}",
        run.stderr
    );
}

const TIME_CONSTANT_S: f64 = 600.0;

/// A sine loop and a Newton loop on the same input, each rehearsed against its own copy
/// of a plant whose curvature is `curvature`; the decay time constant of each loop's
/// estimate error, in loop order.
fn rehearsed_time_constants(curvature: f64) -> Vec<f64> {
    let sine = config(&[("gain = 0.00125", "gain = 0.002")]);
    let first = &sine[sine.find("[[loops]]").expect("a loop")..];
    let newton = first
        .replace("name = \"test-loop\"", "name = \"newton-loop\"")
        .replace("tick_s = 1.0", "tick_s = 1.0\nmethod = \"newton\"")
        .replace(
            "[loops.watchdog]",
            &format!(
                "[loops.newton]\ntime_constant_s = {TIME_CONSTANT_S}\nhessian_hz = 0.005\ninitial_curvature = 2\n\n[loops.watchdog]"
            ),
        )
        .replace("gain = 0.002\n", "");
    let plant = format!(
        "step_s = 0.5\n[[inputs]]\nname = \"u\"\ninitial = 2.0\nholding_register = 0\n\
         [[outputs]]\nname = \"y\"\ninput_register = 0\nexpression = \"10 - {} * (u - 3)^2\"\n",
        curvature / 2.0
    );
    let dir = tempfile::tempdir().unwrap();
    let cfg = write_file(dir.path(), "two.toml", &format!("{sine}\n{newton}"));
    let plant = write_file(dir.path(), "plant.toml", &plant);
    let csv = dir.path().join("csv");
    let run = rehearse(
        cfg.to_str().unwrap(),
        plant.to_str().unwrap(),
        &["--duration", "16000s", "--separately", "--csv", csv.to_str().unwrap()],
    );
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    ["test-loop", "newton-loop"]
        .iter()
        .map(|name| {
            let (header, rows) = read_csv(&csv.join(format!("{name}.csv")));
            let column = header.iter().position(|h| h == "u.estimate").expect("an estimate column");
            let error: Vec<f64> = rows.iter().map(|r| r[column] - 3.0).collect();
            decay_time_constant(&error, 20, 0.8, 0.05)
        })
        .collect()
}

#[test]
fn newtons_time_constant_is_its_setting_whatever_the_curvature_while_the_sine_methods_scales_with_it() {
    let flat = rehearsed_time_constants(1.0);
    let steep = rehearsed_time_constants(4.0);
    eprintln!("time constants (sine, newton): curvature 1 {flat:.1?} s, curvature 4 {steep:.1?} s");
    // Source: CHECKS.md, Newton's rehearsed time constants for curvature 1 and 4 agree
    // with time_constant_s within 10%.
    for tau in [flat[1], steep[1]] {
        assert!(
            (tau / TIME_CONSTANT_S - 1.0).abs() < 0.10,
            "newton: {tau:.1} s for curvature 1 and 4: {flat:?} {steep:?}"
        );
    }
    // The contrast: the sine method's rate is gain * curvature, four times slower on the
    // flatter plant (within 10%).
    let ratio = flat[0] / steep[0];
    assert!(
        (ratio / 4.0 - 1.0).abs() < 0.10,
        "sine: {:.1} s and {:.1} s, ratio {ratio:.2}",
        flat[0],
        steep[0]
    );
}

#[test]
fn check_predicts_the_set_time_constant_for_a_newton_loop_whatever_the_curvature() {
    let text = config(&[
        ("tick_s = 1.0", "tick_s = 1.0\nmethod = \"newton\""),
        (
            "[loops.watchdog]",
            "[loops.newton]\ntime_constant_s = 600\nhessian_hz = 0.005\n\n[loops.model]\ncurvature = 4.0\n\n[loops.watchdog]",
        ),
        ("gain = 0.00125\n", ""),
    ]);
    let dir = tempfile::tempdir().unwrap();
    let path = write_file(dir.path(), "newton.toml", &text);
    let run = ridgeline_tests::ridgeline(&["check", "--config", path.to_str().unwrap()]);
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    assert!(run.stdout.contains("method newton"), "{}", run.stdout);
    // The rehearsal above measured 617.9 s for this filter; check's averaged figure,
    // 600 s times ReH(2f) / ReH(f), is within 1% of it.
    let tau: f64 = run
        .stdout
        .split("predicted time constant ")
        .nth(1)
        .and_then(|rest| rest.split(' ').next())
        .and_then(|n| n.parse().ok())
        .unwrap_or_else(|| panic!("no prediction in:\n{}", run.stdout));
    assert!((tau / 617.9 - 1.0).abs() < 0.01, "{}", run.stdout);
    assert!(run.stdout.contains("whatever the curvature"), "{}", run.stdout);
}
