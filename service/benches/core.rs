//! Speed of the optimizer core and of a day's rehearsal.
//!
//! Run with `cargo bench -p ridgeline --bench core`; the README records the figures.

use std::hint::black_box;

use criterion::{Criterion, criterion_group, criterion_main};
use ridgeline::config::Range;
use ridgeline::rehearse::{Options, Rehearsal};
use ridgeline::seek::guard::InputGuard;
use ridgeline::seek::{Seeker, Sine, SineInput, SineSettings};

fn seeker(inputs: usize) -> Seeker {
    // Whole-tick dither periods whose frequencies, doubles, sums and differences differ.
    let periods = [20.0, 14.0, 11.0, 9.0];
    let settings = SineSettings {
        tick_s: 1.0,
        sign: 1.0,
        highpass_hz: 0.01,
        lowpass_hz: None,
        phase_deg: 0.0,
        inputs: periods[..inputs]
            .iter()
            .map(|&p| SineInput { amplitude: 0.1, period_s: p, gain: 0.00125 })
            .collect(),
    };
    let guards =
        vec![InputGuard { bounds: Range { min: 0.0, max: 6.0 }, amplitude: 0.1, max_step: 0.5 }; inputs];
    Seeker::new(Box::new(Sine::new(&settings)), &guards, &vec![2.7; inputs])
}

fn tick(c: &mut Criterion) {
    for inputs in [1, 4] {
        let mut core = seeker(inputs);
        let mut n = 0u64;
        c.bench_function(&format!("sine tick, {inputs} input{}", if inputs == 1 { "" } else { "s" }), |b| {
            b.iter(|| {
                let u = core.inputs()[0].applied;
                core.step(n, black_box(10.0 - 2.0 * (u - 3.0) * (u - 3.0)));
                n += 1;
            })
        });
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
