//! Newton-based extremum seeking: the sine method's gradient estimate, a curvature
//! (Hessian) estimate demodulated from the same dither, and a step scaled by its inverse
//! so the convergence rate is a setting rather than a property of the plant.
//!
//! The inverse-Hessian (Riccati) filter `dG/dt = w_r G - w_r G Ĥ G` is run in its exact
//! form: `d(G^-1)/dt = w_r (Ĥ - G^-1)`, so `G^-1` is a first-order low-pass of the Hessian
//! samples. Filtering the Hessian at `hessian_hz` and solving against it each tick gives
//! the Riccati solution exactly (`G(t) = 1 / (H + (1/G0 - H) e^{-w_r t})` for a constant
//! `H`) at any tick length, and never lets `G` overflow when the samples are noisy.
//!
//! Before that filter each Hessian sample is averaged over one common period of the
//! dithers. Far from the optimum the gradient term of the objective leaves a ripple in
//! `N y` at the dither frequency and its harmonics some `8 |e| / a` times the curvature
//! (the error `e` in dither amplitudes `a`); a first-order filter slow enough to remove
//! it would follow the plant too slowly, while the average over a whole period removes
//! every harmonic of it exactly.

use std::f64::consts::TAU;

use super::filter::FirstOrder;
use super::sine::Wave;
use super::{Curvature, Detail, InputState, Method, Move};

/// Settings of one input's dither.
#[derive(Debug, Clone, Copy)]
pub struct NewtonInput {
    pub amplitude: f64,
    pub period_s: f64,
}

/// Settings of one loop.
#[derive(Debug, Clone)]
pub struct NewtonSettings {
    pub tick_s: f64,
    /// +1 to maximize, -1 to minimize.
    pub sign: f64,
    pub highpass_hz: f64,
    pub lowpass_hz: Option<f64>,
    pub phase_deg: f64,
    /// The convergence time constant, whatever the curvature.
    pub time_constant_s: f64,
    /// Cutoff of the curvature estimate's filter.
    pub hessian_hz: f64,
    /// `|d2J/du2|` to start from, on every input.
    pub initial_curvature: f64,
    pub inputs: Vec<NewtonInput>,
}

/// A curvature estimate below this fraction of the initial one is too small to invert
/// safely: the Newton step would grow without bound as it vanishes. Our choice: a tenth
/// lets the step grow tenfold over the one the initial curvature gives, no more.
pub const TRUST_FRACTION: f64 = 0.1;

/// The demodulation of one high-passed objective sample `y` against the inputs' dither
/// references `sines` (each `sin` of its dither phase, delayed by the phase compensation):
/// gradient `M_i y = (2/a_i) sin_i y` and Hessian `N_ii y = (16/a_i^2)(sin_i^2 - 1/2) y`,
/// `N_ij y = (4/(a_i a_j)) sin_i sin_j y` (CHECKS.md, Newton-based extremum seeking).
/// `hessian` is row-major, `n x n`.
pub fn demodulate(amplitudes: &[f64], sines: &[f64], y: f64, gradient: &mut [f64], hessian: &mut [f64]) {
    let n = amplitudes.len();
    for i in 0..n {
        gradient[i] = 2.0 / amplitudes[i] * sines[i] * y;
        for j in 0..n {
            hessian[i * n + j] = if i == j {
                16.0 / (amplitudes[i] * amplitudes[i]) * (sines[i] * sines[i] - 0.5) * y
            } else {
                4.0 / (amplitudes[i] * amplitudes[j]) * sines[i] * sines[j] * y
            };
        }
    }
}

/// The filtered Hessian (the inverse of the Riccati filter's `G`), row-major.
#[derive(Debug, Clone)]
pub struct CurvatureFilter {
    n: usize,
    /// `1 - e^{-w_r T}`: the exact per-tick weight of a new sample.
    alpha: f64,
    initial: f64,
    estimate: Vec<f64>,
}

impl CurvatureFilter {
    /// A filter over `n` inputs at `w_r = 2 pi hessian_hz`, starting from `initial`
    /// times the identity.
    pub fn new(n: usize, hessian_hz: f64, tick_s: f64, initial: f64) -> Self {
        let alpha = 1.0 - (-TAU * hessian_hz * tick_s).exp();
        let mut f = CurvatureFilter { n, alpha, initial, estimate: vec![0.0; n * n] };
        f.restart();
        f
    }

    pub fn restart(&mut self) {
        let n = self.n;
        for (k, e) in self.estimate.iter_mut().enumerate() {
            *e = if k / n == k % n { self.initial } else { 0.0 };
        }
    }

    /// One tick's Hessian sample. A sample that is not finite is skipped, so one bad
    /// value cannot poison the estimate for good.
    pub fn update(&mut self, sample: &[f64]) {
        if sample.iter().all(|v| v.is_finite()) {
            for (e, s) in self.estimate.iter_mut().zip(sample) {
                *e += self.alpha * (s - *e);
            }
        }
    }

    /// The filtered Hessian, row-major.
    pub fn estimate(&self) -> &[f64] {
        &self.estimate
    }

    /// `G = estimate^-1` at one entry, for one input (the Riccati filter's state).
    #[cfg(test)]
    fn inverse_diagonal(&self, i: usize) -> Option<f64> {
        let mut l = vec![0.0; self.n * self.n];
        let mut x = vec![0.0; self.n];
        let mut e = vec![0.0; self.n];
        e[i] = 1.0;
        cholesky(&self.estimate, self.n, &mut l, 0.0)?;
        solve(&l, self.n, &e, &mut x);
        Some(x[i])
    }
}

/// Cholesky factor `L` (row-major, lower) of the symmetric part of `a`; `None` when a
/// pivot falls below `min_pivot` (not positive definite, or too near singular).
fn cholesky(a: &[f64], n: usize, l: &mut [f64], min_pivot: f64) -> Option<()> {
    for i in 0..n {
        for j in 0..=i {
            let mut sum = 0.5 * (a[i * n + j] + a[j * n + i]);
            for k in 0..j {
                sum -= l[i * n + k] * l[j * n + k];
            }
            if i == j {
                if !(sum > min_pivot && sum.is_finite()) {
                    return None;
                }
                l[i * n + i] = sum.sqrt();
            } else {
                l[i * n + j] = sum / l[j * n + j];
            }
        }
    }
    Some(())
}

/// Solves `L L^T x = b`.
fn solve(l: &[f64], n: usize, b: &[f64], x: &mut [f64]) {
    for i in 0..n {
        let mut sum = b[i];
        for k in 0..i {
            sum -= l[i * n + k] * x[k];
        }
        x[i] = sum / l[i * n + i];
    }
    for i in (0..n).rev() {
        let mut sum = x[i];
        for k in i + 1..n {
            sum -= l[k * n + i] * x[k];
        }
        x[i] = sum / l[i * n + i];
    }
}

/// Longest common period, in ticks, that the Hessian samples are averaged over; beyond
/// it they are averaged over the longest dither period (our choice: the ripple is then
/// cancelled for that input and much reduced for the others).
const MAX_COMMON_PERIOD_TICKS: u64 = 100_000;

/// The moving average of `width` values over the last `len` ticks.
#[derive(Debug, Clone)]
struct PeriodAverage {
    len: usize,
    width: usize,
    values: Vec<f64>,
    sum: Vec<f64>,
    mean: Vec<f64>,
    next: usize,
    full: bool,
}

impl PeriodAverage {
    fn new(len: usize, width: usize) -> Self {
        let len = len.max(1);
        PeriodAverage {
            len,
            width,
            values: vec![0.0; len * width],
            sum: vec![0.0; width],
            mean: vec![0.0; width],
            next: 0,
            full: false,
        }
    }

    /// Adds a sample; the mean of the last `len` once that many have come.
    fn push(&mut self, sample: &[f64]) -> Option<&[f64]> {
        let row = &mut self.values[self.next * self.width..(self.next + 1) * self.width];
        for ((old, new), sum) in row.iter_mut().zip(sample).zip(&mut self.sum) {
            *sum += new - *old;
            *old = *new;
        }
        self.next += 1;
        if self.next == self.len {
            self.next = 0;
            self.full = true;
            // Summed afresh once a period, so rounding never accumulates.
            for (k, sum) in self.sum.iter_mut().enumerate() {
                *sum = self.values.iter().skip(k).step_by(self.width).sum();
            }
        }
        if !self.full {
            return None;
        }
        for (mean, sum) in self.mean.iter_mut().zip(&self.sum) {
            *mean = sum / self.len as f64;
        }
        Some(&self.mean)
    }
}

/// One common period of the dithers in ticks (see [`MAX_COMMON_PERIOD_TICKS`]).
fn common_period_ticks(periods_s: &[f64], tick_s: f64) -> usize {
    fn gcd(a: u64, b: u64) -> u64 {
        if b == 0 { a } else { gcd(b, a % b) }
    }
    let ticks: Vec<u64> = periods_s.iter().map(|p| (p / tick_s).round().max(1.0) as u64).collect();
    let longest = ticks.iter().copied().max().unwrap_or(1);
    let mut common = 1u64;
    for &t in &ticks {
        common = common / gcd(common, t) * t;
        if common > MAX_COMMON_PERIOD_TICKS {
            return longest as usize;
        }
    }
    common as usize
}

#[derive(Debug, Clone)]
struct Channel {
    amplitude: f64,
    wave: Wave,
    lowpass: Option<FirstOrder>,
}

/// The Newton-based method of DESIGN.md §8 for any number of inputs.
#[derive(Debug, Clone)]
pub struct Newton {
    settings: NewtonSettings,
    /// `tick_s / time_constant_s`.
    rate: f64,
    highpass: FirstOrder,
    channels: Vec<Channel>,
    period_average: PeriodAverage,
    curvature: CurvatureFilter,
    /// Cholesky pivots below this mean the estimate is not trusted.
    min_pivot: f64,
    amplitudes: Vec<f64>,
    sines: Vec<f64>,
    gradient: Vec<f64>,
    hessian: Vec<f64>,
    factor: Vec<f64>,
    solved: Vec<f64>,
    shown: Vec<Curvature>,
}

impl Newton {
    pub fn new(s: &NewtonSettings) -> Self {
        let n = s.inputs.len();
        let fs = 1.0 / s.tick_s;
        let channels = s
            .inputs
            .iter()
            .map(|i| Channel {
                amplitude: i.amplitude,
                wave: Wave::new(i.period_s / s.tick_s, s.phase_deg.to_radians()),
                lowpass: s.lowpass_hz.map(|fc| FirstOrder::lowpass(fc, fs)),
            })
            .collect();
        Newton {
            settings: s.clone(),
            rate: s.tick_s / s.time_constant_s,
            highpass: FirstOrder::highpass(s.highpass_hz, fs),
            channels,
            period_average: PeriodAverage::new(
                common_period_ticks(&s.inputs.iter().map(|i| i.period_s).collect::<Vec<_>>(), s.tick_s),
                n * n,
            ),
            curvature: CurvatureFilter::new(n, s.hessian_hz, s.tick_s, s.initial_curvature),
            min_pivot: TRUST_FRACTION * s.initial_curvature,
            amplitudes: s.inputs.iter().map(|i| i.amplitude).collect(),
            sines: vec![0.0; n],
            gradient: vec![0.0; n],
            hessian: vec![0.0; n * n],
            factor: vec![0.0; n * n],
            solved: vec![0.0; n],
            shown: vec![Curvature { estimate: s.initial_curvature, trusted: true }; n],
        }
    }
}

impl Method for Newton {
    fn step(&mut self, tick: u64, objective: f64, _inputs: &[InputState], moves: &mut [Move]) {
        // Seek a minimum of `-sign J`: the Hessian there is positive definite.
        let y = -self.settings.sign * self.highpass.filter(objective);
        let tick = i64::try_from(tick).unwrap_or(i64::MAX);
        for ((ch, sine), mv) in self.channels.iter().zip(&mut self.sines).zip(moves.iter_mut()) {
            let (reference, dither) = ch.wave.at(tick);
            *sine = reference;
            mv.dither = ch.amplitude * dither;
        }
        demodulate(&self.amplitudes, &self.sines, y, &mut self.gradient, &mut self.hessian);
        for (ch, g) in self.channels.iter_mut().zip(&mut self.gradient) {
            if let Some(lp) = &mut ch.lowpass {
                *g = lp.filter(*g);
            }
        }
        if let Some(averaged) = self.period_average.push(&self.hessian) {
            self.curvature.update(averaged);
        }
        let n = self.channels.len();
        let trusted = cholesky(self.curvature.estimate(), n, &mut self.factor, self.min_pivot).is_some();
        if trusted {
            solve(&self.factor, n, &self.gradient, &mut self.solved);
        } else {
            // The guard's fallback: a gradient step scaled by the initial curvature.
            let initial = self.curvature.initial;
            for (x, g) in self.solved.iter_mut().zip(&self.gradient) {
                *x = g / initial;
            }
        }
        for (i, mv) in moves.iter_mut().enumerate() {
            mv.gradient = -self.settings.sign * self.gradient[i];
            mv.step = -self.rate * self.solved[i];
            self.shown[i] = Curvature { estimate: self.curvature.estimate()[i * n + i], trusted };
        }
    }

    fn restart(&mut self) {
        *self = Newton::new(&self.settings);
    }

    fn detail(&self) -> Detail<'_> {
        Detail::Curvature(&self.shown)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_curvature_filter_follows_the_riccati_closed_form() {
        // CHECKS.md: G(t) = 1 / (H + (1/G0 - H) e^{-w_r t}); H=2, G0=0.1, w_r=0.5, t=4
        // gives 0.324393, whatever the tick.
        for tick_s in [0.001, 0.1, 1.0] {
            let mut f = CurvatureFilter::new(1, 0.5 / TAU, tick_s, 1.0 / 0.1);
            for _ in 0..(4.0 / tick_s).round() as usize {
                f.update(&[2.0]);
            }
            let g = f.inverse_diagonal(0).unwrap();
            assert!((g - 0.324393).abs() < 1e-6, "tick {tick_s}: {g}");
        }
    }

    #[test]
    fn cholesky_solves_a_symmetric_positive_definite_system() {
        let a = [4.0, 1.0, 1.0, 3.0];
        let mut l = [0.0; 4];
        let mut x = [0.0; 2];
        cholesky(&a, 2, &mut l, 0.0).unwrap();
        solve(&l, 2, &[1.0, 2.0], &mut x);
        // By hand: x = A^-1 b = (1/11) [3 -1; -1 4] (1, 2) = (1/11, 7/11).
        assert!((x[0] - 1.0 / 11.0).abs() < 1e-15 && (x[1] - 7.0 / 11.0).abs() < 1e-15);
        assert!(cholesky(&[1.0, 2.0, 2.0, 1.0], 2, &mut l, 0.0).is_none(), "indefinite");
    }

    #[test]
    fn the_common_period_is_the_least_common_multiple_in_ticks() {
        assert_eq!(common_period_ticks(&[20.0, 14.0], 1.0), 140);
        assert_eq!(common_period_ticks(&[120.0], 2.0), 60);
        assert_eq!(common_period_ticks(&[997.0, 991.0, 983.0], 1.0), 997, "too long: the longest period");
    }

    #[test]
    fn the_period_average_removes_a_ripple_at_the_dither_and_its_harmonics_exactly() {
        let mut avg = PeriodAverage::new(20, 1);
        let mut last = None;
        for k in 0..1000 {
            let phase = std::f64::consts::TAU * k as f64 / 20.0;
            last = avg.push(&[4.0 + 640.0 * phase.sin() + 50.0 * (3.0 * phase).cos()]).map(|m| m[0]);
        }
        assert!((last.unwrap() - 4.0).abs() < 1e-9, "{last:?}");
    }

    fn newton(initial_curvature: f64) -> Newton {
        Newton::new(&NewtonSettings {
            tick_s: 1.0,
            sign: 1.0,
            highpass_hz: 0.01,
            lowpass_hz: None,
            phase_deg: 0.0,
            time_constant_s: 100.0,
            hessian_hz: 0.002,
            initial_curvature,
            inputs: vec![NewtonInput { amplitude: 0.1, period_s: 20.0 }],
        })
    }

    #[test]
    fn a_wrong_signed_curvature_falls_back_to_a_gradient_step() {
        let mut m = newton(2.0);
        // A convex objective while maximizing: the curvature estimate turns negative.
        let mut moves = [Move::default()];
        for tick in 0..5000 {
            // The input is held at 0 (only the estimate is judged): J = dither^2.
            let d = moves[0].dither;
            m.step(tick, d * d, &[], &mut moves);
        }
        let Detail::Curvature(c) = m.detail() else { panic!("newton shows its curvature") };
        assert!(c[0].estimate < 0.0 && !c[0].trusted, "{c:?}");
        assert!(moves[0].step.is_finite());
        assert!((moves[0].step - -m.rate * (-moves[0].gradient) / 2.0).abs() < 1e-12, "the fallback step");
    }
}
