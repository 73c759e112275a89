//! First-order Butterworth filters by bilinear transform with prewarping.

use std::f64::consts::PI;

/// Whether a section passes high or low frequencies; decides how it starts.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Pass {
    High,
    Low,
}

/// One first-order IIR section `y[n] = b0 x[n] + b1 x[n-1] - a1 y[n-1]`.
///
/// It starts in steady state for its first sample (previous input equal to it, output
/// zero for a high-pass and equal to it for a low-pass), so a constant input gives
/// exactly zero out of a high-pass from the first sample on.
#[derive(Debug, Clone, Copy)]
pub struct FirstOrder {
    pass: Pass,
    b0: f64,
    b1: f64,
    a1: f64,
    /// Previous input and output; `None` until the first sample.
    state: Option<(f64, f64)>,
}

impl FirstOrder {
    /// `K = tan(pi fc / fs)`, `b = [1, -1] / (1 + K)`, `a = [1, (K - 1) / (K + 1)]`.
    pub fn highpass(cutoff_hz: f64, sample_hz: f64) -> Self {
        let k = prewarp(cutoff_hz, sample_hz);
        let b0 = 1.0 / (1.0 + k);
        Self { pass: Pass::High, b0, b1: -b0, a1: (k - 1.0) / (k + 1.0), state: None }
    }

    /// `K = tan(pi fc / fs)`, `b = [K, K] / (1 + K)`, `a = [1, (K - 1) / (K + 1)]`.
    pub fn lowpass(cutoff_hz: f64, sample_hz: f64) -> Self {
        let k = prewarp(cutoff_hz, sample_hz);
        let b0 = k / (1.0 + k);
        Self { pass: Pass::Low, b0, b1: b0, a1: (k - 1.0) / (k + 1.0), state: None }
    }

    /// Numerator `[b0, b1]` and denominator `[1, a1]`, in SciPy's `butter` layout.
    pub fn coefficients(&self) -> ([f64; 2], [f64; 2]) {
        ([self.b0, self.b1], [1.0, self.a1])
    }

    /// Forgets the past: the next sample starts the filter again in steady state.
    pub fn restart(&mut self) {
        self.state = None;
    }

    #[inline]
    pub fn filter(&mut self, x: f64) -> f64 {
        let (x1, y1) = self.state.unwrap_or(match self.pass {
            Pass::High => (x, 0.0),
            Pass::Low => (x, x),
        });
        let y = self.b0 * x + self.b1 * x1 - self.a1 * y1;
        self.state = Some((x, y));
        y
    }

    /// Complex frequency response `(re, im)` at `freq_hz`.
    pub fn response(&self, freq_hz: f64, sample_hz: f64) -> (f64, f64) {
        let w = 2.0 * PI * freq_hz / sample_hz;
        let (s, c) = w.sin_cos();
        // e^{-jw} = c - j s
        let (nr, ni) = (self.b0 + self.b1 * c, -self.b1 * s);
        let (dr, di) = (1.0 + self.a1 * c, -self.a1 * s);
        let d2 = dr * dr + di * di;
        ((nr * dr + ni * di) / d2, (ni * dr - nr * di) / d2)
    }
}

fn prewarp(cutoff_hz: f64, sample_hz: f64) -> f64 {
    (PI * cutoff_hz / sample_hz).tan()
}

/// Real part of the high-pass response at the dither frequency, `Kf^2 / (Kf^2 + Kc^2)`:
/// the factor by which the high-pass slows the averaged gradient estimate.
pub fn highpass_gain_at(dither_hz: f64, cutoff_hz: f64, sample_hz: f64) -> f64 {
    let kf = prewarp(dither_hz, sample_hz);
    let kc = prewarp(cutoff_hz, sample_hz);
    // Written as a ratio so that tiny frequencies do not underflow to 0/0.
    1.0 / (1.0 + (kc / kf).powi(2))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn highpass_of_a_constant_is_exactly_zero_from_the_first_sample() {
        let mut hp = FirstOrder::highpass(0.01, 1.0);
        for _ in 0..1000 {
            assert_eq!(hp.filter(7.25), 0.0);
        }
    }

    #[test]
    fn lowpass_of_a_constant_is_that_constant() {
        let mut lp = FirstOrder::lowpass(0.01, 1.0);
        for _ in 0..100 {
            assert!((lp.filter(-3.5) + 3.5).abs() < 1e-15);
        }
    }

    #[test]
    fn restart_forgets_the_previous_level() {
        let mut hp = FirstOrder::highpass(0.01, 1.0);
        hp.filter(1.0);
        hp.filter(5.0);
        hp.restart();
        assert_eq!(hp.filter(9.0), 0.0);
    }

    #[test]
    fn real_part_of_the_response_matches_the_closed_form() {
        // Source: DESIGN.md §4, ReH = Kf^2/(Kf^2+Kc^2) is Re{H(e^jw)} of the prewarped bilinear high-pass.
        let hp = FirstOrder::highpass(0.01, 1.0);
        let (re, _) = hp.response(0.05, 1.0);
        assert!((re - highpass_gain_at(0.05, 0.01, 1.0)).abs() < 1e-12);
    }
}
