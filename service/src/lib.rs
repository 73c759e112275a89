//! Ridgeline: an extremum-seeking optimizer that runs beside a PLC.
//!
//! It adds a small sinusoidal dither to setpoints, high-pass filters the measured
//! objective, demodulates it against the dither to estimate the gradient, and integrates
//! that into the setpoints, within operating bounds and rate limits.
//!
//! Where things are:
//! - [`app`]: the running service, links, loops and API started and stopped together.
//! - [`api`]: the HTTP API; one error type maps failures to status and JSON.
//! - [`cli`]: the command line; parses arguments and hands over. `main.rs` only calls it.
//! - [`demo`]: the built-in scenario: simulated plant, full service, progress lines.
//! - [`config`]: the service config file: typed structs, reading with every problem
//!   reported by key path and line, validation rules, and the `check` summary.
//! - [`expr`]: arithmetic expressions for objectives and plant outputs, parsed once.
//! - [`field`]: links to the plant (Modbus/TCP, HTTP), the register codec, and each
//!   loop's plan of reads and writes. The only place that talks to the plant.
//! - [`history`]: the SQLite history store: samples, events, last estimates; one batched writer.
//! - [`seek`]: the optimizer core: filters, the sine method, bounds and rate limits.
//!   Pure and synchronous; time is the tick index.
//! - [`sim`]: plant models: the plant-model file and a deterministic stepped model.
//! - [`supervisor`]: the live loops: one task per loop on its tick, and the pure
//!   per-tick decisions (`control`) that the rehearsal shares.
//! - [`metrics`]: the Prometheus registry; every known series exists from the start.
//! - [`open_files`]: the open-file limit, raised at start to what the system allows.
//! - [`report`]: where metrics and history events go, shared by links and loops.
//! - [`rehearse`]: offline runs of configured loops against a plant model, scored
//!   against the true optimum, with report, CSV and SVG plot.
//! - [`tune`]: commissioning: fit the plant from a record of steps, recommend a tuning,
//!   and prove it by rehearsal. The fit and the recommendation are pure.

pub mod api;
pub mod app;
pub mod cli;
pub mod config;
pub mod demo;
pub mod expr;
pub mod field;
pub mod history;
pub mod metrics;
pub mod open_files;
pub mod rehearse;
pub mod report;
pub mod seek;
pub mod sim;
pub mod supervisor;
pub mod tune;
