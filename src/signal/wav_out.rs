//! WAV output: calibrated, dithered (16-bit), clipped-and-counted, streaming, to any
//! `Write + Seek`.
//!
//! Layout (RIFF/WAVE as in the *Multimedia Programming Interface and Data
//! Specifications* 1.0, 1991): `RIFF` size `WAVE`, a `fmt ` chunk, for float a `fact` chunk,
//! then `data`. PCM uses format tag 1 (WAVE_FORMAT_PCM, 16-byte `fmt `) at every depth and
//! channel count, the form most readers accept; float uses tag 3 (WAVE_FORMAT_IEEE_FLOAT,
//! 18-byte `fmt ` with `cbSize = 0`, plus `fact`). Sizes are written as placeholders and
//! patched by [`WavWriter::finish`].
//!
//! Calibration: a value of `v` volts is written as `v / full_scale` of digital full scale;
//! PCM of `b` bits scales that by `2^(b-1)` and rounds to the nearest code. 16-bit adds TPDF
//! dither of +/-1 LSB peak (the sum of two independent uniform values of +/-0.5 LSB, seeded)
//! before rounding; 24-bit and float are not dithered. Anything beyond full scale is clipped
//! in the file (PCM to the extreme codes, float to +/-1.0) and counted; the caller's samples
//! are untouched. A non-finite value is written as 0 and counted as clipped.

use std::io::{Seek, SeekFrom, Write};

use super::noise::Rng;
use super::SignalError;

/// Sample format of a written WAV file.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Depth {
    /// 16-bit PCM with TPDF dither.
    Pcm16,
    /// 24-bit PCM (the default).
    #[default]
    Pcm24,
    /// 32-bit IEEE float.
    Float32,
}

impl Depth {
    /// Bytes per sample.
    pub fn bytes(self) -> usize {
        match self {
            Depth::Pcm16 => 2,
            Depth::Pcm24 => 3,
            Depth::Float32 => 4,
        }
    }
    /// Bits per sample.
    pub fn bits(self) -> u16 {
        8 * self.bytes() as u16
    }
}

/// What to write.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct WavSpec {
    /// Sample rate, Hz (1 to 2^32 - 1).
    pub rate: u32,
    /// Channels (interleaved in the blocks given to [`WavWriter::write`]), at least 1.
    pub channels: u16,
    /// Sample format.
    pub depth: Depth,
    /// Volts that map to digital full scale (> 0).
    pub full_scale: f64,
    /// Seed of the 16-bit dither.
    pub dither_seed: u64,
}

/// What a finished write did.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct WriteStats {
    /// Frames written (samples per channel).
    pub frames: u64,
    /// Samples (over all channels) that were beyond full scale or not finite, clipped in the
    /// file.
    pub clipped: u64,
}

const CHUNK: usize = 4096;

/// `x.round()` (half away from zero) for `|x| <= 2^51`, without a library call: adding and
/// removing 1.5 * 2^52 rounds to the nearest integer, ties to even (the default rounding
/// mode); a tie (exactly half way, so `x +- 0.5` is exact) is then taken away from zero. Exact, so the same as
/// `f64::round` for every such `x` (tested in this module).
#[inline(always)]
fn round_half_away(x: f64) -> f64 {
    const MAGIC: f64 = 6_755_399_441_055_744.0; // 1.5 * 2^52
    let r = (x + MAGIC) - MAGIC;
    if (x - r).abs() == 0.5 {
        x + 0.5f64.copysign(x)
    } else {
        r
    }
}
const PCM_HEADER: u64 = 44;
const FLOAT_HEADER: u64 = 58;

/// Streaming WAV writer: [`WavWriter::new`], any number of [`WavWriter::write`] calls,
/// [`WavWriter::finish`]. Without `finish` the stream is incomplete (its sizes are
/// placeholders).
pub struct WavWriter<W: Write + Seek> {
    out: W,
    spec: WavSpec,
    inv_fs: f64,
    rng: Rng,
    samples: u64,
    clipped: u64,
    bytes: [u8; CHUNK * 4],
}

impl<W: Write + Seek> WavWriter<W> {
    /// Start a WAV stream on `out` (positioned at its start) and write the header.
    pub fn new(mut out: W, spec: WavSpec) -> Result<Self, SignalError> {
        if spec.channels == 0 {
            return Err(SignalError::BadSpec(
                "channels = 0: expected at least 1".into(),
            ));
        }
        if spec.rate == 0 {
            return Err(SignalError::BadSpec(
                "rate = 0 Hz: expected at least 1 Hz".into(),
            ));
        }
        if !(spec.full_scale.is_finite() && spec.full_scale > 0.0) {
            return Err(SignalError::BadSpec(format!(
                "full_scale = {} V: expected a finite voltage > 0",
                spec.full_scale
            )));
        }
        let header = header(&spec, 0, 0);
        out.write_all(&header).map_err(SignalError::Stream)?;
        Ok(WavWriter {
            out,
            spec,
            inv_fs: 1.0 / spec.full_scale,
            rng: Rng::new(spec.dither_seed),
            samples: 0,
            clipped: 0,
            bytes: [0; CHUNK * 4],
        })
    }

    /// Samples (all channels) that were clipped so far.
    pub fn clipped(&self) -> u64 {
        self.clipped
    }

    /// Append interleaved samples in volts. Blocks may split frames anywhere.
    pub fn write(&mut self, samples: &[f64]) -> Result<(), SignalError> {
        let bps = self.spec.depth.bytes();
        let total = (self.header_len() + (self.samples + samples.len() as u64) * bps as u64)
            .div_ceil(2)
            * 2;
        if total - 8 > u64::from(u32::MAX) {
            return Err(SignalError::TooLong);
        }
        for block in samples.chunks(CHUNK) {
            let inv_fs = self.inv_fs;
            let mut clipped = 0u64;
            // scaled, NaN -> 0 and clamped to full scale; counts what was out of range
            let mut scaled = |v: f64| {
                let x = v * inv_fs;
                if x.is_nan() {
                    clipped += 1;
                    0.0
                } else {
                    clipped += u64::from(x.abs() > 1.0);
                    x.clamp(-1.0, 1.0)
                }
            };
            match self.spec.depth {
                Depth::Pcm16 => {
                    for (&v, dst) in block.iter().zip(self.bytes.chunks_exact_mut(2)) {
                        let x = scaled(v);
                        let d = self.rng.uniform() - self.rng.uniform();
                        let c = round_half_away(x * 32_768.0 + d).clamp(-32_768.0, 32_767.0) as i16;
                        dst.copy_from_slice(&c.to_le_bytes());
                    }
                }
                Depth::Pcm24 => {
                    for (&v, dst) in block.iter().zip(self.bytes.chunks_exact_mut(3)) {
                        let x = scaled(v);
                        let c = round_half_away(x * 8_388_608.0).clamp(-8_388_608.0, 8_388_607.0)
                            as i32;
                        dst.copy_from_slice(&c.to_le_bytes()[..3]);
                    }
                }
                Depth::Float32 => {
                    for (&v, dst) in block.iter().zip(self.bytes.chunks_exact_mut(4)) {
                        dst.copy_from_slice(&(scaled(v) as f32).to_le_bytes());
                    }
                }
            }
            self.clipped += clipped;
            self.out
                .write_all(&self.bytes[..block.len() * bps])
                .map_err(SignalError::Stream)?;
        }
        self.samples += samples.len() as u64;
        Ok(())
    }

    fn header_len(&self) -> u64 {
        match self.spec.depth {
            Depth::Float32 => FLOAT_HEADER,
            _ => PCM_HEADER,
        }
    }

    /// Pad, patch the sizes, flush, and return the stream with the statistics.
    pub fn finish(mut self) -> Result<(W, WriteStats), SignalError> {
        let ch = u64::from(self.spec.channels);
        if !self.samples.is_multiple_of(ch) {
            return Err(SignalError::BadSpec(format!(
                "{} samples written: not a whole number of {ch}-channel frames",
                self.samples
            )));
        }
        let data = self.samples * self.spec.depth.bytes() as u64;
        if data % 2 == 1 {
            self.out.write_all(&[0]).map_err(SignalError::Stream)?;
        }
        let frames = self.samples / ch;
        // Both fit in u32: `write` refuses anything larger.
        let header = header(&self.spec, data as u32, frames as u32);
        let io = |e| SignalError::Stream(e);
        self.out.seek(SeekFrom::Start(0)).map_err(io)?;
        self.out.write_all(&header).map_err(io)?;
        self.out.seek(SeekFrom::End(0)).map_err(io)?;
        self.out.flush().map_err(io)?;
        Ok((
            self.out,
            WriteStats {
                frames,
                clipped: self.clipped,
            },
        ))
    }
}

/// The header for `data` bytes of sample data (`frames` per channel).
/// Size in bytes of the file [`WavWriter`] writes for `frames` frames of `spec` (header,
/// data and the pad byte).
pub fn file_size(spec: &WavSpec, frames: u64) -> u64 {
    let head = match spec.depth {
        Depth::Float32 => FLOAT_HEADER,
        _ => PCM_HEADER,
    };
    let data = frames
        .saturating_mul(u64::from(spec.channels))
        .saturating_mul(spec.depth.bytes() as u64);
    head.saturating_add(data).div_ceil(2) * 2
}

/// Most frames of `spec` a WAV file holds (its RIFF size field is 32 bits).
pub fn max_frames(spec: &WavSpec) -> u64 {
    let head = match spec.depth {
        Depth::Float32 => FLOAT_HEADER,
        _ => PCM_HEADER,
    };
    let frame = u64::from(spec.channels.max(1)) * spec.depth.bytes() as u64;
    (u64::from(u32::MAX) + 8 - head - 1) / frame
}

/// Refuse, before anything is written, an output `name` of `frames` frames that a WAV file
/// cannot hold; the message gives the size and the longest length at this rate and depth.
pub fn check_fits(name: &str, spec: &WavSpec, frames: u64) -> Result<(), SignalError> {
    if frames <= max_frames(spec) {
        return Ok(());
    }
    let rate = f64::from(spec.rate.max(1));
    let gib = file_size(spec, frames) as f64 / f64::from(1u32 << 30);
    let longest = max_frames(spec) as f64 / rate;
    let shorter = if spec.depth == Depth::Pcm16 {
        String::new()
    } else {
        let s16 = WavSpec {
            depth: Depth::Pcm16,
            ..*spec
        };
        format!(
            "; 16-bit (--depth 16) holds {:.0} s",
            max_frames(&s16) as f64 / rate
        )
    };
    Err(SignalError::TooLarge {
        name: name.to_string(),
        what: format!(
            "{} s at {} Hz, {}-bit would be a {gib:.1} GiB file, above the 4 GiB a WAV file              can hold; expected at most {longest:.0} s at this rate and depth{shorter}, or a              lower patch.rate or a shorter patch.length",
            frames as f64 / rate,
            spec.rate,
            spec.depth.bits()
        ),
    })
}

fn header(spec: &WavSpec, data: u32, frames: u32) -> Vec<u8> {
    let float = spec.depth == Depth::Float32;
    let bps = spec.depth.bytes() as u32;
    let block = u32::from(spec.channels) * bps;
    let mut h = Vec::with_capacity(FLOAT_HEADER as usize);
    let fmt_len: u32 = if float { 18 } else { 16 };
    let head_len = if float { FLOAT_HEADER } else { PCM_HEADER } as u32;
    let riff = head_len - 8 + data + (data & 1);
    h.extend_from_slice(b"RIFF");
    h.extend_from_slice(&riff.to_le_bytes());
    h.extend_from_slice(b"WAVE");
    h.extend_from_slice(b"fmt ");
    h.extend_from_slice(&fmt_len.to_le_bytes());
    h.extend_from_slice(&(if float { 3u16 } else { 1u16 }).to_le_bytes());
    h.extend_from_slice(&spec.channels.to_le_bytes());
    h.extend_from_slice(&spec.rate.to_le_bytes());
    h.extend_from_slice(&(spec.rate.wrapping_mul(block)).to_le_bytes());
    h.extend_from_slice(&(block as u16).to_le_bytes());
    h.extend_from_slice(&spec.depth.bits().to_le_bytes());
    if float {
        h.extend_from_slice(&0u16.to_le_bytes());
        h.extend_from_slice(b"fact");
        h.extend_from_slice(&4u32.to_le_bytes());
        h.extend_from_slice(&frames.to_le_bytes());
    }
    h.extend_from_slice(b"data");
    h.extend_from_slice(&data.to_le_bytes());
    debug_assert_eq!(h.len() as u32, head_len);
    h
}

/// Peak ceiling of [`listen_gain`], dBFS.
pub const LISTEN_PEAK_DBFS: f64 = -1.0;

/// Gain (a factor on volts) for a comfortable listening copy: it brings the RMS of `samples`
/// to `target_rms_dbfs`, in the convention of the figures (AES17: a full-scale sine reads
/// 0 dBFS, so RMS in dBFS is `20 log10(sqrt 2 rms / full_scale)`), but never lets the peak exceed
/// [`LISTEN_PEAK_DBFS`] (-1 dBFS): when the two disagree the peak guard wins and the copy is
/// quieter than asked (a crest factor above `LISTEN_PEAK_DBFS - target` dB). Empty, silent or
/// non-finite input, or an unusable `full_scale`, gives 1.
pub fn listen_gain(samples: &[f64], target_rms_dbfs: f64, full_scale: f64) -> f64 {
    if samples.is_empty() || !(full_scale.is_finite() && full_scale > 0.0) {
        return 1.0;
    }
    let mut sum = 0.0;
    let mut peak = 0.0f64;
    for &v in samples {
        sum += v * v;
        peak = peak.max(v.abs());
    }
    let rms = (sum / samples.len() as f64).sqrt();
    listen_gain_from(rms, peak, target_rms_dbfs, full_scale)
}

/// [`listen_gain`] from a record's RMS and peak (V), for streams that are not kept whole.
pub fn listen_gain_from(rms: f64, peak: f64, target_rms_dbfs: f64, full_scale: f64) -> f64 {
    if !(full_scale.is_finite() && full_scale > 0.0) {
        return 1.0;
    }
    if !(rms.is_finite() && rms > 0.0 && peak.is_finite() && peak > 0.0) {
        return 1.0;
    }
    // AES17: the RMS of a sine at `target` dBFS is its peak over sqrt 2
    let want = full_scale * 10f64.powf(target_rms_dbfs / 20.0) / (std::f64::consts::SQRT_2 * rms);
    let guard = full_scale * 10f64.powf(LISTEN_PEAK_DBFS / 20.0) / peak;
    want.min(guard)
}

#[cfg(test)]
mod tests {
    use super::round_half_away;

    #[test]
    fn round_half_away_equals_the_library_round() {
        // Reference: f64::round (half away from zero), on ties, their neighbours one ulp
        // away, and a dense spread of the range a 24-bit sample uses.
        let mut xs = vec![
            0.0,
            -0.0,
            0.49999999999999994,
            -0.49999999999999994,
            8_388_607.5,
        ];
        for k in -40i32..=40 {
            let t = f64::from(k) + 0.5;
            xs.extend([
                t,
                -t,
                t.next_up(),
                t.next_down(),
                -t.next_up(),
                -t.next_down(),
            ]);
        }
        let mut s = 0x2545_f491_4f6c_dd1du64;
        for _ in 0..200_000 {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            xs.push((s >> 11) as f64 / (1u64 << 53) as f64 * 2.0 * 8_388_609.0 - 8_388_609.0);
        }
        for x in xs {
            assert_eq!(round_half_away(x), x.round(), "{x:e}");
        }
    }
}
