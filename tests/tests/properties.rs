//! Invariants of the core for any objective sequence and settings: the applied setpoint
//! never leaves the bounds, the estimate never outruns the rate limit, and the same
//! inputs give the same outputs bit for bit.

use proptest::prelude::*;
use ridgeline::config::Range;
use ridgeline::seek::guard::InputGuard;
use ridgeline::seek::{Seeker, Sine, SineInput, SineSettings};

#[derive(Debug, Clone)]
struct Case {
    settings: SineSettings,
    guards: Vec<InputGuard>,
    start: Vec<f64>,
    objective: Vec<f64>,
    /// Tick at which the first input's bounds are narrowed, and the new bounds.
    narrowing: Option<(usize, Range)>,
}

fn objective_value() -> impl Strategy<Value = f64> {
    prop_oneof![
        8 => -1e6..1e6f64,
        1 => Just(f64::NAN),
        1 => prop::sample::select(vec![f64::INFINITY, f64::NEG_INFINITY, 0.0, 1e300, -1e300]),
    ]
}

fn case() -> impl Strategy<Value = Case> {
    let input = (1e-3..10.0f64, 8.0..500.0f64, 1e-4..1e3f64, -100.0..100.0f64, 0.0..200.0f64, 1e-3..10.0f64);
    (
        prop::collection::vec(input, 1..4),
        prop::bool::ANY,
        0.01..0.5f64,
        -180.0..180.0f64,
        prop::option::of(0.001..0.2f64),
        prop::collection::vec(objective_value(), 1..400),
        prop::option::of((0usize..400, 0.0..1.0f64, 0.0..1.0f64)),
        -500.0..500.0f64,
    )
        .prop_map(
            |(inputs, maximize, hp_fraction, phase_deg, lowpass_hz, objective, narrowing, start)| {
                let slowest = inputs.iter().map(|i| i.1).fold(0.0, f64::max);
                let settings = SineSettings {
                    tick_s: 1.0,
                    sign: if maximize { 1.0 } else { -1.0 },
                    highpass_hz: hp_fraction / slowest,
                    lowpass_hz,
                    phase_deg,
                    inputs: inputs
                        .iter()
                        .map(|&(a, p, g, ..)| SineInput { amplitude: a, period_s: p, gain: g })
                        .collect(),
                };
                let guards: Vec<InputGuard> = inputs
                    .iter()
                    .map(|&(a, _, _, lo, width, step)| InputGuard {
                        bounds: Range { min: lo, max: lo + 2.0 * a + width },
                        amplitude: a,
                        max_step: step,
                    })
                    .collect();
                let narrowing = narrowing.map(|(at, x, y)| {
                    let b = guards[0].bounds;
                    let (lo, hi) = (b.min + x * b.span() * 0.5, b.max - y * b.span() * 0.5);
                    (at, Range { min: lo.min(hi), max: hi.max(lo) + 2.0 * guards[0].amplitude })
                });
                Case { start: vec![start; guards.len()], settings, guards, objective, narrowing }
            },
        )
}

/// Runs a case and returns every tick's (estimate, applied) per input.
fn run(case: &Case, mut check: impl FnMut(&Seeker, &[f64], &[InputGuard])) -> Vec<Vec<(f64, f64)>> {
    let mut seeker = Seeker::new(Box::new(Sine::new(&case.settings)), &case.guards, &case.start);
    let mut guards = case.guards.clone();
    let mut out = Vec::new();
    for (n, &y) in case.objective.iter().enumerate() {
        if let Some((at, bounds)) = case.narrowing
            && at == n
        {
            seeker.set_bounds(0, bounds);
            guards[0].bounds = bounds;
        }
        let before: Vec<f64> = seeker.inputs().iter().map(|i| i.estimate).collect();
        seeker.step(n as u64, y);
        check(&seeker, &before, &guards);
        out.push(seeker.inputs().iter().map(|i| (i.estimate, i.applied)).collect());
    }
    out
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 500, ..ProptestConfig::default() })]

    #[test]
    fn applied_setpoint_never_leaves_the_operating_bounds(case in case()) {
        run(&case, |seeker, _, guards| {
            for (input, guard) in seeker.inputs().iter().zip(guards) {
                assert!(input.applied.is_finite(), "non-finite setpoint");
                assert!(guard.bounds.contains(input.applied), "{} outside {}", input.applied, guard.bounds);
            }
        });
    }

    #[test]
    fn estimate_never_moves_faster_than_the_rate_limit(case in case()) {
        run(&case, |seeker, before, guards| {
            for ((input, was), guard) in seeker.inputs().iter().zip(before).zip(guards) {
                let moved = (input.estimate - was).abs();
                // One rounding of the addition is allowed for.
                let rounding = 4.0 * f64::EPSILON * was.abs().max(input.estimate.abs());
                assert!(moved <= guard.max_step + rounding, "moved {moved} > {}", guard.max_step);
            }
        });
    }

    #[test]
    fn the_core_is_bit_for_bit_deterministic(case in case()) {
        let first = run(&case, |_, _, _| {});
        let second = run(&case, |_, _, _| {});
        let bits = |r: &Vec<Vec<(f64, f64)>>| -> Vec<(u64, u64)> {
            r.iter().flatten().map(|(e, a)| (e.to_bits(), a.to_bits())).collect()
        };
        prop_assert_eq!(bits(&first), bits(&second));
    }
}
