//! Parts: op-amp profiles, preferred resistor values and pot tapers.

pub mod eseries;
pub mod profiles;
pub mod taper;

pub use profiles::{builtin, builtin_names, OpAmp};
