//! Ridgeline's black-box and reference checks, as one test binary.
//!
//! Each check against an outside source names it beside the assertion.

mod alerts;
mod api;
mod bad_input;
mod bump_test;
mod check_command;
mod classic_loop;
mod conformance;
mod constraints;
mod constraints_live;
mod drive;
mod faults;
mod filters;
mod garbage_frames;
mod history_disk;
mod history_migration;
mod live;
mod methods_live;
mod modbus_interop;
mod newton;
mod plant_lag;
mod prometheus;
mod properties;
mod rehearse_command;
mod rig;
mod several_inputs;
mod status_page;
mod stepwise;
mod transport;
mod trend;
mod tune_command;
