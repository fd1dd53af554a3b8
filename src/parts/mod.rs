//! Parts: op-amp and diode profiles, preferred resistor values and pot tapers.

pub mod diodes;
pub mod eseries;
pub mod profiles;
pub mod taper;

pub use diodes::Diode;
pub use profiles::{builtin, builtin_names, OpAmp};
