//! The plant fitted from a record of steps: a first-order lag with dead time whose output
//! passes through a quadratic static map, fitted by least squares of the model's
//! response to the recorded input (so ramps and staircases fit as well as ideal steps).
//!
//! The map's three coefficients enter linearly, so for each lag and dead time they are
//! solved exactly, and the Levenberg-Marquardt solver of the `levenberg-marquardt` crate
//! searches only the lag and the dead time (variable projection, Golub & Pereyra 1973).

use levenberg_marquardt::{LeastSquaresProblem, LevenbergMarquardt};
use nalgebra::storage::Owned;
use nalgebra::{DMatrix, DVector, Dyn, Matrix3, OMatrix, U2, Vector2, Vector3};

use super::record::Record;

/// Runs of at least this many rows with one setpoint are levels.
const LEVEL_MIN_ROWS: usize = 3;
/// A level counts as settled this many lags after the dead time (98% of a step).
const SETTLED_LAGS: f64 = 4.0;
/// A response must move the objective by this many noise standard deviations between
/// levels to be told from the noise (common practice, no single source).
const VISIBLE_NOISE_MULTIPLE: f64 = 5.0;

/// A quadratic static map centred on the starting setpoint `u0`:
/// `J = c0 + c1 (x - u0) + c2 (x - u0)^2`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Map {
    pub u0: f64,
    pub c: [f64; 3],
}

impl Map {
    pub fn value(&self, x: f64) -> f64 {
        let d = x - self.u0;
        self.c[0] + d * (self.c[1] + d * self.c[2])
    }

    /// `d2J/du2`, with its sign (negative for a peak).
    pub fn second_derivative(&self) -> f64 {
        2.0 * self.c[2]
    }

    /// `dJ/du` at `u0`.
    pub fn slope(&self) -> f64 {
        self.c[1]
    }

    /// Where `dJ/du` is zero, if the map curves at all.
    pub fn vertex(&self) -> Option<f64> {
        (self.c[2] != 0.0).then(|| self.u0 - self.c[1] / (2.0 * self.c[2]))
    }
}

/// A stretch of the record where the setpoint stood still.
#[derive(Debug, Clone, PartialEq)]
pub struct Level {
    pub setpoint: f64,
    pub from_s: f64,
    pub to_s: f64,
    /// Mean objective once settled (after the dead time and four lags); `None` when the
    /// level ended before that.
    pub settled_objective: Option<f64>,
}

/// What the record says about the plant.
#[derive(Debug, Clone, PartialEq)]
pub struct Fit {
    pub lag_s: f64,
    pub dead_time_s: f64,
    /// One standard deviation of the lag and the dead time, from the fit's Jacobian.
    pub lag_s_std: f64,
    pub dead_time_s_std: f64,
    /// The static map from the same fit; its curvature is zero when the record has fewer
    /// than three levels, which cannot show one.
    pub map: Map,
    /// One standard deviation of `d2J/du2`; `None` without a curvature.
    pub curvature_std: Option<f64>,
    pub levels: Vec<Level>,
    /// `dJ/du` between consecutive settled levels: the small-step linear gains, which the
    /// map's curvature biases over a large step (reported, not fitted).
    pub gain_per_level: Vec<f64>,
    /// The quadratic through the settled levels alone, a cross-check of the map (at least
    /// three settled levels).
    pub settled_map: Option<Map>,
    /// Standard deviation of the objective on the settled stretches, the fitted response
    /// taken out.
    pub noise_std: f64,
    /// Root mean square of all the fit's residuals.
    pub fit_rmse: f64,
    /// Largest change of the objective between consecutive levels, on the fitted map.
    pub response: f64,
}

/// Why a record cannot be fitted; each says what is missing.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum FitError {
    #[error("the record has {rows} rows with an objective; a fit needs at least {needed}")]
    TooFewRows { rows: usize, needed: usize },
    #[error("the setpoint never moves (it stays at {setpoint}): the record holds no step to fit")]
    NoStep { setpoint: f64 },
    #[error(
        "the fit did not converge ({reason}); the record may not show a first-order response to its steps"
    )]
    NotConverged { reason: String },
    #[error(
        "the plant had not settled on any level after a step: the fit gives a lag of {lag_s:.1} s and a dead \
         time of {dead_time_s:.1} s, so a level needs at least {needed_s:.0} s, and the longest after a step \
         lasted {longest_s:.0} s. Hold each level longer"
    )]
    TooShort { lag_s: f64, dead_time_s: f64, needed_s: f64, longest_s: f64 },
    #[error(
        "the response is lost in the noise: the objective moved by at most {response:.4} between levels, less \
         than {VISIBLE_NOISE_MULTIPLE} times its noise ({noise:.4}). A step of about {needed_step:.4} (this \
         record's was {step:.4}) would clear it"
    )]
    LostInNoise { response: f64, noise: f64, step: f64, needed_step: f64 },
}

/// The lagged, delayed input `x(t_k)` at every row for lag `lag_s` and dead time
/// `dead_time_s`: the setpoint of row `j` holds from `t_j` until the next row (as a PLC
/// holds a written setpoint), the process starts at rest at the first setpoint, and each
/// stretch of constant input is integrated exactly.
pub fn lagged_input(t_s: &[f64], u: &[f64], lag_s: f64, dead_time_s: f64, x: &mut [f64]) {
    let n = t_s.len();
    if n == 0 {
        return;
    }
    // exp(-dt / lag) for the last two stretch lengths: with even sampling there are only two.
    let mut cache = [(f64::NAN, 0.0); 2];
    let mut decay = |dt: f64| {
        if let Some(&(_, e)) = cache.iter().find(|(d, _)| *d == dt) {
            return e;
        }
        let e = (-dt / lag_s).exp();
        cache = [cache[1], (dt, e)];
        e
    };
    let mut state = u[0];
    x[0] = state;
    // The input in force at `now` is u[j]; it changes to u[j + 1] at t[j + 1] + dead time.
    let mut j = 0;
    let mut now = t_s[0];
    for k in 1..n {
        let end = t_s[k];
        while j + 1 < n && t_s[j + 1] + dead_time_s < end {
            let switch = (t_s[j + 1] + dead_time_s).max(now);
            let v = u[j];
            state = v + (state - v) * decay(switch - now);
            now = switch;
            j += 1;
        }
        let v = u[j];
        state = v + (state - v) * decay(end - now);
        now = end;
        x[k] = state;
    }
}

/// The runs of constant setpoint (at least [`LEVEL_MIN_ROWS`] rows), as row ranges.
fn level_runs(u: &[f64], span: f64) -> Vec<std::ops::Range<usize>> {
    let same = |a: f64, b: f64| (a - b).abs() <= 1e-9 * span.max(a.abs()).max(1e-300);
    let mut runs = Vec::new();
    let mut start = 0;
    for k in 1..=u.len() {
        if k == u.len() || !same(u[k], u[start]) {
            if k - start >= LEVEL_MIN_ROWS {
                runs.push(start..k);
            }
            start = k;
        }
    }
    runs
}

/// The two-point method on one step response (Smith 1972, *Digital Computer Process
/// Control*, from memory): from the times the response reaches 28.3% and 63.2% of its
/// change, `T = 1.5 (t63 - t28)` and `L = t63 - T`, times counted from the step.
pub fn two_point(t_s: &[f64], response: &[f64], from: f64, to: f64) -> Option<(f64, f64)> {
    let change = to - from;
    if change == 0.0 {
        return None;
    }
    let crossing = |fraction: f64| {
        let level = from + fraction * change;
        let k = response.iter().position(|&y| (y - level) * change.signum() >= 0.0)?;
        if k == 0 {
            return Some(t_s[0]);
        }
        // Linear interpolation between the samples on either side.
        let (y0, y1) = (response[k - 1], response[k]);
        let w = if y1 != y0 { (level - y0) / (y1 - y0) } else { 1.0 };
        Some(t_s[k - 1] + w * (t_s[k] - t_s[k - 1]))
    };
    // The exact fractions 1 - e^(-1/3) and 1 - e^(-1).
    let t28 = crossing(1.0 - (-1.0f64 / 3.0).exp())?;
    let t63 = crossing(1.0 - (-1.0f64).exp())?;
    let lag = 1.5 * (t63 - t28);
    (lag > 0.0).then_some((lag, (t63 - lag).max(0.0)))
}

/// The least-squares map for a given lagged input, with its residuals.
struct Projection {
    map: Map,
    /// `sigma^2`-free covariance of the coefficients: `(Phi' Phi)^-1`.
    inverse_normal: Matrix3<f64>,
}

/// The fitting problem: rows with an objective, the recorded input, and which of the
/// map's terms are free.
struct Problem<'a> {
    record: &'a Record,
    rows: Vec<usize>,
    u0: f64,
    /// Scale of `x - u0`, so the normal equations stay well conditioned.
    scale: f64,
    quadratic: bool,
    /// `(ln lag, dead time)`.
    theta: Vector2<f64>,
    x: std::cell::RefCell<Vec<f64>>,
}

impl Problem<'_> {
    fn lag_and_dead_time(theta: &Vector2<f64>) -> (f64, f64) {
        (theta[0].exp(), theta[1].abs())
    }

    /// Solves the map for `theta` and returns it with the residuals `y - J`.
    fn project(&self, theta: &Vector2<f64>) -> Option<(Projection, DVector<f64>)> {
        let (lag, dead) = Self::lag_and_dead_time(theta);
        if !(lag.is_finite() && lag > 0.0 && dead.is_finite()) {
            return None;
        }
        let mut x = self.x.borrow_mut();
        lagged_input(&self.record.t_s, &self.record.u, lag, dead, &mut x);
        let terms = if self.quadratic { 3 } else { 2 };
        let mut normal = Matrix3::<f64>::zeros();
        let mut rhs = Vector3::<f64>::zeros();
        for &k in &self.rows {
            let z = (x[k] - self.u0) / self.scale;
            let phi = [1.0, z, z * z];
            for a in 0..terms {
                rhs[a] += phi[a] * self.record.y[k];
                for b in 0..terms {
                    normal[(a, b)] += phi[a] * phi[b];
                }
            }
        }
        if !self.quadratic {
            normal[(2, 2)] = 1.0;
        }
        let inverse_normal = normal.try_inverse()?;
        let coef = inverse_normal * rhs;
        let s = self.scale;
        let map = Map {
            u0: self.u0,
            c: [coef[0], coef[1] / s, if self.quadratic { coef[2] / (s * s) } else { 0.0 }],
        };
        let residuals = DVector::from_iterator(
            self.rows.len(),
            self.rows.iter().map(|&k| self.record.y[k] - map.value(x[k])),
        );
        Some((Projection { map, inverse_normal }, residuals))
    }
}

impl LeastSquaresProblem<f64, Dyn, U2> for Problem<'_> {
    type ResidualStorage = Owned<f64, Dyn>;
    type JacobianStorage = Owned<f64, Dyn, U2>;
    type ParameterStorage = Owned<f64, U2>;

    fn set_params(&mut self, theta: &Vector2<f64>) {
        self.theta = *theta;
    }

    fn params(&self) -> Vector2<f64> {
        self.theta
    }

    fn residuals(&self) -> Option<DVector<f64>> {
        self.project(&self.theta).map(|(_, r)| r)
    }

    /// Central differences of the projected residuals (the exact reduced Jacobian would
    /// need the sensitivities of every exponential stretch; the solver only needs a good
    /// direction, and the covariance is taken from this same Jacobian).
    fn jacobian(&self) -> Option<OMatrix<f64, Dyn, U2>> {
        let mut jacobian = OMatrix::<f64, Dyn, U2>::zeros(self.rows.len());
        for p in 0..2 {
            let h = 1e-6 * self.theta[p].abs().max(if p == 0 { 1.0 } else { self.scale_time() });
            let mut up = self.theta;
            let mut down = self.theta;
            up[p] += h;
            down[p] -= h;
            let (_, r_up) = self.project(&up)?;
            let (_, r_down) = self.project(&down)?;
            jacobian.set_column(p, &((r_up - r_down) / (2.0 * h)));
        }
        Some(jacobian)
    }
}

impl Problem<'_> {
    /// A time scale for the dead time's difference step: the mean row spacing.
    fn scale_time(&self) -> f64 {
        let t = &self.record.t_s;
        (t[t.len() - 1] - t[0]) / (t.len() - 1) as f64
    }
}

/// Fits the plant to `record`.
pub fn fit(record: &Record) -> Result<Fit, FitError> {
    let rows: Vec<usize> = (0..record.len()).filter(|&k| record.y[k].is_finite()).collect();
    let needed = 20;
    if rows.len() < needed {
        return Err(FitError::TooFewRows { rows: rows.len(), needed });
    }
    let (lo, hi) =
        record.u.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &u| (lo.min(u), hi.max(u)));
    let span = hi - lo;
    let u0 = record.u[0];
    if span <= 1e-9 * u0.abs().max(1e-300) {
        return Err(FitError::NoStep { setpoint: u0 });
    }
    let runs = level_runs(&record.u, span);
    let distinct = {
        let mut values: Vec<f64> = runs.iter().map(|r| record.u[r.start]).collect();
        values.sort_by(f64::total_cmp);
        values.dedup_by(|a, b| (*a - *b).abs() <= 1e-9 * span);
        values.len()
    };
    let mut problem = Problem {
        record,
        rows,
        u0,
        scale: span,
        quadratic: distinct >= 3,
        theta: Vector2::zeros(),
        x: std::cell::RefCell::new(vec![0.0; record.len()]),
    };
    problem.theta = initial_guess(record, &runs, &problem);
    let (problem, report) = LevenbergMarquardt::new().with_patience(200).minimize(problem);
    let converged = report.termination.was_successful();
    let theta = problem.theta;
    let (projection, residuals) = problem
        .project(&theta)
        .ok_or_else(|| FitError::NotConverged { reason: "the fitted lag is not a number".into() })?;
    let (lag_s, dead_time_s) = Problem::lag_and_dead_time(&theta);
    let m = problem.rows.len();
    let free = 2 + if problem.quadratic { 3 } else { 2 };
    let rss = residuals.norm_squared();
    let sigma2 = rss / (m.saturating_sub(free).max(1)) as f64;
    let fit_rmse = (rss / m as f64).sqrt();
    let (lag_s_std, dead_time_s_std) =
        match problem.jacobian().and_then(|j| (j.transpose() * &j).try_inverse()) {
            Some(cov) => (lag_s * (sigma2 * cov[(0, 0)]).sqrt(), (sigma2 * cov[(1, 1)]).sqrt()),
            None => (f64::INFINITY, f64::INFINITY),
        };
    let map = projection.map;
    let curvature_std =
        problem.quadratic.then(|| 2.0 * (sigma2 * projection.inverse_normal[(2, 2)]).sqrt() / (span * span));

    // The settled part of each level: from the dead time and four lags after it began.
    let settle_s = dead_time_s + SETTLED_LAGS * lag_s;
    let residual_of: std::collections::HashMap<usize, f64> =
        problem.rows.iter().copied().zip(residuals.iter().copied()).collect();
    let mut settled_residuals = Vec::new();
    let mut levels = Vec::new();
    for (n, run) in runs.iter().enumerate() {
        let from_s = record.t_s[run.start];
        let to_s = record.t_s[run.end - 1];
        // The first level is where the plant stood at rest before the record began.
        let settled_from = if n == 0 && run.start == 0 { from_s } else { from_s + settle_s };
        let settled: Vec<usize> =
            run.clone().filter(|&k| record.t_s[k] >= settled_from && record.y[k].is_finite()).collect();
        let settled_objective = (settled.len() >= 2)
            .then(|| settled.iter().map(|&k| record.y[k]).sum::<f64>() / settled.len() as f64);
        settled_residuals.extend(settled.iter().filter_map(|k| residual_of.get(k)));
        levels.push(Level { setpoint: record.u[run.start], from_s, to_s, settled_objective });
    }
    let noise_std = if settled_residuals.len() >= 2 {
        let n = settled_residuals.len() as f64;
        let mean = settled_residuals.iter().sum::<f64>() / n;
        (settled_residuals.iter().map(|r| (r - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt()
    } else {
        fit_rmse
    };
    // How far the objective moves between consecutive levels, on the fitted map. A
    // response lost in the noise is the likeliest reason for a fit that wanders.
    let response = levels
        .windows(2)
        .map(|w| (map.value(w[1].setpoint) - map.value(w[0].setpoint)).abs())
        .fold(0.0, f64::max);
    if response < VISIBLE_NOISE_MULTIPLE * noise_std {
        let step = levels.windows(2).map(|w| (w[1].setpoint - w[0].setpoint).abs()).fold(0.0, f64::max);
        return Err(FitError::LostInNoise {
            response,
            noise: noise_std,
            step,
            needed_step: step_to_clear(&map, VISIBLE_NOISE_MULTIPLE * noise_std, step),
        });
    }
    if !converged {
        return Err(FitError::NotConverged { reason: format!("{:?}", report.termination) });
    }
    let after_a_step = levels.iter().skip(1).filter(|l| l.settled_objective.is_some()).count();
    if after_a_step == 0 {
        let longest_s = levels.iter().skip(1).map(|l| l.to_s - l.from_s).fold(0.0, f64::max);
        return Err(FitError::TooShort { lag_s, dead_time_s, needed_s: settle_s, longest_s });
    }
    let settled: Vec<(f64, f64)> =
        levels.iter().filter_map(|l| l.settled_objective.map(|j| (l.setpoint, j))).collect();
    let gain_per_level: Vec<f64> = settled
        .windows(2)
        .filter(|w| w[1].0 != w[0].0)
        .map(|w| (w[1].1 - w[0].1) / (w[1].0 - w[0].0))
        .collect();
    let settled_map = quadratic_through(&settled, u0);

    Ok(Fit {
        lag_s,
        dead_time_s,
        lag_s_std,
        dead_time_s_std,
        map,
        curvature_std,
        levels,
        gain_per_level,
        settled_map,
        noise_std,
        fit_rmse,
        response,
    })
}

/// The least-squares quadratic through `points` (setpoint, objective), centred on `u0`;
/// `None` with fewer than three distinct setpoints.
pub fn quadratic_through(points: &[(f64, f64)], u0: f64) -> Option<Map> {
    let mut distinct: Vec<f64> = points.iter().map(|p| p.0).collect();
    distinct.sort_by(f64::total_cmp);
    distinct.dedup();
    if distinct.len() < 3 {
        return None;
    }
    let scale = distinct[distinct.len() - 1] - distinct[0];
    let a = DMatrix::from_fn(points.len(), 3, |r, c| ((points[r].0 - u0) / scale).powi(c as i32));
    let b = DVector::from_iterator(points.len(), points.iter().map(|p| p.1));
    let coef = a.svd(true, true).solve(&b, 1e-14).ok()?;
    Some(Map { u0, c: [coef[0], coef[1] / scale, coef[2] / (scale * scale)] })
}

/// The smallest step (from `step` up) that moves the objective by `wanted` on `map`
/// either way from `u0`.
fn step_to_clear(map: &Map, wanted: f64, step: f64) -> f64 {
    let moves =
        |s: f64| (map.value(map.u0 + s) - map.c[0]).abs().max((map.value(map.u0 - s) - map.c[0]).abs());
    let mut s = step.max(f64::MIN_POSITIVE);
    for _ in 0..60 {
        if moves(s) >= wanted {
            return s;
        }
        s *= 1.25;
    }
    s
}

/// A starting lag and dead time for the solver: the two-point method on the step whose
/// settled change is largest, then the best of a few multiples of it.
fn initial_guess(record: &Record, runs: &[std::ops::Range<usize>], problem: &Problem) -> Vector2<f64> {
    let duration = record.t_s[record.len() - 1] - record.t_s[0];
    let mut guess = (duration / 20.0, 0.0);
    let tail_mean = |run: &std::ops::Range<usize>| {
        let tail = run.start + 2 * run.len() / 3..run.end;
        let values: Vec<f64> = tail.filter_map(|k| Some(record.y[k]).filter(|y| y.is_finite())).collect();
        (!values.is_empty()).then(|| values.iter().sum::<f64>() / values.len() as f64)
    };
    let best_step = runs
        .windows(2)
        .filter_map(|w| Some((w, tail_mean(&w[0])?, tail_mean(&w[1])?)))
        .max_by(|a, b| (a.2 - a.1).abs().total_cmp(&(b.2 - b.1).abs()));
    if let Some((w, from, to)) = best_step {
        // The step is taken to happen halfway along a ramp between the two levels.
        let step_at = 0.5 * (record.t_s[w[0].end - 1] + record.t_s[w[1].start]);
        let rows = w[0].end..w[1].end;
        let t: Vec<f64> = rows.clone().map(|k| record.t_s[k] - step_at).collect();
        // A short moving average keeps noise from crossing the thresholds early.
        let smooth: Vec<f64> = rows
            .clone()
            .map(|k| {
                let window: Vec<f64> = (k.saturating_sub(2)..(k + 3).min(rows.end))
                    .map(|i| record.y[i])
                    .filter(|y| y.is_finite())
                    .collect();
                if window.is_empty() { from } else { window.iter().sum::<f64>() / window.len() as f64 }
            })
            .collect();
        if let Some((lag, dead)) = two_point(&t, &smooth, from, to) {
            guess = (lag, dead);
        }
    }
    let cost = |lag: f64, dead: f64| {
        problem.project(&Vector2::new(lag.ln(), dead)).map_or(f64::INFINITY, |(_, r)| r.norm_squared())
    };
    // The dead time enters as |theta|, whose difference quotient vanishes at exactly 0:
    // the search starts at least half a row's spacing away from it.
    let (lag, dead) = (guess.0, guess.1.max(0.5 * problem.scale_time()));
    let mut best = (cost(lag, dead), (lag, dead));
    for lag_factor in [0.3, 0.6, 1.0, 1.6, 3.0] {
        for dead_factor in [0.1, 0.5, 1.0, 1.5] {
            let candidate = (lag * lag_factor, dead * dead_factor);
            let c = cost(candidate.0, candidate.1);
            if c < best.0 {
                best = (c, candidate);
            }
        }
    }
    Vector2::new(best.1.0.ln(), best.1.1)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A staircase through a Wiener plant with the given lag, dead time and map.
    fn record(lag: f64, dead: f64, map: impl Fn(f64) -> f64, levels: &[(f64, f64)], dt: f64) -> Record {
        let mut t = Vec::new();
        let mut u = Vec::new();
        let mut now = 0.0;
        for &(value, hold_s) in levels {
            let end = now + hold_s;
            while now < end - 1e-9 {
                t.push(now);
                u.push(value);
                now += dt;
            }
        }
        let mut x = vec![0.0; t.len()];
        lagged_input(&t, &u, lag, dead, &mut x);
        let y = x.iter().map(|&x| map(x)).collect();
        Record { t_s: t, u, y }
    }

    #[test]
    fn the_lagged_input_is_the_exact_delayed_first_order_response() {
        // Source: the solution of T x' = u(t - L) - x for a step at t = 0: x = 1 - e^{-(t - L)/T} for t >= L.
        let r = record(10.0, 3.0, |x| x, &[(0.0, 1.0), (1.0, 99.0)], 0.5);
        let mut x = vec![0.0; r.len()];
        lagged_input(&r.t_s, &r.u, 10.0, 3.0, &mut x);
        for (k, &t) in r.t_s.iter().enumerate() {
            let expected = if t >= 4.0 { 1.0 - (-(t - 4.0) / 10.0f64).exp() } else { 0.0 };
            assert!((x[k] - expected).abs() < 1e-12, "t = {t}: {} vs {expected}", x[k]);
        }
    }

    #[test]
    fn a_noise_free_staircase_through_a_curved_map_is_recovered_exactly() {
        let map = |x: f64| 7.0 - 2.0 * (x - 2.3).powi(2);
        let r = record(40.0, 12.0, map, &[(2.5, 200.0), (2.9, 400.0), (2.1, 400.0), (2.5, 400.0)], 1.0);
        let f = fit(&r).unwrap();
        assert!((f.lag_s / 40.0 - 1.0).abs() < 1e-6, "{f:?}");
        assert!((f.dead_time_s / 12.0 - 1.0).abs() < 1e-6, "{f:?}");
        assert!((f.map.second_derivative() + 4.0).abs() < 1e-6);
        assert!((f.map.vertex().unwrap() - 2.3).abs() < 1e-6);
        assert_eq!(f.levels.len(), 4);
    }

    #[test]
    fn a_record_without_a_step_or_too_short_is_refused_saying_so() {
        let flat = record(5.0, 0.0, |x| x, &[(1.0, 100.0)], 1.0);
        assert!(matches!(fit(&flat), Err(FitError::NoStep { .. })));
        let short = record(5.0, 0.0, |x| x, &[(1.0, 5.0)], 1.0);
        assert!(matches!(fit(&short), Err(FitError::TooFewRows { rows: 5, .. })));
        let unsettled = record(50.0, 0.0, |x| x, &[(1.0, 20.0), (2.0, 30.0)], 1.0);
        let e = fit(&unsettled).unwrap_err();
        assert!(matches!(e, FitError::TooShort { .. }), "{e}");
    }

    #[test]
    fn two_point_gives_the_lag_and_dead_time_of_an_ideal_step() {
        // Source: CHECKS.md two-point method: K=2, T=10, L=3 gives t28.3 = 6.3268 s, t63.2 = 12.9967 s.
        let t: Vec<f64> = (0..100_000).map(|k| k as f64 * 0.001).collect();
        let y: Vec<f64> = t
            .iter()
            .map(|&t| if t > 3.0 { 2.0 * (1.0 - (-(t - 3.0) / 10.0f64).exp()) } else { 0.0 })
            .collect();
        let (lag, dead) = two_point(&t, &y, 0.0, 2.0).unwrap();
        assert!((lag - 10.0).abs() < 2e-3 && (dead - 3.0).abs() < 2e-3, "{lag} {dead}");
    }
}
