//! Simulated plants: the plant-model file and a deterministic model stepped in time.
//! The model is pure; serving it over Modbus/TCP is a separate concern.

mod model;
mod spec;

pub use model::{Plant, StaticMap};
pub use spec::{Drift, PlantInput, PlantOutput, PlantSpec, load, parse};
