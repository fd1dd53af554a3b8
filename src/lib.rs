#![warn(missing_docs)]
//! railsong: hear and measure op-amp audio stages before you build them.
//!
//! A *patch* (TOML) describes sources, supply rails, op-amp stages, parts and outputs.
//! [`patch`] parses and validates it into a typed [`model::Patch`] (SI units, names resolved,
//! stages in topological order); [`engine`] compiles that into flat arrays and runs a
//! sample-by-sample behavioural model of each op-amp (gain-bandwidth, slew rate, output swing,
//! common-mode range with phase reversal, offsets, output current limit) at an oversampled
//! rate, returning each output's samples at the base rate and each stage's event durations.
//!
//! The library does no terminal I/O; the `railsong` binary is a thin shell around it.

pub mod alias;
pub mod analysis;
pub mod budget;
pub mod check;
pub mod circuit;
pub mod engine;
pub mod measure;
pub mod model;
pub mod parts;
pub mod patch;
pub mod plot;
pub mod render;
pub mod report;
pub mod response;
mod rng;
pub mod signal;
pub mod study;
pub mod units;
