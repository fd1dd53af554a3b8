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

/// What [`open_checked`] learned about a file that decodes cleanly.
#[derive(Debug, Clone, Copy)]
struct Checked {
    spec: hound::WavSpec,
    channels: usize,
    rate: f64,
    declared: usize,
    n_frames: usize,
}

/// Open `path`, check its header against what railsong accepts, and size what it can hold.
fn open_checked(
    path: &Path,
    channel: Option<usize>,
    target_rate: f64,
) -> Result<(hound::WavReader<io::BufReader<fs::File>>, Checked), SignalError> {
    let meta = fs::metadata(path).map_err(|e| match e.kind() {
        io::ErrorKind::NotFound => SignalError::Missing {
            path: path.to_path_buf(),
        },
        _ => SignalError::Io {
            path: path.to_path_buf(),
            source: e,
        },
    })?;
    if !meta.is_file() {
        use std::os::unix::fs::FileTypeExt;
        let t = meta.file_type();
        let what = if t.is_fifo() {
            "a FIFO (named pipe)"
        } else if t.is_char_device() {
            "a character device"
        } else if t.is_block_device() {
            "a block device"
        } else if t.is_socket() {
            "a socket"
        } else if t.is_dir() {
            "a folder"
        } else {
            "not a regular file"
        };
        return Err(SignalError::NotAFile {
            path: path.to_path_buf(),
            what,
        });
    }
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
    let reader = hound::WavReader::open(path).map_err(|e| hound_err(path, e))?;
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
    // The size fields may lie (a data chunk claiming 4 GiB in a 100-byte file): size by what
    // the file can hold, and let the read loop report where the data ends.
    let bytes_per_sample = usize::from(spec.bits_per_sample).div_ceil(8).max(1);
    let fits = usize::try_from(meta.len()).unwrap_or(usize::MAX) / bytes_per_sample;
    let n_frames = declared.min(fits) / channels;
    Ok((
        reader,
        Checked {
            spec,
            channels,
            rate,
            declared,
            n_frames,
        },
    ))
}

/// Decode every sample of an opened file, in order, as volts, handing each to `take`
/// (sample index over all channels, value). Stops with the error that names what is wrong.
fn decode(
    path: &Path,
    reader: &mut hound::WavReader<io::BufReader<fs::File>>,
    c: &Checked,
    full_scale: f64,
    limit: usize,
    take: &mut dyn FnMut(usize, f64),
) -> Result<(), SignalError> {
    let declared = c.declared;
    let truncated = |i: usize| SignalError::Truncated {
        path: path.to_path_buf(),
        what: format!("the data ends after {i} of {declared} samples"),
    };
    match (c.spec.sample_format, c.spec.bits_per_sample) {
        (hound::SampleFormat::Int, bits @ (8 | 16 | 24 | 32)) => {
            let scale = full_scale / 2f64.powi(i32::from(bits) - 1);
            for (i, s) in reader.samples::<i32>().take(limit).enumerate() {
                let s = s.map_err(|e| match e {
                    hound::Error::IoError(ref io) if is_short_read(io) => truncated(i),
                    e => hound_err(path, e),
                })?;
                take(i, f64::from(s) * scale);
            }
        }
        (hound::SampleFormat::Float, 32) => {
            for (i, s) in reader.samples::<f32>().take(limit).enumerate() {
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
    Ok(())
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
    let (mut reader, c) = open_checked(path, channel, target_rate)?;
    let mut mono = vec![0.0f64; c.n_frames];
    let channels = c.channels;
    // A frame that the end of the file cuts (when the declared size lies) is dropped.
    decode(
        path,
        &mut reader,
        &c,
        full_scale,
        usize::MAX,
        &mut |i, v| {
            let ch = i % channels;
            let Some(m) = mono.get_mut(i / channels) else {
                return;
            };
            match channel {
                Some(k) if k == ch => *m = v,
                Some(_) => {}
                None => *m += v / channels as f64,
            }
        },
    )?;
    let data = if (c.rate - target_rate).abs() > 1e-9 * target_rate {
        resample(path, &mono, c.rate, target_rate)?
    } else {
        mono
    };
    Ok(fit(data, frames, looped))
}

/// Frames per read of [`WavStream`] (at the file's rate).
const STREAM_CHUNK: usize = 4096;
/// Fewest frames per read of [`WavStream`].
const MIN_CHUNK: usize = 16;
/// About the most output samples one read of [`WavStream`] makes when upsampling.
const OUT_MAX: usize = 1 << 18;

/// Size and modification time of a file (`None` when it cannot be read), to notice that an
/// input changed while a render reads it.
pub fn file_stamp(path: &Path) -> Option<(u64, std::time::SystemTime)> {
    let m = fs::metadata(path).ok()?;
    Some((m.len(), m.modified().ok()?))
}

/// Plays a WAV file from disk at `target_rate` without holding it in memory: reads a chunk
/// at a time, picks or mixes the channel, resamples continuously (the same rubato sinc
/// resampler as [`load_wav`], its delay trimmed at the start), and loops by reading the file
/// again from its start into the same resampler (a seamless loop), or gives 0 V after the
/// end. [`WavStream::open`] decodes the whole file once first, storing nothing, so every error
/// [`load_wav`] would report is reported before playback starts.
pub struct WavStream {
    path: std::path::PathBuf,
    channel: Option<usize>,
    full_scale: f64,
    looped: bool,
    checked: Checked,
    chunk: usize,
    reader: Option<hound::WavReader<io::BufReader<fs::File>>>,
    resampler: Option<Async<f64>>,
    raw: Vec<f64>,
    mono: Vec<f64>,
    out: Vec<f64>,
    out_pos: usize,
    out_len: usize,
    trim: usize,
    ended: bool,
}

impl std::fmt::Debug for WavStream {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("WavStream")
            .field("path", &self.path)
            .field("looped", &self.looped)
            .finish()
    }
}

fn sinc_resampler(
    path: &Path,
    from: f64,
    to: f64,
    chunk: usize,
) -> Result<Async<f64>, SignalError> {
    let params = SincInterpolationParameters {
        sinc_len: 256,
        f_cutoff: None,
        oversampling_factor: 256,
        interpolation: SincInterpolationType::Cubic,
        window: WindowFunction::BlackmanHarris2,
    };
    Async::<f64>::new_sinc(to / from, 1.0, &params, chunk, 1, FixedAsync::Input).map_err(|e| {
        SignalError::Resample {
            path: path.to_path_buf(),
            from,
            to,
            what: e.to_string(),
        }
    })
}

impl WavStream {
    /// Check and open `path` for streaming at `target_rate`: every sample of the file is
    /// decoded once first (storing nothing), so a broken file is reported before playback.
    pub fn open(
        path: &Path,
        channel: Option<usize>,
        full_scale: f64,
        target_rate: f64,
        looped: bool,
    ) -> Result<WavStream, SignalError> {
        Self::open_for(path, channel, full_scale, target_rate, looped, usize::MAX)
    }

    /// [`WavStream::open`] for a render of `frames` frames at `target_rate`: only the part of
    /// the file that such a render plays (plus the resampler's reach) is checked first, so a
    /// long file behind a short render is not decoded whole.
    pub fn open_for(
        path: &Path,
        channel: Option<usize>,
        full_scale: f64,
        target_rate: f64,
        looped: bool,
        frames: usize,
    ) -> Result<WavStream, SignalError> {
        let (mut reader, c) = open_checked(path, channel, target_rate)?;
        let ratio = target_rate / c.rate;
        // Frames read per chunk: fewer when upsampling far, so one chunk's output (about
        // chunk x ratio samples) stays near OUT_MAX whatever the rates.
        let chunk = ((OUT_MAX as f64 / ratio.max(1.0)) as usize).clamp(MIN_CHUNK, STREAM_CHUNK);
        let used = (frames as f64 / ratio.max(1e-9)).ceil();
        let needed = if used.is_finite() && used < 1e15 {
            (used as usize).saturating_add(2 * STREAM_CHUNK + 512)
        } else {
            usize::MAX
        };
        let limit = needed.saturating_mul(c.channels);
        decode(path, &mut reader, &c, full_scale, limit, &mut |_, _| {})?;
        let resampler = if (c.rate - target_rate).abs() > 1e-9 * target_rate {
            Some(sinc_resampler(path, c.rate, target_rate, chunk)?)
        } else {
            None
        };
        let out_max = resampler.as_ref().map_or(chunk, |r| r.output_frames_max());
        let mut s = WavStream {
            path: path.to_path_buf(),
            channel,
            full_scale,
            looped,
            checked: c,
            chunk,
            reader: None,
            resampler,
            raw: Vec::with_capacity(chunk * c.channels),
            mono: vec![0.0; chunk],
            out: vec![0.0; out_max],
            out_pos: 0,
            out_len: 0,
            trim: 0,
            ended: false,
        };
        s.rewind();
        Ok(s)
    }

    fn rewind(&mut self) {
        self.reader = hound::WavReader::open(&self.path).ok();
        if let Some(r) = &mut self.resampler {
            r.reset();
            self.trim = r.output_delay();
        }
        self.out_pos = 0;
        self.out_len = 0;
        self.ended = false;
    }

    /// Read up to `chunk - at` mono frames into `self.mono[at..]`; returns how many
    /// (0 at the end of the file).
    fn read_chunk(&mut self, at: usize) -> usize {
        let c = self.checked;
        let Some(reader) = self.reader.as_mut() else {
            return 0;
        };
        self.raw.clear();
        let want = (self.chunk - at) * c.channels;
        let scale_int = self.full_scale / 2f64.powi(i32::from(c.spec.bits_per_sample) - 1);
        match c.spec.sample_format {
            hound::SampleFormat::Int => {
                for s in reader.samples::<i32>().take(want) {
                    match s {
                        Ok(v) => self.raw.push(f64::from(v) * scale_int),
                        Err(_) => break,
                    }
                }
            }
            hound::SampleFormat::Float => {
                for s in reader.samples::<f32>().take(want) {
                    match s {
                        Ok(v) => self.raw.push(f64::from(v) * self.full_scale),
                        Err(_) => break,
                    }
                }
            }
        }
        let n = self.raw.len() / c.channels;
        for (k, m) in self.mono[at..at + n].iter_mut().enumerate() {
            let frame = &self.raw[k * c.channels..(k + 1) * c.channels];
            *m = match self.channel {
                Some(ch) => frame[ch],
                None => frame.iter().sum::<f64>() / c.channels as f64,
            };
        }
        n
    }

    /// Refill `self.out` with the next resampled samples; false when nothing more comes.
    fn refill(&mut self) -> bool {
        let mut n = self.read_chunk(0);
        // A looped file runs on from its start into the same chunk: no gap at the loop point.
        let mut restarts = 0;
        while self.looped && !self.ended && n < self.chunk && restarts < 2 {
            self.reader = hound::WavReader::open(&self.path).ok();
            let got = self.read_chunk(n);
            restarts = if got == 0 { restarts + 1 } else { 0 };
            n += got;
        }
        if n == 0 {
            if self.ended || self.resampler.is_none() {
                return false;
            }
            // Flush the resampler's tail once with silence.
            self.ended = true;
        }
        if n < self.chunk {
            self.mono[n..].fill(0.0);
        }
        match &mut self.resampler {
            None => {
                self.out[..n].copy_from_slice(&self.mono[..n]);
                self.out_len = n;
            }
            Some(r) => {
                let frames_in = r.input_frames_next().min(self.mono.len());
                let input = InterleavedSlice::new(&self.mono[..frames_in], 1, frames_in);
                let olen = self.out.len();
                let output = InterleavedSlice::new_mut(&mut self.out[..], 1, olen);
                let (Ok(input), Ok(mut output)) = (input, output) else {
                    return false;
                };
                match r.process_into_buffer(&input, &mut output, None) {
                    Ok((_, written)) => self.out_len = written,
                    Err(_) => return false,
                }
            }
        }
        self.out_pos = self.trim.min(self.out_len);
        self.trim -= self.out_pos;
        true
    }
}

impl Generator for WavStream {
    fn fill(&mut self, out: &mut [f64]) {
        let mut done = 0;
        while done < out.len() {
            if self.out_pos >= self.out_len && !self.refill() {
                out[done..].fill(0.0);
                return;
            }
            let n = (out.len() - done).min(self.out_len - self.out_pos);
            out[done..done + n].copy_from_slice(&self.out[self.out_pos..self.out_pos + n]);
            self.out_pos += n;
            done += n;
        }
    }

    fn reset(&mut self) {
        self.rewind();
    }
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
