//! Signal sources and WAV input/output. Pure computation and file I/O, no terminal I/O.
//!
//! # Generators
//! [`generator`] turns a [`Source`] into a [`Generator`] that runs at any sample rate (the
//! engine runs sources at its oversampled rate). Every generator fills caller-provided blocks
//! and never allocates in [`Generator::fill`]; scratch and tables are built by the constructor.
//!
//! Conventions, for every periodic wave (phase `phi` in cycles, `phase` in radians added as
//! `phase / 2 pi`):
//! - phase is a 64-bit fixed-point accumulator (2^64 = one cycle): wrap-around is exact and
//!   the phase never drifts; a coherent frequency `M fs / 2^k` is represented exactly;
//! - at `phi = 0` sine, saw and triangle cross zero rising, square and pulse switch to `+amp`;
//! - band-limited square, saw, triangle and pulse are the truncated Fourier series (every
//!   harmonic strictly below Nyquist, none above), evaluated from a one-period table with
//!   cubic Hermite interpolation using exact derivative tables (see [`periodic`]); they show
//!   the Gibbs overshoot (about 9 % for square and saw) that any band-limited edge has;
//! - raw versions are the naive waveforms sampled on the grid (they alias).
//!
//! # Gating, offset and envelope
//! A source is silent (exactly 0 V, offset included) before `start` and from `stop` on; a
//! real source that is switched on produces its offset with it. While on, the output is
//! `offset + env(t) * wave(t - start)`: the waveform's own clock starts at `start` (a sweep
//! or ramp starts there, a periodic wave starts at its stated phase there), the envelope
//! multiplies the waveform only, never the offset. The envelope is triggered at `start` and,
//! with `every`, at `start + k * every`; each trigger rises linearly from the *current* level
//! at `1 / attack` per second to 1 (as an analog attack/decay generator does when it is
//! retriggered), then decays as `exp(-t / decay)`. The oscillator runs free across triggers.
//!
//! # Seeds
//! Noise is seeded by the patch seed mixed with a stable hash (FNV-1a, 64 bit) of the source
//! name ([`source_seed`]): the same seed and name give the same samples on every platform and
//! Rust version; two noise sources in one patch differ.
//!
//! # WAV files
//! [`load_wav`] reads PCM 8/16/24/32-bit and 32-bit float (plain or WAVE_FORMAT_EXTENSIBLE),
//! picks or mixes channels, converts to volts and resamples. [`WavWriter`] writes calibrated,
//! dithered, clipped-and-counted PCM or float to any `Write + Seek`; [`OutputDir`] adds atomic
//! writes and an overwrite guard on top. [`EdgeFade`] fades a file in and out at its edges.

mod cleanup;
mod control;
pub mod fade;
mod files;
mod gate;
mod noise;
pub mod periodic;
mod sweep;
mod wav_in;
mod wav_out;

use std::path::PathBuf;

use crate::model::{Source, Wave};

pub use control::{Dc, Ramp, Steps};
pub use fade::{EdgeFade, DEFAULT_FADE_S};
pub use files::{check_file_name, OutputDir, WavFile, MANIFEST_NAME};
pub use gate::Gated;
pub use noise::{PinkNoise, WhiteNoise, PINK_LOW_HZ};
pub use periodic::{BandLimited, Multitone, Naive, Shape, Sine, SineReference};
pub use sweep::LogSweep;
pub use wav_in::{file_stamp, load_wav, Playback, WavStream, MAX_RATE, MIN_RATE};
pub use wav_out::{
    check_fits, file_size, listen_gain, listen_gain_from, max_frames, Depth, WavSpec, WavWriter,
    WriteStats, LISTEN_PEAK_DBFS,
};

/// A block-based signal generator.
///
/// `fill` writes the next `out.len()` samples (volts); calling it with blocks of any sizes
/// gives the same samples as one call over the whole length. `reset` returns to the state
/// right after construction, so a render repeats bit for bit.
pub trait Generator: Send {
    /// Write the next `out.len()` samples.
    fn fill(&mut self, out: &mut [f64]);
    /// Return to the initial state.
    fn reset(&mut self);
}

/// Errors from generators and WAV input/output.
#[derive(Debug, thiserror::Error)]
pub enum SignalError {
    /// A source parameter is unusable (the patch layer normally rejects these first).
    #[error("source `{source_name}`: {what}")]
    BadParam {
        /// Source name.
        source_name: String,
        /// What is wrong and what was expected.
        what: String,
    },
    /// A file source needs its frame count: build it with [`file_source`].
    #[error("source `{source_name}` plays a WAV file: build it with signal::file_source, which loads the file")]
    NeedsLoad {
        /// Source name.
        source_name: String,
    },
    /// The input file does not exist.
    #[error("WAV file {}: not found", path.display())]
    Missing {
        /// The file.
        path: PathBuf,
    },
    /// The input file is empty or holds no samples.
    #[error("WAV file {}: empty ({what})", path.display())]
    Empty {
        /// The file.
        path: PathBuf,
        /// What is missing.
        what: &'static str,
    },
    /// The input path is not a regular file (a FIFO, a device, a folder).
    #[error("WAV file {}: {what}, not a regular file", path.display())]
    NotAFile {
        /// The path.
        path: PathBuf,
        /// What it is.
        what: &'static str,
    },
    /// The input file changed on disk while a render was reading it.
    #[error("WAV file {}: changed on disk while it was being read (size or modification time); render again once it is complete", path.display())]
    Changed {
        /// The file.
        path: PathBuf,
    },
    /// An output file would exceed the 4 GiB limit of a WAV file.
    #[error("{name}: {what}")]
    TooLarge {
        /// The output's file name.
        name: String,
        /// The size and what to change.
        what: String,
    },
    /// The input file ends before its header says it should.
    #[error("WAV file {}: truncated ({what})", path.display())]
    Truncated {
        /// The file.
        path: PathBuf,
        /// Where it ends.
        what: String,
    },
    /// The input is not a WAV file or its header is inconsistent.
    #[error("WAV file {}: malformed ({what})", path.display())]
    Malformed {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        what: String,
    },
    /// The sample format is not one railsong reads.
    #[error("WAV file {}: unsupported format ({what}); expected PCM 8/16/24/32-bit or 32-bit float", path.display())]
    Unsupported {
        /// The file.
        path: PathBuf,
        /// What the file holds.
        what: String,
    },
    /// The header declares no channels.
    #[error("WAV file {}: the header declares zero channels", path.display())]
    ZeroChannels {
        /// The file.
        path: PathBuf,
    },
    /// The sample rate is outside [`MIN_RATE`]..=[`MAX_RATE`].
    #[error("WAV file {}: sample rate {rate} Hz is outside {MIN_RATE}..={MAX_RATE} Hz", path.display())]
    BadRate {
        /// The file.
        path: PathBuf,
        /// The declared rate, Hz.
        rate: f64,
    },
    /// A float sample is NaN or infinite.
    #[error("WAV file {}: sample {index} is not a finite number", path.display())]
    NonFinite {
        /// The file.
        path: PathBuf,
        /// Index of the sample (interleaved).
        index: usize,
    },
    /// The requested channel does not exist.
    #[error("WAV file {}: channel {channel} requested (0-based) but the file has {channels} channel(s)", path.display())]
    Channel {
        /// The file.
        path: PathBuf,
        /// Requested channel.
        channel: usize,
        /// Channels in the file.
        channels: usize,
    },
    /// The resampler refused the conversion.
    #[error("WAV file {}: resampling from {from} Hz to {to} Hz failed: {what}", path.display())]
    Resample {
        /// The file.
        path: PathBuf,
        /// File rate, Hz.
        from: f64,
        /// Target rate, Hz.
        to: f64,
        /// Resampler message.
        what: String,
    },
    /// Reading or writing a file failed.
    #[error("{}: {source}", path.display())]
    Io {
        /// The file or folder.
        path: PathBuf,
        /// The underlying error.
        #[source]
        source: std::io::Error,
    },
    /// Writing a WAV stream failed (no file name known: an in-memory or caller-owned writer).
    #[error("writing WAV data failed: {0}")]
    Stream(#[source] std::io::Error),
    /// The output specification is unusable.
    #[error("WAV output: {0}")]
    BadSpec(String),
    /// The output would exceed the 4 GiB limit of the RIFF size fields.
    #[error("WAV output: more than 4 GiB of sample data (RIFF size limit); shorten the render or split it")]
    TooLong,
    /// An output file name does not pass the name filter.
    #[error("output file name `{name}` is not allowed: use letters, digits, `_` and `-` followed by .wav, .json, .csv, .svg or .html (no folders)")]
    BadName {
        /// The rejected name.
        name: String,
    },
    /// The overwrite guard refused to replace a file railsong did not write.
    #[error("refusing to overwrite {}: railsong did not write it, or it changed since (it does not match its entry in {MANIFEST_NAME}); pass --force to overwrite it", path.display())]
    Foreign {
        /// The existing file.
        path: PathBuf,
    },
}

impl SignalError {
    fn bad(src: &Source, what: impl Into<String>) -> Self {
        SignalError::BadParam {
            source_name: src.name.clone(),
            what: what.into(),
        }
    }
}

/// 64-bit FNV-1a hash of a string (Fowler, Noll, Vo; stable, platform-independent).
pub fn fnv1a(text: &str) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for b in text.bytes() {
        h ^= u64::from(b);
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    h
}

/// The seed a source's noise uses: the patch seed mixed with the hash of the source name.
pub fn source_seed(seed: u64, name: &str) -> u64 {
    noise::splitmix64(&mut (seed ^ fnv1a(name).rotate_left(17)))
}

fn check_rate(src: &Source, rate: f64) -> Result<(), SignalError> {
    if rate.is_finite() && rate > 0.0 {
        Ok(())
    } else {
        Err(SignalError::bad(
            src,
            format!("sample rate {rate} Hz: expected a finite rate > 0"),
        ))
    }
}

fn check_finite(src: &Source, key: &str, v: f64) -> Result<(), SignalError> {
    if v.is_finite() {
        Ok(())
    } else {
        Err(SignalError::bad(
            src,
            format!("{key} = {v}: expected a finite number"),
        ))
    }
}

fn check_positive(src: &Source, key: &str, v: f64) -> Result<(), SignalError> {
    if v.is_finite() && v > 0.0 {
        Ok(())
    } else {
        Err(SignalError::bad(
            src,
            format!("{key} = {v}: expected a finite value > 0"),
        ))
    }
}

/// Build the generator for a source at sample rate `rate` (Hz), with the patch `seed`.
///
/// Applies the source's offset, start/stop gating and envelope (see the module docs). A
/// [`Wave::File`] source needs its frame count and is built by [`file_source`] instead.
pub fn generator(src: &Source, rate: f64, seed: u64) -> Result<Box<dyn Generator>, SignalError> {
    check_rate(src, rate)?;
    let wave: Box<dyn Generator> = match &src.wave {
        Wave::Sine { freq, amp, phase } => {
            check_periodic(src, *freq, *amp, *phase)?;
            Box::new(Sine::new(*freq, *amp, *phase, rate))
        }
        Wave::Square {
            freq,
            amp,
            phase,
            raw,
        } => periodic_box(src, Shape::Square, *freq, *amp, *phase, *raw, rate)?,
        Wave::Triangle {
            freq,
            amp,
            phase,
            raw,
        } => periodic_box(src, Shape::Triangle, *freq, *amp, *phase, *raw, rate)?,
        Wave::Saw {
            freq,
            amp,
            phase,
            raw,
        } => periodic_box(src, Shape::Saw, *freq, *amp, *phase, *raw, rate)?,
        Wave::Pulse {
            freq,
            amp,
            phase,
            width,
            raw,
        } => {
            if !(width.is_finite() && *width > 0.0 && *width < 1.0) {
                return Err(SignalError::bad(
                    src,
                    format!("width = {width}: expected 0 < width < 1"),
                ));
            }
            periodic_box(src, Shape::Pulse(*width), *freq, *amp, *phase, *raw, rate)?
        }
        Wave::Multitone { tones } => {
            for t in tones {
                check_periodic(src, t.freq, t.amp, t.phase)?;
            }
            Box::new(Multitone::new(tones, rate))
        }
        Wave::Sweep {
            from,
            to,
            amp,
            duration,
        } => {
            check_positive(src, "from", *from)?;
            check_positive(src, "to", *to)?;
            check_positive(src, "duration", *duration)?;
            check_finite(src, "amp", *amp)?;
            Box::new(LogSweep::new(*from, *to, *amp, *duration, rate))
        }
        Wave::Noise { pink, rms } => {
            check_finite(src, "rms", *rms)?;
            let s = source_seed(seed, &src.name);
            if *pink {
                Box::new(PinkNoise::new(*rms, rate, s))
            } else {
                Box::new(WhiteNoise::new(*rms, s))
            }
        }
        Wave::Dc { level } => {
            check_finite(src, "level", *level)?;
            Box::new(Dc::new(*level))
        }
        Wave::Steps { levels, hold } => {
            if levels.is_empty() {
                return Err(SignalError::bad(src, "levels: expected at least one level"));
            }
            for l in levels {
                check_finite(src, "levels", *l)?;
            }
            check_positive(src, "hold", *hold)?;
            Box::new(Steps::new(levels, *hold, rate))
        }
        Wave::Ramp { from, to, duration } => {
            check_finite(src, "from", *from)?;
            check_finite(src, "to", *to)?;
            if !(duration.is_finite() && *duration >= 0.0) {
                return Err(SignalError::bad(
                    src,
                    format!("duration = {duration}: expected a finite value >= 0"),
                ));
            }
            Box::new(Ramp::new(*from, *to, *duration, rate))
        }
        Wave::File { .. } => {
            return Err(SignalError::NeedsLoad {
                source_name: src.name.clone(),
            })
        }
    };
    Gated::new(src, wave, rate).map(|g| Box::new(g) as Box<dyn Generator>)
}

/// Build the generator for a [`Wave::File`] source: loads the file with [`load_wav`]
/// (resampled to `rate`, `frames` long, looped or padded as the source says) and applies the
/// same gating, offset and envelope as [`generator`].
pub fn file_source(
    src: &Source,
    rate: f64,
    frames: usize,
) -> Result<Box<dyn Generator>, SignalError> {
    check_rate(src, rate)?;
    let Wave::File {
        path,
        channel,
        full_scale,
        looped,
    } = &src.wave
    else {
        return Err(SignalError::bad(src, "file_source needs a `file` wave"));
    };
    check_finite(src, "full_scale", *full_scale)?;
    let buf = load_wav(path, *channel, *full_scale, rate, frames, *looped)?;
    let wave = Box::new(Playback::new(buf, *looped));
    Gated::new(src, wave, rate).map(|g| Box::new(g) as Box<dyn Generator>)
}

/// Build the generator for a [`Wave::File`] source that streams the file from disk
/// ([`WavStream`]: memory stays flat whatever its length), with the same checks, gating,
/// offset and envelope as [`file_source`]. `frames` (at `rate`) is how much a render will
/// play: only that much of the file is checked before playback.
pub fn file_stream(
    src: &Source,
    rate: f64,
    frames: usize,
) -> Result<Box<dyn Generator>, SignalError> {
    check_rate(src, rate)?;
    let Wave::File {
        path,
        channel,
        full_scale,
        looped,
    } = &src.wave
    else {
        return Err(SignalError::bad(src, "file_stream needs a `file` wave"));
    };
    check_finite(src, "full_scale", *full_scale)?;
    let wave = Box::new(WavStream::open_for(
        path,
        *channel,
        *full_scale,
        rate,
        *looped,
        frames,
    )?);
    Gated::new(src, wave, rate).map(|g| Box::new(g) as Box<dyn Generator>)
}

fn check_periodic(src: &Source, freq: f64, amp: f64, phase: f64) -> Result<(), SignalError> {
    check_positive(src, "freq", freq)?;
    check_finite(src, "amp", amp)?;
    check_finite(src, "phase", phase)
}

fn periodic_box(
    src: &Source,
    shape: Shape,
    freq: f64,
    amp: f64,
    phase: f64,
    raw: bool,
    rate: f64,
) -> Result<Box<dyn Generator>, SignalError> {
    check_periodic(src, freq, amp, phase)?;
    Ok(if raw {
        Box::new(Naive::new(shape, freq, amp, phase, rate))
    } else {
        Box::new(BandLimited::new(shape, freq, amp, phase, rate))
    })
}
