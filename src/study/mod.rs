//! Design studies: A/B comparison of two variants, parameter sweeps and tolerance
//! (Monte Carlo) runs.
//!
//! Everything here is pure computation over [`crate::model::Patch`] values and engine runs:
//! no terminal I/O and no file writes (the binary writes through
//! [`crate::signal::OutputDir`]). Points of a sweep and runs of a tolerance study run in
//! parallel on the current rayon thread pool; results always come back in point (or run)
//! order, so the numbers do not depend on the number of threads.
//!
//! - [`compare`]: level matching by RMS, the alternating A/B file with equal-power
//!   crossfades, the difference (null) file and its level, figures side by side and the
//!   plain-language sentences for each figure that moved.
//! - [`sweep`]: value lists (equal steps, log steps, explicit lists, IEC 60063 series in a
//!   range) for any numeric key path, and the parallel run of the points.
//! - [`tolerance`]: seeded perturbation of every resistor and capacitor of a validated patch,
//!   closed-form channel gains of inverting summers, percentiles, and the parallel runs.
//! - [`length`]: for a stationary patch a point or run renders the settle time plus one
//!   capture ([`length::StudyLength::Short`], the default), else the whole length.

pub mod compare;
pub mod length;
pub mod loudness;
pub mod sweep;
pub mod tolerance;

use crate::patch::PatchError;
use crate::render::RenderError;

/// What can go wrong in a study.
#[derive(Debug, thiserror::Error)]
pub enum StudyError {
    /// The patch (or a point's override) did not load.
    #[error("{0}")]
    Patch(#[from] PatchError),
    /// A render failed.
    #[error("{0}")]
    Render(#[from] RenderError),
    /// A study argument is malformed or out of range.
    #[error("{flag} {value}: {expected}")]
    BadArg {
        /// The flag (e.g. `--steps`).
        flag: String,
        /// What was given.
        value: String,
        /// What was expected.
        expected: String,
    },
    /// An output carries no signal, so there is no level to match or to refer a gain to.
    #[error("output `{output}` of {which} is silent (RMS 0 V): {what}")]
    Silent {
        /// Output name.
        output: String,
        /// Which render (`A`, `B`, `the nominal run`).
        which: String,
        /// What could not be done.
        what: String,
    },
    /// The two sides of a comparison have different outputs or lengths.
    #[error("{0}")]
    Mismatch(String),
}

impl StudyError {
    pub(crate) fn arg(flag: &str, value: impl Into<String>, expected: impl Into<String>) -> Self {
        StudyError::BadArg {
            flag: flag.to_string(),
            value: value.into(),
            expected: expected.into(),
        }
    }
}

/// RMS of a buffer (0 for an empty one).
pub fn rms(x: &[f64]) -> f64 {
    if x.is_empty() {
        return 0.0;
    }
    (x.iter().map(|v| v * v).sum::<f64>() / x.len() as f64).sqrt()
}

/// A ratio in dB, `20 log10(r)` (`-inf` for 0).
pub fn db(r: f64) -> f64 {
    20.0 * r.log10()
}
