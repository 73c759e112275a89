//! Invariants of the core, for each method, for any objective sequence and settings: the
//! applied setpoint never leaves the bounds, the estimate never outruns the rate limit,
//! and the same inputs give the same outputs bit for bit.

use proptest::prelude::*;
use ridgeline::config::Range;
use ridgeline::seek::guard::InputGuard;
use ridgeline::seek::{
    Method, Newton, NewtonInput, NewtonSettings, Seeker, Sine, SineInput, SineSettings, Stepwise,
    StepwiseSettings,
};

/// One of the methods, with settings drawn from the same random inputs.
#[derive(Debug, Clone)]
enum Settings {
    Sine(SineSettings),
    Newton(NewtonSettings),
    Stepwise(StepwiseSettings),
}

impl Settings {
    fn method(&self) -> Box<dyn Method> {
        match self {
            Settings::Sine(s) => Box::new(Sine::new(s)),
            Settings::Newton(s) => Box::new(Newton::new(s)),
            Settings::Stepwise(s) => Box::new(Stepwise::new(s)),
        }
    }
}

#[derive(Debug, Clone)]
struct Case {
    settings: Settings,
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
        (0..3u8, 1e-3..1e3f64, 2u64..60, 1u64..60),
    )
        .prop_map(
            |(
                inputs,
                maximize,
                hp_fraction,
                phase_deg,
                lowpass_hz,
                objective,
                narrowing,
                start,
                (kind, curvature, dwell_ticks, average_ticks),
            )| {
                let slowest = inputs.iter().map(|i| i.1).fold(0.0, f64::max);
                let sign = if maximize { 1.0 } else { -1.0 };
                let highpass_hz = hp_fraction / slowest;
                let settings = match kind {
                    0 => Settings::Sine(SineSettings {
                        tick_s: 1.0,
                        sign,
                        highpass_hz,
                        lowpass_hz,
                        phase_deg,
                        inputs: inputs
                            .iter()
                            .map(|&(a, p, g, ..)| SineInput { amplitude: a, period_s: p, gain: g })
                            .collect(),
                    }),
                    1 => Settings::Newton(NewtonSettings {
                        tick_s: 1.0,
                        sign,
                        highpass_hz,
                        lowpass_hz,
                        phase_deg,
                        // The gain's range read as a time constant, 1e-4 to 1e3 ticks.
                        time_constant_s: inputs[0].2,
                        hessian_hz: 0.5 * highpass_hz,
                        initial_curvature: curvature,
                        inputs: inputs
                            .iter()
                            .map(|&(a, p, ..)| NewtonInput { amplitude: a, period_s: p })
                            .collect(),
                    }),
                    _ => Settings::Stepwise(StepwiseSettings {
                        sign,
                        dwell_ticks,
                        average_ticks,
                        steps: inputs.iter().map(|i| i.0).collect(),
                    }),
                };
                let dithered = !matches!(settings, Settings::Stepwise(_));
                let guards: Vec<InputGuard> = inputs
                    .iter()
                    .map(|&(a, _, _, lo, width, step)| InputGuard {
                        bounds: Range { min: lo, max: lo + 2.0 * a + width },
                        amplitude: if dithered { a } else { 0.0 },
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
    let mut seeker = Seeker::new(case.settings.method(), &case.guards, &case.start);
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
    #![proptest_config(ProptestConfig { cases: 900, ..ProptestConfig::default() })]

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

mod states {
    //! The state machine: for random event sequences, fallback is never left without its
    //! recovery condition, and no write ever leaves the operating bounds, in any state.

    use proptest::prelude::*;
    use ridgeline::config::{Mode, Range, Recover};
    use ridgeline::supervisor::control::{Control, Permit, Reading};
    use ridgeline::supervisor::states::{Event, Machine, State, Trip};

    fn mode() -> impl Strategy<Value = Mode> {
        prop::sample::select(vec![Mode::Seeking, Mode::Holding, Mode::Observing, Mode::Stopped])
    }

    fn trip() -> impl Strategy<Value = Trip> {
        prop::sample::select(Trip::ALL.to_vec())
    }

    fn event() -> impl Strategy<Value = (Event, Option<Trip>)> {
        prop_oneof![
            trip().prop_map(|t| (Event::Fault(t), Some(t))),
            (0.0..200.0f64).prop_map(|h| (Event::Healthy { healthy_s: h }, None)),
            Just((Event::PermitWithdrawn, None)),
            Just((Event::PermitGranted, None)),
            Just((Event::PermitLost, Some(Trip::Stale))),
            (mode(), prop::option::of(trip())).prop_map(|(m, f)| (Event::Ask(m), f)),
        ]
    }

    proptest! {
        #![proptest_config(ProptestConfig { cases: 2000, ..ProptestConfig::default() })]

        #[test]
        fn fallback_is_never_left_without_its_recovery_condition(
            start in mode(),
            auto in any::<bool>(),
            recover_after_s in 1.0..100.0f64,
            events in prop::collection::vec(event(), 1..60),
        ) {
            let recover = if auto { Recover::Auto } else { Recover::Manual };
            let mut m = Machine::new(start, recover, recover_after_s);
            for (event, fault_now) in events {
                let before = m;
                let _ = m.on(event, fault_now);
                let left = before.state == State::Fallback && !matches!(m.state, State::Fallback | State::NoPermit);
                let forgot = before.tripped.is_some() && m.tripped.is_none();
                if left || forgot {
                    let acknowledged = matches!(event, Event::Ask(_)) && fault_now.is_none();
                    let healed = matches!(event, Event::Healthy { healthy_s } if auto && healthy_s >= recover_after_s);
                    prop_assert!(acknowledged || healed, "{before:?} --{event:?} (fault {fault_now:?})--> {m:?}");
                }
                // A loop that is not permitted never writes, and a tripped one only writes its fallback.
                if !m.permitted && matches!(m.mode, Mode::Seeking | Mode::Holding) {
                    prop_assert!(!m.state.writes(), "{m:?}");
                }
                if m.tripped.is_some() {
                    prop_assert!(matches!(m.state, State::Fallback | State::NoPermit), "{m:?}");
                }
                // A permit that cannot be read is a fault: a writing loop shows fallback.
                if event == Event::PermitLost && matches!(m.mode, Mode::Seeking | Mode::Holding) {
                    prop_assert!(m.state == State::Fallback && m.tripped.is_some(), "{before:?} lost its permit: {m:?}");
                }
            }
        }
    }

    #[derive(Debug, Clone)]
    enum Step {
        Tick {
            objective: Option<f64>,
            permit: Permit,
            dt: f64,
            writes_ok: bool,
        },
        /// The loop gets its starting point (until then it may only trip and write `safe`).
        Start(f64),
        Ask(Mode),
        Bounds(f64, f64),
        ReadBack(f64),
    }

    fn step() -> impl Strategy<Value = Step> {
        let objective = prop_oneof![
            6 => (-10.0..110.0f64).prop_map(Some),
            1 => Just(Some(f64::NAN)),
            1 => Just(None),
        ];
        prop_oneof![
            8 => (objective, permit(), 0.0..3.0f64, prop::bool::weighted(0.9))
                .prop_map(|(objective, permit, dt, writes_ok)| Step::Tick { objective, permit, dt, writes_ok }),
            1 => mode().prop_map(Step::Ask),
            1 => (0.0..6.0f64, 0.0..6.0f64).prop_map(|(a, b)| Step::Bounds(a.min(b), a.max(b))),
            1 => (-1.0..7.0f64).prop_map(Step::ReadBack),
            1 => (1.0..5.0f64).prop_map(Step::Start),
        ]
    }

    /// How a permit tag reads (for a loop that has one; others read `NotConfigured`).
    fn permit() -> impl Strategy<Value = Permit> {
        prop_oneof![
            4 => Just(Permit::Reads(1.0)),
            1 => Just(Permit::Reads(0.0)),
            1 => Just(Permit::Reads(f64::NAN)),
            2 => Just(Permit::Unreadable),
        ]
    }

    fn config(on_trip: &str, recover: &str, with_permit: bool) -> ridgeline::config::LoopConfig {
        let permit = if with_permit { "permit = \"y\"" } else { "" };
        let text = format!(
            "[links.plc]\nmodbus_tcp = \"127.0.0.1:5020\"\n[tags.y]\nlink = \"plc\"\ninput_register = 0\ntype = \"f32\"\n\
             [[loops]]\nname = \"l\"\nobjective = \"y\"\ndirection = \"maximize\"\ntick_s = 1.0\nstart_mode = \"seeking\"\n\
             {permit}\n[loops.filter]\nhighpass_hz = 0.01\n[loops.watchdog]\nstale_after_s = 5\nobjective_range = [0, 100]\n\
             on_trip = \"{on_trip}\"\n{recover}\n[[loops.inputs]]\nname = \"u\"\n\
             write = {{ link = \"plc\", holding_register = 0, type = \"f32\" }}\nlimits = [0, 6]\nbounds = [1, 5]\n\
             safe = 0.5\nmax_rate_per_s = 0.5\ndither_amplitude = 0.1\ndither_period_s = 20\ngain = 0.05\n"
        );
        ridgeline::config::parse(&text, "property").expect("valid").loops.remove(0)
    }

    proptest! {
        #![proptest_config(ProptestConfig { cases: 500, ..ProptestConfig::default() })]

        #[test]
        fn no_write_ever_leaves_the_operating_bounds_in_any_state_nor_goes_out_without_a_permit(
            hold in any::<bool>(),
            auto in any::<bool>(),
            with_permit in any::<bool>(),
            steps in prop::collection::vec(step(), 1..200),
        ) {
            let recover = if auto { "recover = \"auto\"\nrecover_after_s = 3" } else { "" };
            let mut c = Control::new(&config(if hold { "hold" } else { "safe" }, recover, with_permit));
            let (mut now, mut tick) = (0.0, 0u64);
            let mut bounds = Range { min: 1.0, max: 5.0 };
            // The PLC's last answer to the permit: when, and whether it was yes.
            let mut answer: Option<(f64, bool)> = None;
            let stands = |answer: Option<(f64, bool)>, now: f64, yes: bool| {
                answer.is_some_and(|(at, said)| said == yes && now - at < 5.0)
            };
            for s in steps {
                match s {
                    Step::Tick { objective, permit, dt, writes_ok } => {
                        now += dt;
                        tick += 1;
                        let permit = if with_permit { permit } else { Permit::NotConfigured };
                        if let Permit::Reads(v) = permit {
                            answer = Some((now, v.is_finite() && v != 0.0));
                        }
                        let values = objective.map(|j| [j]);
                        let report = c.tick(tick, now, Reading { tags: values.as_ref().map(|v| &v[..]), permit });
                        if report.write {
                            let v = c.applied()[0];
                            prop_assert!(v.is_finite() && bounds.contains(v), "wrote {v} outside {bounds} in {:?}", c.state());
                            prop_assert!(c.state().writes());
                            prop_assert!(!with_permit || stands(answer, now, true), "wrote without a permit that stands: {answer:?} at {now}");
                            c.note_setpoints(writes_ok, now);
                        }
                    }
                    Step::Start(v) => {
                        if !c.is_started() {
                            c.start(now, &[v.clamp(bounds.min, bounds.max)]);
                        }
                    }
                    Step::Ask(m) => { let _ = c.ask(m); }
                    Step::Bounds(lo, hi) if hi - lo >= 0.2 => {
                        bounds = Range { min: lo, max: hi };
                        c.set_bounds(0, bounds);
                    }
                    Step::Bounds(..) => {}
                    Step::ReadBack(v) => {
                        if c.wants_read_back() {
                            c.restart_from(&[Some(v)]);
                        }
                    }
                }
                // What a stopping service would write stays inside the bounds too, and needs
                // the permit as much as any other write.
                if let Some(values) = c.shutdown_values() {
                    prop_assert!(values.iter().all(|&v| v.is_finite() && bounds.contains(v)), "{values:?} outside {bounds}");
                    prop_assert!(!with_permit || stands(answer, now, true), "a shutdown write without a permit that stands");
                }
                // no_permit only ever means that the PLC answered 0 (and that answer stands).
                if c.state() == State::NoPermit {
                    prop_assert!(stands(answer, now, false), "no_permit without the PLC saying no: {answer:?} at {now}");
                }
            }
        }
    }
}
