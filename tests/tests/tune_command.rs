//! CHECKS.md "Plant fit from a bump test" and "Speed with plant dynamics": the fit against
//! SciPy and NumPy on records NumPy generates, and `ridgeline tune` end to end.

use ridgeline::tune::fit::{fit, quadratic_through};
use ridgeline::tune::recommend::plant_response;
use ridgeline::tune::{Record, read_csv};
use ridgeline_tests::{python_json, ridgeline, write_file};

fn num(v: &serde_json::Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("a number from the reference, not {v}"))
}

/// A record as CSV text with `t_s`, `objective` and `u.applied`.
fn record_of(reference: &serde_json::Value) -> (String, Record) {
    let csv = reference["csv"].as_str().expect("the reference's CSV").to_owned();
    let record = read_csv(&csv, "u").expect("the reference CSV reads");
    (csv, record)
}

/// One step of 1 (at t = 0, with 5 s at rest before it) through `K e^{-Ls}/(Ts + 1)`,
/// K=2, T=10, L=3, sampled every 0.5 s to 100 s, NumPy noise of `noise` with seed 0; and
/// SciPy's `curve_fit` of `c0 + K (1 - e^{-(t-L)/T})` for `t >= L` to it (the same
/// structure as Ridgeline's fit with two levels: an offset and a gain on the lagged input).
fn step_reference(noise: f64) -> serde_json::Value {
    python_json(&format!(
        r#"
import json
import numpy as np
from scipy.optimize import curve_fit
t = np.arange(-5.0, 100.0 + 1e-9, 0.5)
u = (t >= 0).astype(float)
def model(t, c0, K, T, L):
    return c0 + K * np.where(t >= L, 1 - np.exp(-np.clip(t - L, 0, None) / T), 0.0)
rng = np.random.default_rng(0)
y = model(t, 0.0, 2.0, 10.0, 3.0) + {noise:?} * rng.standard_normal(t.size)
p, cov = curve_fit(model, t, y, p0=[0.0, 1.5, 7.0, 2.0])
csv = "t_s,objective,u.applied\n" + "".join(f"{{float(a)!r}},{{float(b)!r}},{{float(c)!r}}\n" for a, b, c in zip(t, y, u))
print(json.dumps(dict(csv=csv, p=[float(v) for v in p], std=[float(v) for v in np.sqrt(np.diag(cov))])))
"#
    ))
}

#[test]
fn the_lag_and_dead_time_of_a_noisy_step_agree_with_scipy_curve_fit_within_three_of_its_deviations() {
    let reference = step_reference(0.02);
    let (_, record) = record_of(&reference);
    let f = fit(&record).expect("a fit");
    let (p, std) = (&reference["p"], &reference["std"]);
    // Source: reference library SciPy (scipy.optimize.curve_fit) on the same NumPy record;
    // CHECKS.md gives curve_fit's result as about (1.999, 9.85, 3.10).
    assert!((f.lag_s - num(&p[2])).abs() < 3.0 * num(&std[2]), "lag {} vs {p} +- {std}", f.lag_s);
    assert!(
        (f.dead_time_s - num(&p[3])).abs() < 3.0 * num(&std[3]),
        "dead time {} vs {p} +- {std}",
        f.dead_time_s
    );
    assert!(
        (f.map.slope() - num(&p[1])).abs() < 3.0 * num(&std[1]),
        "gain {} vs {p} +- {std}",
        f.map.slope()
    );
    assert!((f.noise_std / 0.02 - 1.0).abs() < 0.2, "noise {}", f.noise_std);
}

#[test]
fn on_a_noise_free_step_both_recover_the_truth_to_1e_6() {
    let reference = step_reference(0.0);
    let (_, record) = record_of(&reference);
    let f = fit(&record).expect("a fit");
    for (name, ours, scipy, truth) in [
        ("lag", f.lag_s, num(&reference["p"][2]), 10.0),
        ("dead time", f.dead_time_s, num(&reference["p"][3]), 3.0),
        ("gain", f.map.slope(), num(&reference["p"][1]), 2.0),
    ] {
        // Source: the generating model (K=2, T=10, L=3) and SciPy's curve_fit on it.
        assert!((ours / truth - 1.0).abs() < 1e-6, "{name}: ours {ours}, truth {truth}");
        assert!((scipy / truth - 1.0).abs() < 1e-6, "{name}: SciPy {scipy}, truth {truth}");
    }
}

/// CHECKS.md's Wiener case: a staircase 2.5, 2.9, 2.1, 2.5 (each change at a sample)
/// through lag 40 s and dead time 12 s, sampled every 1 s, then `J = 7 - 2 (x - 2.3)^2`
/// (curvature 4), NumPy noise 0.03 seed 1. The lagged input is the superposition of the
/// step responses of the changes, written independently of Ridgeline's integration.
/// SciPy's `least_squares` fits the same structure, lag and dead time included.
const WIENER: &str = r#"
import json
import numpy as np
from scipy.optimize import least_squares
t = np.arange(0.0, 1600.0, 1.0)
u = np.select([t < 200, t < 600, t < 1000], [2.5, 2.9, 2.1], 2.5)
changes = [(t[k], u[k] - u[k - 1]) for k in range(1, t.size) if u[k] != u[k - 1]]
def lagged(T, L):
    x = np.full(t.size, u[0])
    for at, du in changes:
        s = np.clip(t - at - L, 0, None)
        x += du * np.where(t - at >= L, 1 - np.exp(-s / T), 0.0)
    return x
def residuals(p):
    T, L, c0, c1, c2 = p
    d = lagged(T, L) - 2.5
    return y - (c0 + c1 * d + c2 * d * d)
rng = np.random.default_rng(1)
y = 7.0 - 2.0 * (lagged(40.0, 12.0) - 2.3) ** 2 + 0.03 * rng.standard_normal(t.size)
r = least_squares(residuals, [30.0, 8.0, 6.9, -0.8, -1.5], x_scale=[10.0, 1.0, 1.0, 1.0, 1.0])
dof = t.size - 5
cov = np.linalg.inv(r.jac.T @ r.jac) * (r.fun @ r.fun) / dof
std = np.sqrt(np.diag(cov))
csv = "t_s,objective,u.applied\n" + "".join(f"{float(a)!r},{float(b)!r},{float(c)!r}\n" for a, b, c in zip(t, y, u))
print(json.dumps(dict(csv=csv, p=[float(v) for v in r.x], std=[float(v) for v in std])))
"#;

#[test]
fn lag_dead_time_and_curvature_through_a_curved_map_agree_with_scipy_least_squares() {
    let reference = python_json(WIENER);
    let (_, record) = record_of(&reference);
    let f = fit(&record).expect("a fit");
    let (p, std) = (&reference["p"], &reference["std"]);
    let curvature = f.map.second_derivative().abs();
    // Source: reference library SciPy (scipy.optimize.least_squares) fitting the same
    // structure; CHECKS.md gives about (40.1, 11.8, 4.02).
    assert!((f.lag_s - num(&p[0])).abs() < 3.0 * num(&std[0]), "lag {} vs {p} +- {std}", f.lag_s);
    assert!(
        (f.dead_time_s - num(&p[1])).abs() < 3.0 * num(&std[1]),
        "dead {} vs {p} +- {std}",
        f.dead_time_s
    );
    let (c2, c2_std) = (num(&p[4]).abs() * 2.0, num(&std[4]) * 2.0);
    assert!((curvature - c2).abs() < 3.0 * c2_std, "curvature {curvature} vs {c2} +- {c2_std}");
}

#[test]
fn the_map_through_the_settled_levels_equals_numpy_polyfit_to_1e_9() {
    let reference = python_json(WIENER);
    let (_, record) = record_of(&reference);
    let f = fit(&record).expect("a fit");
    let points: Vec<(f64, f64)> =
        f.levels.iter().map(|l| (l.setpoint, l.settled_objective.expect("every level settles"))).collect();
    let ours = quadratic_through(&points, 2.5).expect("three distinct levels");
    let (u, j): (Vec<f64>, Vec<f64>) = points.iter().copied().unzip();
    let poly = python_json(&format!(
        "import json, numpy as np\np = np.polyfit({u:?}, {j:?}, 2)\n\
         print(json.dumps(dict(curvature=float(2 * p[0]), vertex=float(-p[1] / (2 * p[0])))))"
    ));
    // Source: reference library NumPy (numpy.polyfit) on the same settled levels.
    let (c, v) = (num(&poly["curvature"]), num(&poly["vertex"]));
    assert!((ours.second_derivative() / c - 1.0).abs() < 1e-9, "{} vs {c}", ours.second_derivative());
    assert!((ours.vertex().unwrap() / v - 1.0).abs() < 1e-9, "{:?} vs {v}", ours.vertex());
}

#[test]
fn the_plants_gain_and_lag_at_the_dither_frequency_equal_scipy_freqresp() {
    let reference = python_json(
        "import json, numpy as np\nfrom scipy.signal import lti, freqresp\n\
         w, h = freqresp(lti([2.0], [10.0, 1.0]), w=[0.1])\n\
         print(json.dumps(dict(gain=float(abs(h[0])) / 2.0, phase=float(np.angle(h[0])))))",
    );
    let (gain, lag) = plant_response(10.0, 3.0, 0.1);
    // Source: reference library SciPy (scipy.signal.freqresp of K/(Ts+1)), plus w L for the
    // dead time; CHECKS.md: |G| = 1.414214 for K = 2, phase -1.085398 rad.
    let phase = num(&reference["phase"]) - 0.1 * 3.0;
    assert!((gain - num(&reference["gain"])).abs() < 1e-9, "{gain} vs {}", reference["gain"]);
    assert!((-lag - phase).abs() < 1e-9, "{lag} vs {phase}");
    assert!((-lag - -1.085398).abs() < 1e-6);
}

fn tune_json(args: &[&str]) -> serde_json::Value {
    let mut all = vec!["tune"];
    all.extend_from_slice(args);
    let run = ridgeline(&all);
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    serde_json::from_str(&run.stdout).unwrap_or_else(|e| panic!("not JSON ({e}):\n{}", run.stdout))
}

#[test]
fn the_recommended_loop_rehearsed_against_the_fitted_plant_converges_within_10_percent_of_the_requested_time()
{
    let dir = tempfile::tempdir().unwrap();
    let reference = python_json(WIENER);
    let samples = write_file(dir.path(), "bump.csv", reference["csv"].as_str().unwrap());
    let plant = dir.path().join("fitted.toml");
    let result = tune_json(&[
        "--samples",
        samples.to_str().unwrap(),
        "--input",
        "u",
        "--time-constant",
        "30m",
        "--plant-out",
        plant.to_str().unwrap(),
        "--json",
    ]);
    // Source: the averaged formula 1/tau = gain |d2J/du2| |G| |H| cos(phi) (CHECKS.md,
    // after Tan, Nesic & Mareels 2006), measured on a rehearsal of the plant with lag and dead time.
    let rehearsed = num(&result["rehearsed"]["time_constant_s"]);
    assert!(
        (rehearsed / 1800.0 - 1.0).abs() < 0.1,
        "rehearsed {rehearsed} s for 1800 s requested: {result:#}"
    );
    assert!((num(&result["predicted"]["time_constant_s"]) / 1800.0 - 1.0).abs() < 0.01);
    let r = &result["recommended"];
    assert!(num(&r["dither_period_s"]) >= 3.0 * (40.0 + 12.0) * 0.97, "{r}");
    assert!((num(&r["highpass_hz"]) * num(&r["dither_period_s"]) - 0.2).abs() < 1e-3, "{r}");
    assert_eq!(r["direction"], "maximize");
    for key in ["lag_s", "dead_time_s", "curvature", "slope", "vertex", "noise_std", "fit_rmse"] {
        assert!(result["model"][key].is_number(), "model.{key} in {result:#}");
    }
    assert!(result["model"]["gain_per_level"].as_array().is_some_and(|g| g.len() == 3));
    assert!(
        std::fs::read_to_string(&plant).unwrap().contains("fitted_process"),
        "the fitted plant is written"
    );
}

#[test]
fn the_text_output_has_reasons_a_proof_and_a_snippet_to_paste() {
    let dir = tempfile::tempdir().unwrap();
    let samples = write_file(dir.path(), "bump.csv", python_json(WIENER)["csv"].as_str().unwrap());
    let run = ridgeline(&["tune", "--samples", samples.to_str().unwrap(), "--input", "u"]);
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    for needle in [
        "dead time 1",
        "common practice",
        "predicted   rehearsed",
        "[loops.filter]",
        "phase_deg = ",
        "gain = ",
    ] {
        assert!(run.stdout.contains(needle), "missing `{needle}` in:\n{}", run.stdout);
    }
}

#[test]
fn data_that_cannot_be_fitted_is_refused_with_a_sentence_saying_what_is_missing() {
    let dir = tempfile::tempdir().unwrap();
    let cases = [
        ("t_s,objective\n0,1\n", "no column `u.applied`"),
        ("t_s,objective,u.applied\n0,1,2\n1,1,2\n", "a fit needs at least"),
        (
            &(0..100)
                .map(|k| format!("{k},{},2\n", 1.0 + 0.01 * (k % 3) as f64))
                .fold("t_s,objective,u.applied\n".to_owned(), |a, b| a + &b),
            "holds no step",
        ),
        (
            &(0..300)
                .map(|k| {
                    let u = if k < 100 {
                        2.0
                    } else if k < 200 {
                        2.01
                    } else {
                        1.99
                    };
                    // A tiny step under noise of about 0.3 (a fixed pseudo-random pattern).
                    format!("{k},{},{u}\n", 5.0 + 0.3 * (((k * 7919) % 101) as f64 / 50.0 - 1.0))
                })
                .fold("t_s,objective,u.applied\n".to_owned(), |a, b| a + &b),
            "lost in the noise",
        ),
    ];
    for (text, needle) in cases {
        let samples = write_file(dir.path(), "bad.csv", text);
        let run = ridgeline(&["tune", "--samples", samples.to_str().unwrap(), "--input", "u"]);
        assert_eq!(run.code, Some(2), "{needle}: {}{}", run.stdout, run.stderr);
        assert!(run.stderr.contains(needle), "missing `{needle}` in:\n{}", run.stderr);
        assert!(run.stdout.is_empty(), "no tuning printed: {}", run.stdout);
    }
}

/// A plant with lag 40 s and dead time 12 s before `J = 10 - 2 (x - 3)^2` (curvature 4).
const LAGGED_PLANT: &str = r#"
step_s = 0.1
[[inputs]]
name = "u"
initial = 1.5
holding_register = 0
[[outputs]]
name = "x"
input_register = 0
expression = "u"
lag_s = 40
dead_time_s = 12
[[outputs]]
name = "y"
input_register = 2
expression = "10 - 2 * (x - 3)^2"
"#;

/// The loop for [`LAGGED_PLANT`], with the plant known to `check` and this `phase_deg`.
fn lagged_loop(phase_deg: f64) -> String {
    format!(
        r#"
[links.plc]
modbus_tcp = "127.0.0.1:5020"
[tags.y]
link = "plc"
input_register = 2
type = "f32"
[[loops]]
name = "lagged"
objective = "y"
direction = "maximize"
tick_s = 1.0
[loops.model]
lag_s = 40
dead_time_s = 12
curvature = 4
[loops.filter]
highpass_hz = 0.000833
phase_deg = {phase_deg:?}
[loops.watchdog]
stale_after_s = 10
[[loops.inputs]]
name = "u"
write = {{ link = "plc", holding_register = 0, type = "f32" }}
limits = [0.0, 6.0]
bounds = [0.0, 6.0]
safe = 1.5
max_rate_per_s = 1.0
dither_amplitude = 0.1
dither_period_s = 240
gain = 0.00015
"#
    )
}

/// `check`'s predicted time constant and `rehearse`'s measured one, for the estimate's
/// error in window means of half a dither period (the demodulation's ripple is at twice
/// the dither frequency).
fn predicted_and_rehearsed(phase_deg: f64) -> (f64, f64) {
    let dir = tempfile::tempdir().unwrap();
    let config = write_file(dir.path(), "loop.toml", &lagged_loop(phase_deg));
    let plant = write_file(dir.path(), "plant.toml", LAGGED_PLANT);
    let (predicted, summary) = checked_time_constant(&config, "lagged");
    assert!(summary.contains("with the plant's lag and dead time"), "{summary}");
    let duration = format!("{}s", (6.0 * predicted).round());
    let error = rehearsed_error(&config, &plant, &duration, "lagged", "u");
    (predicted, crate::drive::decay_time_constant(&error, 120, 0.6, 0.05))
}

/// `check`'s predicted time constant for loop `name` of `config`, with the loop's summary.
fn checked_time_constant(config: &std::path::Path, name: &str) -> (f64, String) {
    let check = ridgeline(&["check", "--config", config.to_str().unwrap()]);
    assert_eq!(check.code, Some(0), "{}", check.stderr);
    let summary = check.stdout.split(&format!("loop {name}:")).nth(1).expect("the loop's summary").to_owned();
    let predicted = summary
        .split("predicted time constant ")
        .nth(1)
        .and_then(|rest| rest.split(" s").next())
        .and_then(|n| n.parse().ok())
        .unwrap_or_else(|| panic!("no prediction in:\n{}", check.stdout));
    (predicted, summary)
}

/// Rehearses `config` against `plant` and returns, at every tick of loop `name`, how far
/// input `input`'s estimate is from the true optimum.
fn rehearsed_error(
    config: &std::path::Path,
    plant: &std::path::Path,
    duration: &str,
    name: &str,
    input: &str,
) -> Vec<f64> {
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("csv");
    let run = crate::rehearse_command::rehearse(
        config.to_str().unwrap(),
        plant.to_str().unwrap(),
        &["--duration", duration, "--csv", csv.to_str().unwrap()],
    );
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    let (header, rows) = crate::rehearse_command::read_csv(&csv.join(format!("{name}.csv")));
    let column = |c: String| header.iter().position(|h| *h == c).unwrap_or_else(|| panic!("no column {c}"));
    let (estimate, optimum) = (column(format!("{input}.estimate")), column(format!("{input}.optimum")));
    rows.iter().map(|r| r[estimate] - r[optimum]).collect()
}

#[test]
fn checks_prediction_with_plant_dynamics_matches_the_rehearsal_with_and_without_phase_compensation() {
    // Source: the averaged rate 1/tau = gain |d2J/du2| |G| |H| cos(phi) (CHECKS.md "Speed with
    // plant dynamics", after Tan, Nesic & Mareels 2006), against a rehearsal of the plant.
    // phase_deg 53 is about the plant's lag less the high-pass's lead at this period.
    let (compensated, measured) = predicted_and_rehearsed(53.0);
    assert!(
        (measured / compensated - 1.0).abs() < 0.1,
        "compensated: predicted {compensated} s, rehearsed {measured} s"
    );
    let (uncompensated, measured) = predicted_and_rehearsed(0.0);
    assert!(
        (measured / uncompensated - 1.0).abs() < 0.1,
        "uncompensated: predicted {uncompensated} s, rehearsed {measured} s"
    );
    assert!(
        uncompensated > 1.4 * compensated,
        "the phase error slows the loop: {uncompensated} vs {compensated}"
    );
}

#[test]
fn check_warns_when_the_phase_or_the_period_does_not_fit_the_plant() {
    let dir = tempfile::tempdir().unwrap();
    let text = lagged_loop(0.0).replace("dither_period_s = 240", "dither_period_s = 100");
    let config = write_file(dir.path(), "loop.toml", &text);
    let check = ridgeline(&["check", "--config", config.to_str().unwrap()]);
    assert_eq!(check.code, Some(0), "{}", check.stderr);
    assert!(
        check.stdout.contains("degrees from the plant's lag at the dither frequency"),
        "{}",
        check.stdout
    );
    assert!(check.stdout.contains("shorter than 3 x (lag + dead time) = 156 s"), "{}", check.stdout);

    let both = lagged_loop(53.0).replace("tick_s = 1.0", "tick_s = 1.0\ncurvature_hint = 4");
    let config = write_file(dir.path(), "both.toml", &both);
    let check = ridgeline(&["check", "--config", config.to_str().unwrap()]);
    assert_eq!(check.code, Some(2));
    assert!(
        check.stderr.contains("loops[0].curvature_hint: is the old name of [loops.model] `curvature`"),
        "{}",
        check.stderr
    );
}

/// docs/commissioning.md's walk-through: the demo's untuned dryer loop with the tuning a
/// bump test gave (pasted as the docs show it), rehearsed against the demo's own plant.
#[test]
fn the_demo_dryer_tuned_as_the_commissioning_docs_show_converges_as_check_predicts() {
    let demo = std::fs::read_to_string(crate::check_command::root().join("config/demo.toml")).unwrap();
    let docs = std::fs::read_to_string(crate::check_command::root().join("docs/commissioning.md")).unwrap();
    let (_, snippet) =
        docs.rsplit_once("# paste into the loop (tick_s = 2):\n").expect("the measured snippet in the docs");
    let value = |key: &str| -> String {
        let line = snippet.lines().find(|l| l.starts_with(&format!("{key} = "))).expect(key);
        line.split(" = ").nth(1).unwrap().to_owned()
    };
    let start = demo.find("name = \"dryer-3-inlet\"").expect("the dryer loop");
    let (head, mut dryer) = (demo[..start].to_owned(), demo[start..].to_owned());
    let replace = |text: &mut String, from: &str, to: &str| {
        assert!(text.contains(from), "the demo's dryer loop has no `{from}`");
        *text = text.replacen(from, to, 1);
    };
    replace(&mut dryer, "start_mode = \"observing\"", "start_mode = \"seeking\"");
    replace(
        &mut dryer,
        "[loops.filter]\nhighpass_hz = 0.002\n",
        &format!(
            "[loops.model]\nlag_s = {}\ndead_time_s = {}\ncurvature = {}\nnoise_std = {}\n[loops.filter]\nhighpass_hz = {}\nphase_deg = {}\n",
            value("lag_s"),
            value("dead_time_s"),
            value("curvature"),
            value("noise_std"),
            value("highpass_hz"),
            value("phase_deg")
        ),
    );
    for key in ["max_rate_per_s", "dither_amplitude", "dither_period_s", "gain"] {
        let line = dryer.lines().find(|l| l.starts_with(&format!("{key} = "))).unwrap().to_owned();
        replace(&mut dryer, &line, &format!("{key} = {}", value(key)));
    }
    let dir = tempfile::tempdir().unwrap();
    let config = write_file(dir.path(), "tuned.toml", &(head + &dryer));
    let (predicted, _) = checked_time_constant(&config, "dryer-3-inlet");
    let plant = crate::check_command::root().join("config/demo-plant.toml");
    let error = rehearsed_error(&config, &plant, "8h", "dryer-3-inlet", "dryer_inlet_degc");
    // Half a dither period (58 ticks) per window: the demodulation's ripple averages out.
    let measured = 2.0 * crate::drive::decay_time_constant(&error, 29, 0.6, 0.05);
    // Source: the averaged rate with plant dynamics (CHECKS.md, after Tan, Nesic & Mareels
    // 2006), with the fitted model, against the demo's true plant.
    assert!((measured / predicted - 1.0).abs() < 0.1, "predicted {predicted} s, measured {measured} s");
}
