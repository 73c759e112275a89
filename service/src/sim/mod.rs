//! Simulated plants: the plant-model file, a deterministic model stepped in time, and a
//! Modbus/TCP server for it. The model is pure; only `server` does I/O.

mod model;
pub mod server;
mod spec;

pub use model::{Plant, StaticMap};
pub use spec::{Drift, PlantInput, PlantOutput, PlantSpec, load, parse};
