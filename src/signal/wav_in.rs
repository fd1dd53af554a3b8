//! WAV input: decode (hound), pick or mix channels, convert to volts, resample (rubato),
//! loop or pad.
//!
//! Scaling: PCM of `b` bits maps code `c` to `c / 2^(b-1)` of full scale (so the most negative
//! code is exactly -1); float samples are taken as they are. Full scale is `full_scale` volts.
//! A channel mix is the mean of all channels (a mono sum that keeps the level of a
//! dual-mono file).
//!
//! Resampling uses rubato's asynchronous sinc resampler with a 256-tap Blackman-Harris
//! windowed sinc, cubic interpolation between 256 sub-phases and the automatic cutoff, over
//! the whole clip (`process_all`, which removes the filter delay), on the picked or mixed
//! channel only.

use std::fs;
use std::io;
use std::path::Path;

use rubato::audioadapter_buffers::direct::InterleavedSlice;
use rubato::{
    Async, FixedAsync, Resampler, SincInterpolationParameters, SincInterpolationType,
    WindowFunction,
};

use super::{Generator, SignalError};

/// Lowest WAV sample rate accepted, Hz.
pub const MIN_RATE: f64 = 100.0;
/// Highest WAV sample rate accepted, Hz.
pub const MAX_RATE: f64 = 1_536_000.0;

/// Whether an I/O error from the decoder means the file ended early: either
/// `UnexpectedEof`, or the `Other` error hound 3.5 returns on a short read ("Failed to read
/// enough bytes.").
fn is_short_read(e: &io::Error) -> bool {
    e.kind() == io::ErrorKind::UnexpectedEof
        || (e.kind() == io::ErrorKind::Other && e.to_string().contains("read enough bytes"))
}

fn hound_err(path: &Path, e: hound::Error) -> SignalError {
    let path = path.to_path_buf();
    match e {
        hound::Error::IoError(io) if is_short_read(&io) => SignalError::Truncated {
            path,
            what: "the header ends early".into(),
        },
        hound::Error::IoError(source) => SignalError::Io { path, source },
        hound::Error::FormatError(msg) if msg.contains("zero channels") => {
            SignalError::ZeroChannels { path }
        }
        hound::Error::FormatError(msg) if msg.starts_with("bits per sample") => {
            SignalError::Unsupported {
                path,
                what: msg.to_string(),
            }
        }
        hound::Error::FormatError(msg) => SignalError::Malformed {
            path,
            what: msg.to_string(),
        },
        hound::Error::Unsupported => SignalError::Unsupported {
            path,
            what: "a compressed or unknown format tag".into(),
        },
        other => SignalError::Malformed {
            path,
            what: other.to_string(),
        },
    }
}

/// Load a WAV file as volts at `target_rate`, exactly `frames` long.
///
/// `channel`: 0-based channel to use, or `None` to mix all channels (mean). Digital full scale
/// maps to `full_scale` volts. A file at another rate is resampled. The result is looped
/// (`looped`) or zero-padded to `frames`, and truncated if longer.
pub fn load_wav(
    path: &Path,
    channel: Option<usize>,
    full_scale: f64,
    target_rate: f64,
    frames: usize,
    looped: bool,
) -> Result<Vec<f64>, SignalError> {
    let meta = fs::metadata(path).map_err(|e| match e.kind() {
        io::ErrorKind::NotFound => SignalError::Missing {
            path: path.to_path_buf(),
        },
        _ => SignalError::Io {
            path: path.to_path_buf(),
            source: e,
        },
    })?;
    if meta.len() == 0 {
        return Err(SignalError::Empty {
            path: path.to_path_buf(),
            what: "0 bytes",
        });
    }
    if !(target_rate.is_finite() && target_rate > 0.0) {
        return Err(SignalError::BadRate {
            path: path.to_path_buf(),
            rate: target_rate,
        });
    }
    let mut reader = hound::WavReader::open(path).map_err(|e| hound_err(path, e))?;
    let spec = reader.spec();
    let channels = usize::from(spec.channels);
    if channels == 0 {
        return Err(SignalError::ZeroChannels {
            path: path.to_path_buf(),
        });
    }
    let rate = f64::from(spec.sample_rate);
    if !(MIN_RATE..=MAX_RATE).contains(&rate) {
        return Err(SignalError::BadRate {
            path: path.to_path_buf(),
            rate,
        });
    }
    if let Some(c) = channel {
        if c >= channels {
            return Err(SignalError::Channel {
                path: path.to_path_buf(),
                channel: c,
                channels,
            });
        }
    }
    let declared = reader.len() as usize;
    if declared == 0 {
        return Err(SignalError::Empty {
            path: path.to_path_buf(),
            what: "the data chunk holds no samples",
        });
    }
    // The size fields may lie (a data chunk claiming 4 GiB in a 100-byte file): size the
    // buffer by what the file can hold, and let the read loop report where the data ends.
    let bytes_per_sample = usize::from(spec.bits_per_sample).div_ceil(8).max(1);
    let fits = usize::try_from(meta.len()).unwrap_or(usize::MAX) / bytes_per_sample;
    let n_frames = declared.min(fits) / channels;
    let mut mono = vec![0.0f64; n_frames];
    let truncated = |i: usize| SignalError::Truncated {
        path: path.to_path_buf(),
        what: format!("the data ends after {i} of {declared} samples"),
    };
    // A frame that the end of the file cuts (when the declared size lies) is dropped.
    let mut take = |i: usize, v: f64| {
        let ch = i % channels;
        let Some(m) = mono.get_mut(i / channels) else {
            return;
        };
        match channel {
            Some(c) if c == ch => *m = v,
            Some(_) => {}
            None => *m += v / channels as f64,
        }
    };
    match (spec.sample_format, spec.bits_per_sample) {
        (hound::SampleFormat::Int, bits @ (8 | 16 | 24 | 32)) => {
            let scale = full_scale / 2f64.powi(i32::from(bits) - 1);
            for (i, s) in reader.samples::<i32>().enumerate() {
                let s = s.map_err(|e| match e {
                    hound::Error::IoError(ref io) if is_short_read(io) => truncated(i),
                    e => hound_err(path, e),
                })?;
                take(i, f64::from(s) * scale);
            }
        }
        (hound::SampleFormat::Float, 32) => {
            for (i, s) in reader.samples::<f32>().enumerate() {
                let s = s.map_err(|e| match e {
                    hound::Error::IoError(ref io) if is_short_read(io) => truncated(i),
                    e => hound_err(path, e),
                })?;
                if !s.is_finite() {
                    return Err(SignalError::NonFinite {
                        path: path.to_path_buf(),
                        index: i,
                    });
                }
                take(i, f64::from(s) * full_scale);
            }
        }
        (fmt, bits) => {
            return Err(SignalError::Unsupported {
                path: path.to_path_buf(),
                what: format!("{bits}-bit {fmt:?}"),
            })
        }
    }
    let data = if (rate - target_rate).abs() > 1e-9 * target_rate {
        resample(path, &mono, rate, target_rate)?
    } else {
        mono
    };
    Ok(fit(data, frames, looped))
}

fn resample(path: &Path, x: &[f64], from: f64, to: f64) -> Result<Vec<f64>, SignalError> {
    let fail = |what: String| SignalError::Resample {
        path: path.to_path_buf(),
        from,
        to,
        what,
    };
    let params = SincInterpolationParameters {
        sinc_len: 256,
        f_cutoff: None,
        oversampling_factor: 256,
        interpolation: SincInterpolationType::Cubic,
        window: WindowFunction::BlackmanHarris2,
    };
    let mut rs = Async::<f64>::new_sinc(to / from, 1.0, &params, 1024, 1, FixedAsync::Input)
        .map_err(|e| fail(e.to_string()))?;
    let input = InterleavedSlice::new(x, 1, x.len()).map_err(|e| fail(e.to_string()))?;
    let out = rs
        .process_all(&input, x.len(), None)
        .map_err(|e| fail(e.to_string()))?;
    Ok(out.take_data())
}

/// Loop or pad/truncate `data` to exactly `frames`.
fn fit(mut data: Vec<f64>, frames: usize, looped: bool) -> Vec<f64> {
    if looped && !data.is_empty() && data.len() < frames {
        let period = data.len();
        data.reserve(frames - period);
        for i in period..frames {
            let v = data[i % period];
            data.push(v);
        }
    }
    data.resize(frames, 0.0);
    data
}

/// Plays back a buffer of volts; after its end it loops (`looped`) or gives 0 V.
#[derive(Debug, Clone)]
pub struct Playback {
    buf: Vec<f64>,
    pos: usize,
    looped: bool,
}

impl Playback {
    /// Play `buf` (volts at the generator rate), looping if `looped`.
    pub fn new(buf: Vec<f64>, looped: bool) -> Self {
        Playback {
            buf,
            pos: 0,
            looped,
        }
    }
}

impl Generator for Playback {
    fn fill(&mut self, out: &mut [f64]) {
        let mut done = 0;
        while done < out.len() {
            if self.pos >= self.buf.len() {
                if self.looped && !self.buf.is_empty() {
                    self.pos = 0;
                } else {
                    out[done..].fill(0.0);
                    return;
                }
            }
            let n = (out.len() - done).min(self.buf.len() - self.pos);
            out[done..done + n].copy_from_slice(&self.buf[self.pos..self.pos + n]);
            self.pos += n;
            done += n;
        }
    }
    fn reset(&mut self) {
        self.pos = 0;
    }
}
