//! How much of a patch a study point or run renders (issue 13): for a stationary patch the
//! figures need only the circuit's settle time plus one capture, not the whole length.
//!
//! A patch is stationary when every source is periodic or constant (sine, multitone, square,
//! triangle, saw, pulse, DC), switched on at t = 0 and never off, with no envelope, and no
//! source plays a file: after the settle time ([`crate::measure::settle_time`], from the
//! circuit's slowest time constant) the output repeats, so a capture of [`STUDY_CAPTURE_S`]
//! has the same spectrum as any later one, and THD, THD+N, levels and gains agree with the
//! full render's (tested within 0.01 dB in `tests/study_length.rs`). Anything else (sweeps,
//! ramps, steps, noise sources, envelopes, gates, files) renders in full, as does every study
//! asked for [`StudyLength::Full`].

use crate::model::{Patch, Wave};

/// Length of the one capture a shortened study render keeps after the settle time, s:
/// enough for a coherent capture of audio tones (the analysis chooses a whole number of
/// periods within it and keeps at least half) and a 1 Hz resolution.
pub const STUDY_CAPTURE_S: f64 = 1.0;

/// Which length a study renders each point or run at.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum StudyLength {
    /// Settle time plus one capture for a stationary patch, the whole length otherwise.
    #[default]
    Short,
    /// Always the whole patch length (the behaviour before issue 13; `--full`).
    Full,
}

/// Whether every source of `patch` is periodic or constant and always on (see the module
/// docs).
pub fn is_stationary(patch: &Patch) -> bool {
    patch.sources.iter().all(|s| {
        let periodic = matches!(
            s.wave,
            Wave::Sine { .. }
                | Wave::Multitone { .. }
                | Wave::Square { .. }
                | Wave::Triangle { .. }
                | Wave::Saw { .. }
                | Wave::Pulse { .. }
                | Wave::Dc { .. }
        );
        periodic && s.start == 0.0 && s.stop.is_none() && s.envelope.is_none()
    })
}

/// Frames to render for a study of `patch` (`None`: the whole length): the settle time plus
/// [`STUDY_CAPTURE_S`], rounded up to whole frames, when `patch` is stationary and that is
/// shorter than the patch.
pub fn study_frames(patch: &Patch, length: StudyLength) -> Option<usize> {
    if length == StudyLength::Full || !is_stationary(patch) {
        return None;
    }
    let settle = crate::measure::settle_time(patch);
    let want = ((settle + STUDY_CAPTURE_S) * patch.rate).ceil();
    let full = patch.frames();
    (want.is_finite() && (want as usize) < full).then_some(want as usize)
}
