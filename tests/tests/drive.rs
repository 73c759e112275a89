//! Drives the optimizer core directly on a plant given as a function, the way the
//! averaged-system results in the literature are stated.

use ridgeline::config::Range;
use ridgeline::seek::guard::InputGuard;
use ridgeline::seek::{Seeker, Sine, SineInput, SineSettings};

/// One dither input with wide bounds and a rate limit that never binds.
pub fn input(amplitude: f64, period_s: f64, gain: f64) -> SineInput {
    SineInput { amplitude, period_s, gain }
}

pub fn settings(sign: f64, highpass_hz: f64, phase_deg: f64, inputs: Vec<SineInput>) -> SineSettings {
    SineSettings { tick_s: 1.0, sign, highpass_hz, lowpass_hz: None, phase_deg, inputs }
}

pub fn seeker(settings: &SineSettings, bounds: Range, start: &[f64]) -> Seeker {
    let guards: Vec<_> = settings
        .inputs
        .iter()
        .map(|i| InputGuard { bounds, amplitude: i.amplitude, max_step: 1e9 })
        .collect();
    Seeker::new(Box::new(Sine::new(settings)), &guards, start)
}

/// Per tick: the estimates and applied setpoints after the tick, and the objective read.
pub struct Trajectory {
    pub estimates: Vec<Vec<f64>>,
    pub applied: Vec<Vec<f64>>,
    pub objective: Vec<f64>,
}

/// Runs `ticks` ticks where the objective read at tick n is `plant` of the setpoints
/// written at tick n-1 (the start values before the first tick).
pub fn run(seeker: &mut Seeker, ticks: u64, mut plant: impl FnMut(&[f64]) -> f64) -> Trajectory {
    let mut written: Vec<f64> = seeker.inputs().iter().map(|i| i.applied).collect();
    let mut t = Trajectory { estimates: vec![], applied: vec![], objective: vec![] };
    for n in 0..ticks {
        let y = plant(&written);
        seeker.step(n, y);
        written = seeker.inputs().iter().map(|i| i.applied).collect();
        t.objective.push(y);
        t.estimates.push(seeker.inputs().iter().map(|i| i.estimate).collect());
        t.applied.push(written.clone());
    }
    t
}

/// Means over consecutive whole windows of `window` ticks, with each window's centre time.
pub fn window_means(series: &[f64], window: usize) -> Vec<(f64, f64)> {
    series
        .chunks_exact(window)
        .enumerate()
        .map(|(k, c)| ((k as f64 + 0.5) * window as f64, c.iter().sum::<f64>() / window as f64))
        .collect()
}

/// Time constant of an exponential decay, fitted to `ln|mean|` of window means while
/// the mean is between `lower` and `upper` times the first window's.
pub fn decay_time_constant(error: &[f64], window: usize, upper: f64, lower: f64) -> f64 {
    let means = window_means(error, window);
    let first = means[0].1.abs();
    let (t, log): (Vec<f64>, Vec<f64>) = means
        .iter()
        .take_while(|(_, m)| m.abs() > lower * first)
        .filter(|(_, m)| m.abs() < upper * first)
        .map(|&(t, m)| (t, m.abs().ln()))
        .unzip();
    assert!(t.len() >= 5, "only {} windows to fit a decay on", t.len());
    -1.0 / ridgeline_tests::slope(&t, &log)
}

/// Amplitude of the component of `x` at `cycles` cycles over its length (one DFT bin).
pub fn amplitude_at(x: &[f64], cycles: f64) -> f64 {
    let n = x.len() as f64;
    let mean = x.iter().sum::<f64>() / n;
    let (mut re, mut im) = (0.0, 0.0);
    for (k, v) in x.iter().enumerate() {
        let w = std::f64::consts::TAU * cycles * k as f64 / n;
        re += (v - mean) * w.cos();
        im += (v - mean) * w.sin();
    }
    2.0 * (re * re + im * im).sqrt() / n
}
