//! The live loops: one task per loop on its tick, deciding through [`control`] (shared
//! with the rehearsal) and publishing a [`status::LoopStatus`] on a watch channel.

pub mod bump;
pub mod constraints;
pub mod control;
pub mod states;
pub mod status;
mod task;

pub use task::{Command, CommandError, LoopHandle, LoopTask, OnTick, Reporting, run, schedule};
