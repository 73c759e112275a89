//! CHECKS.md "Stepwise method" (perturb and observe; Femia, Petrone, Spagnuolo & Vitelli
//! 2005, IEEE Trans. Power Electronics 20(4):963-973; from memory): the steady
//! three-level cycle and its mean loss, the dwell rule and the step against the noise.

use ridgeline::config::Range;
use ridgeline::seek::guard::InputGuard;
use ridgeline::seek::{Seeker, Stepwise, StepwiseSettings};
use ridgeline_tests::{ridgeline, write_file};

use crate::check_command::config;
use crate::drive::run;

const C: f64 = 2.0;
const U_STAR: f64 = 3.0;
const STEP: f64 = 0.25;
const DWELL_TICKS: u64 = 10;

fn stepwise(sign: f64, steps: Vec<f64>, start: &[f64]) -> Seeker {
    let settings = StepwiseSettings { sign, dwell_ticks: DWELL_TICKS, average_ticks: 4, steps };
    let guard = InputGuard { bounds: Range { min: 0.0, max: 6.0 }, amplitude: 0.0, max_step: 1e9 };
    Seeker::new(Box::new(Stepwise::new(&settings)), &vec![guard; start.len()], start)
}

#[test]
fn on_a_quadratic_the_steady_state_is_the_three_level_cycle_with_mean_loss_c_step_squared_over_two() {
    // The optimum on the step grid: 3.0 = 2.0 + 4 steps.
    let mut core = stepwise(1.0, vec![STEP], &[2.0]);
    let t = run(&mut core, 400 * DWELL_TICKS, |u| 10.0 - C * (u[0] - U_STAR).powi(2));
    let levels: Vec<f64> = t
        .applied
        .iter()
        .skip(200 * DWELL_TICKS as usize)
        .step_by(DWELL_TICKS as usize)
        .map(|u| u[0])
        .collect();
    // Source: CHECKS.md (Femia et al. 2005): the cycle u*, u*+s, u*, u*-s.
    let start =
        levels.iter().position(|&u| (u - U_STAR - STEP).abs() < 1e-12).expect("the cycle reaches u*+s");
    for (k, u) in levels[start..].iter().enumerate() {
        let expected = U_STAR + STEP * [1.0, 0.0, -1.0, 0.0][k % 4];
        assert!(
            (u - expected).abs() < 1e-12,
            "level {k} of the cycle is {u}, expected {expected}: {levels:?}"
        );
    }
    let loss: Vec<f64> =
        t.applied[200 * DWELL_TICKS as usize..].iter().map(|u| C * (u[0] - U_STAR).powi(2)).collect();
    let mean = loss.iter().sum::<f64>() / loss.len() as f64;
    // Worked out in CHECKS.md: (c s^2 + 0 + c s^2 + 0) / 4 = c s^2 / 2, within 5%.
    let expected = C * STEP * STEP / 2.0;
    assert!((mean / expected - 1.0).abs() < 0.05, "mean loss {mean}, expected {expected}");
    assert!(
        t.applied.iter().zip(&t.estimates).all(|(a, e)| a == e),
        "no dither: applied equals the estimate"
    );
}

#[test]
fn minimising_a_bowl_retraces_maximising_its_negative_and_several_inputs_take_turns() {
    let bowl = |u: &[f64]| 1.0 + C * (u[0] - U_STAR).powi(2) + (u[1] - 1.0).powi(2);
    let mut down = stepwise(-1.0, vec![STEP, 0.1], &[2.0, 2.0]);
    let mut up = stepwise(1.0, vec![STEP, 0.1], &[2.0, 2.0]);
    let minimised = run(&mut down, 300 * DWELL_TICKS, bowl);
    let maximised = run(&mut up, 300 * DWELL_TICKS, |u| -bowl(u));
    assert_eq!(minimised.applied, maximised.applied);
    // One input moves per dwell, never both at once.
    for pair in minimised.applied.windows(2) {
        let moved = (0..2).filter(|&i| pair[0][i] != pair[1][i]).count();
        assert!(moved <= 1, "{pair:?}");
    }
    let last = minimised.applied.last().unwrap();
    assert!(
        (last[0] - U_STAR).abs() <= STEP + 1e-9 && (last[1] - 1.0).abs() <= 0.1 + 1e-9,
        "ended at {last:?}"
    );
}

fn checked(model: &str, step: &str, dwell: &str) -> String {
    let text = config(&[
        ("tick_s = 1.0", "tick_s = 1.0\nmethod = \"stepwise\""),
        (
            "[loops.filter]\nhighpass_hz = 0.01\n",
            &format!("[loops.model]\n{model}\n[loops.stepwise]\n{dwell}\n"),
        ),
        ("dither_amplitude = 0.1\ndither_period_s = 20\ngain = 0.00125", &format!("step = {step}")),
    ]);
    let dir = tempfile::tempdir().unwrap();
    let path = write_file(dir.path(), "stepwise.toml", &text);
    let run = ridgeline(&["check", "--config", path.to_str().unwrap()]);
    assert_eq!(run.code, Some(0), "{}{}", run.stdout, run.stderr);
    run.stdout
}

#[test]
fn check_warns_when_a_dwell_ends_before_the_plant_has_settled() {
    // Source: CHECKS.md, dwell_s >= L + T ln(1/eps); for 2% L + 3.91 T = 42.1 s for T = 10,
    // L = 3. The step ramps in 0.2 s at 1 per s; the average takes the last 10 s.
    let model = "lag_s = 10\ndead_time_s = 3";
    let short = checked(model, "0.2", "dwell_s = 50\naverage_s = 10");
    assert!(short.contains("the plant settles within 2% in 42.1 s"), "{short}");
    assert!(short.contains("warning: the objective is averaged from 40 s into each dwell"), "{short}");
    assert!(short.contains("lengthen dwell_s to at least 52.3 s"), "{short}");
    let long = checked(model, "0.2", "dwell_s = 53\naverage_s = 10");
    assert!(!long.contains("warning"), "{long}");
}

#[test]
fn check_warns_when_the_step_is_lost_in_the_noise_of_the_averages() {
    // Worked out in CHECKS.md: warn when c step^2 < 2 sqrt(2) noise_std / sqrt(n), with
    // |d2J/du2| = 2c. Here c = 2, n = 16: the floor for noise 0.5 is 0.354, so a step of
    // 0.4 (0.32) is lost and 0.45 (0.405) is not.
    let model = "curvature = 4.0\nnoise_std = 0.5";
    let dwell = "dwell_s = 40\naverage_s = 16";
    let lost = checked(model, "0.4", dwell);
    assert!(lost.contains("decided by noise"), "{lost}");
    let heard = checked(model, "0.45", dwell);
    assert!(!heard.contains("warning"), "{heard}");
    // The steady cycle's loss, c step^2 / 2 = |d2J/du2| step^2 / 4.
    assert!(heard.contains("mean loss about 0.2025"), "{heard}");
}
