//! Ridgeline: an extremum-seeking optimizer that runs beside a PLC.
//!
//! It adds a small sinusoidal dither to setpoints, high-pass filters the measured
//! objective, demodulates it against the dither to estimate the gradient, and integrates
//! that into the setpoints, within operating bounds and rate limits.
//!
//! Where things are:
//! - [`cli`]: the command line; parses arguments and hands over. `main.rs` only calls it.
//! - [`config`]: the service config file: typed structs, reading with every problem
//!   reported by key path and line, validation rules, and the `check` summary.
//! - [`expr`]: arithmetic expressions for objectives and plant outputs, parsed once.
//! - [`seek`]: the optimizer core: filters, the sine method, bounds and rate limits.
//!   Pure and synchronous; time is the tick index.
//! - [`sim`]: plant models: the plant-model file and a deterministic stepped model.
//! - [`rehearse`]: offline runs of configured loops against a plant model, scored
//!   against the true optimum, with report, CSV and SVG plot.

pub mod cli;
pub mod config;
pub mod expr;
pub mod rehearse;
pub mod seek;
pub mod sim;
