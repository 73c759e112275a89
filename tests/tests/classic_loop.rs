//! CHECKS.md "Classic loop": the sine method on `J = 10 - 2(u-3)^2` against the averaged
//! system of Tan, Nešić & Mareels 2006 (Automatica 42:889-903) and Nešić 2009 (Eur. J.
//! Control 15:331-347); bibliographic details from memory.

use ridgeline::config::Range;
use ridgeline::config::summary::time_constant_s;
use ridgeline::seek::filter::highpass_gain_at;

use crate::drive::{amplitude_at, decay_time_constant, input, run, seeker, settings, window_means};

const C: f64 = 2.0;
const U_STAR: f64 = 3.0;
const A: f64 = 0.1;
const PERIOD_S: f64 = 20.0;
const HIGHPASS_HZ: f64 = 0.01;
const GAIN: f64 = 0.00125;
const START: f64 = 2.7;
const BOUNDS: Range = Range { min: 0.0, max: 6.0 };

fn peak(u: &[f64]) -> f64 {
    10.0 - C * (u[0] - U_STAR).powi(2)
}

fn classic(sign: f64) -> ridgeline::seek::SineSettings {
    settings(sign, HIGHPASS_HZ, 0.0, vec![input(A, PERIOD_S, GAIN)])
}

#[test]
fn error_decays_with_the_averaged_time_constant() {
    let mut core = seeker(&classic(1.0), BOUNDS, &[START]);
    let t = run(&mut core, 3000, peak);
    let error: Vec<f64> = t.estimates.iter().map(|e| e[0] - U_STAR).collect();
    let measured = decay_time_constant(&error, PERIOD_S as usize, 0.8, 0.02);
    // Source: averaged system (Tan, Nešić & Mareels 2006; Nešić 2009), DESIGN.md §4:
    // lambda = 2 gain c ReH, tau = -T / ln(1 - T lambda); CHECKS.md gives about 207.4 s.
    let reh = highpass_gain_at(1.0 / PERIOD_S, HIGHPASS_HZ, 1.0);
    let predicted = time_constant_s(1.0, GAIN, 2.0 * C, reh).unwrap();
    assert!((predicted - 207.4).abs() < 0.1, "prediction {predicted}");
    assert!(
        (measured / predicted - 1.0).abs() < 0.03,
        "measured {measured:.1} s, predicted {predicted:.1} s"
    );
}

#[test]
fn minimising_a_bowl_retraces_maximising_its_negative_bit_for_bit() {
    let bowl = |u: &[f64]| 1.0 + C * (u[0] - U_STAR).powi(2);
    let mut down = seeker(&classic(-1.0), BOUNDS, &[START]);
    let mut up = seeker(&classic(1.0), BOUNDS, &[START]);
    let minimised = run(&mut down, 2000, bowl);
    let maximised = run(&mut up, 2000, |u| -bowl(u));
    // Source: CHECKS.md "Classic loop" (minimising J is maximising -J).
    assert_eq!(minimised.estimates, maximised.estimates);
    assert_eq!(minimised.applied, maximised.applied);
}

#[test]
fn steady_state_loss_is_half_c_a_squared_and_the_objective_rings_at_twice_the_dither() {
    let mut core = seeker(&classic(1.0), BOUNDS, &[START]);
    let t = run(&mut core, 6000, peak);
    // The last 3000 ticks (about 14 time constants after the start) are converged.
    let tail = 3000..6000;
    let loss: Vec<f64> = t.applied[tail.clone()].iter().map(|u| 10.0 - peak(u)).collect();
    let mean_loss = loss.iter().sum::<f64>() / loss.len() as f64;
    // Source: averaged system, mean loss c a^2 / 2 = 0.0100 (CHECKS.md "Classic loop").
    assert!((mean_loss / (C * A * A / 2.0) - 1.0).abs() < 0.02, "mean loss {mean_loss}");

    let objective = &t.objective[tail];
    let periods = objective.len() as f64 / PERIOD_S;
    let at_dither = amplitude_at(objective, periods);
    let at_twice = amplitude_at(objective, 2.0 * periods);
    // Common practice, no single source: at the optimum the first harmonic vanishes and
    // the objective oscillates at twice the dither frequency, with amplitude c a^2 / 2.
    assert!(at_twice > 10.0 * at_dither, "at f: {at_dither:e}, at 2f: {at_twice:e}");
    assert!((at_twice / (C * A * A / 2.0) - 1.0).abs() < 0.05, "2f amplitude {at_twice}");
    for cycles in (1..objective.len() / 2).map(|k| k as f64) {
        if cycles != 2.0 * periods {
            assert!(amplitude_at(objective, cycles) < at_twice, "bin {cycles} beats the 2f bin");
        }
    }
}

#[test]
fn window_means_over_whole_periods_cancel_the_dither() {
    let x: Vec<f64> = (0..200).map(|n| 1.0 + (std::f64::consts::TAU * n as f64 / 20.0).sin()).collect();
    for (_, m) in window_means(&x, 20) {
        assert!((m - 1.0).abs() < 1e-12);
    }
}
