//! Speed of the optimizer core and of a day's rehearsal.
//!
//! Run with `cargo bench -p ridgeline --bench core`; the README records the figures.

use std::hint::black_box;

use criterion::{Criterion, criterion_group, criterion_main};
use ridgeline::config::Range;
use ridgeline::rehearse::{Options, Rehearsal};
use ridgeline::seek::guard::InputGuard;
use ridgeline::seek::{
    Method, Newton, NewtonInput, NewtonSettings, Seeker, Sine, SineInput, SineSettings, Stepwise,
    StepwiseSettings,
};

/// Whole-tick dither periods whose frequencies, doubles, triples, sums and differences differ.
const PERIODS: [f64; 4] = [20.0, 14.0, 11.0, 9.0];

fn seeker(method: &str, inputs: usize) -> Seeker {
    let periods = &PERIODS[..inputs];
    let (method, amplitude): (Box<dyn Method>, f64) = match method {
        "sine" => (
            Box::new(Sine::new(&SineSettings {
                tick_s: 1.0,
                sign: 1.0,
                highpass_hz: 0.01,
                lowpass_hz: None,
                phase_deg: 0.0,
                inputs: periods
                    .iter()
                    .map(|&p| SineInput { amplitude: 0.1, period_s: p, gain: 0.00125 })
                    .collect(),
            })),
            0.1,
        ),
        "newton" => (
            Box::new(Newton::new(&NewtonSettings {
                tick_s: 1.0,
                sign: 1.0,
                highpass_hz: 0.01,
                lowpass_hz: None,
                phase_deg: 0.0,
                time_constant_s: 200.0,
                hessian_hz: 0.002,
                initial_curvature: 4.0,
                inputs: periods.iter().map(|&p| NewtonInput { amplitude: 0.1, period_s: p }).collect(),
            })),
            0.1,
        ),
        _ => (
            Box::new(Stepwise::new(&StepwiseSettings {
                sign: 1.0,
                dwell_ticks: 20,
                average_ticks: 8,
                steps: vec![0.05; inputs],
            })),
            0.0,
        ),
    };
    let guards = vec![InputGuard { bounds: Range { min: 0.0, max: 6.0 }, amplitude, max_step: 0.5 }; inputs];
    Seeker::new(method, &guards, &vec![2.7; inputs])
}

fn tick(c: &mut Criterion) {
    for (method, inputs) in [("sine", 1), ("sine", 4), ("newton", 1), ("newton", 4), ("stepwise", 1)] {
        let mut core = seeker(method, inputs);
        let mut n = 0u64;
        c.bench_function(
            &format!("{method} tick, {inputs} input{}", if inputs == 1 { "" } else { "s" }),
            |b| {
                b.iter(|| {
                    let u = core.inputs()[0].applied;
                    core.step(n, black_box(10.0 - 2.0 * (u - 3.0) * (u - 3.0)));
                    n += 1;
                })
            },
        );
    }
}

fn rehearsal(c: &mut Criterion) {
    let root = concat!(env!("CARGO_MANIFEST_DIR"), "/../config/");
    let text = std::fs::read_to_string(format!("{root}rehearse-example.toml")).expect("example config");
    // The example ticks every 2 s; the benchmark's case is a 1 s tick at plant step 0.1 s.
    let config =
        ridgeline::config::parse(&text.replace("tick_s = 2.0", "tick_s = 1.0"), "bench").expect("valid");
    let plant = ridgeline::sim::load(std::path::Path::new(&format!("{root}rehearse-example-plant.toml")))
        .expect("valid");
    assert_eq!(plant.step_s, 0.1);
    let options = Options { duration_s: 86_400.0, ..Options::default() };
    let mut group = c.benchmark_group("rehearsal");
    group.sample_size(10);
    group.bench_function("24 h, tick 1 s, plant step 0.1 s", |b| {
        b.iter(|| {
            let r = Rehearsal::new(&config, &plant, "bench").expect("wired");
            black_box(r.run(&options, &mut |_| {}).expect("runs"))
        })
    });
    group.finish();
}

criterion_group!(benches, tick, rehearsal);
criterion_main!(benches);
