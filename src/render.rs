//! Rendering a patch end to end: every source's generator (synthetic, or a WAV file) at the
//! engine's internal rate, the engine, and each output's samples at the base rate.
//!
//! This layer joins [`crate::signal`] and [`crate::engine`]. It reads WAV *inputs* but writes
//! nothing: writing renders is the caller's job (through [`crate::signal::OutputDir`]), so a
//! failed render never leaves a file behind.

use crate::analysis::{self, Settings, TestSignal};
use crate::engine::{self, Engine, EngineError, Plan, Run, SourceFeed};
use crate::measure::{self, Measurement};
use crate::model::{Patch, Wave};
use crate::signal::{self, Generator, SignalError};

/// What can go wrong while rendering.
#[derive(Debug, thiserror::Error)]
pub enum RenderError {
    /// The engine rejected the patch.
    #[error("{0}")]
    Engine(#[from] EngineError),
    /// Writing or another signal-layer step failed.
    #[error("{0}")]
    Signal(#[from] SignalError),
    /// A source could not be built (a WAV input that is missing or broken, a bad value).
    #[error("{key}: {source}")]
    Source {
        /// The patch key of the source (`sources.NAME.path` for a file, `sources.NAME`
        /// otherwise).
        key: String,
        /// What went wrong.
        source: SignalError,
    },
}

/// Options of [`render`].
#[derive(Debug, Clone, Default)]
pub struct RenderOptions {
    /// Frames to render at the base rate (default: the patch length).
    pub frames: Option<usize>,
    /// Also measure each op-amp stage's alias figure (see [`engine::alias_probe`]).
    pub alias_probe: bool,
    /// Leave out the band-limited corrections of the engine's events (slew corners,
    /// reversal edges, diode knees: `engine::Plan::antialias`). They band-limit the signal
    /// to the base rate's audio band, so a capture at the internal rate that measures
    /// components above it (THD past the file's Nyquist frequency, [`complete_thd`]) takes
    /// the model's own steps without them.
    pub uncorrected: bool,
}

/// Adapts a [`Generator`] (which starts at t = 0) to the engine's feed contract (which starts
/// `preroll` samples before t = 0): the pre-roll holds the source's resting value.
struct GeneratorFeed {
    gen: Box<dyn Generator>,
    preroll: usize,
    left: usize,
    rest: f64,
}

impl SourceFeed for GeneratorFeed {
    fn fill(&mut self, out: &mut [f64]) {
        let k = self.left.min(out.len());
        out[..k].fill(self.rest);
        self.left -= k;
        if k < out.len() {
            self.gen.fill(&mut out[k..]);
        }
    }

    fn reset(&mut self) {
        self.gen.reset();
        self.left = self.preroll;
    }
}

/// One feed per source of `patch`, at the plan's internal rate.
pub fn feeds(patch: &Patch, plan: &Plan) -> Result<Vec<Box<dyn SourceFeed>>, RenderError> {
    feeds_for(patch, plan, patch.frames())
}

/// [`feeds`] for a render of `frames` frames at the base rate (a WAV input is checked only as
/// far as such a render plays it).
fn feeds_for(
    patch: &Patch,
    plan: &Plan,
    frames: usize,
) -> Result<Vec<Box<dyn SourceFeed>>, RenderError> {
    let fs = plan.internal_rate;
    let internal = frames
        .saturating_add(1)
        .saturating_mul(plan.oversample.max(1));
    patch
        .sources
        .iter()
        .zip(&plan.sources)
        .map(|(src, sp)| {
            let gen = match &src.wave {
                Wave::File { .. } => {
                    signal::file_stream(src, fs, internal).map_err(|e| RenderError::Source {
                        key: format!("sources.{}.path", src.name),
                        source: e,
                    })?
                }
                _ => signal::generator(src, fs, patch.seed).map_err(|e| RenderError::Source {
                    key: format!("sources.{}", src.name),
                    source: e,
                })?,
            };
            Ok(Box::new(GeneratorFeed {
                gen,
                preroll: plan.preroll,
                left: plan.preroll,
                rest: sp.rest,
            }) as Box<dyn SourceFeed>)
        })
        .collect()
}

/// The patch as the engine's compiler sees it: every source whose waveform comes from
/// [`crate::signal`] is replaced by its resting (t = 0) DC value, which is all the plan needs
/// from it (pre-roll level and capacitor steady states); the feeds supply the waveform.
pub(crate) fn for_compile(patch: &Patch) -> Patch {
    let mut p = patch.clone();
    for s in &mut p.sources {
        let level = match &s.wave {
            Wave::Pulse { amp, width, .. } => amp * (2.0 * width - 1.0),
            Wave::Steps { levels, .. } => levels.first().copied().unwrap_or(0.0),
            Wave::Ramp { from, .. } => *from,
            Wave::Dc { level } => *level,
            _ => 0.0,
        };
        s.wave = Wave::Dc { level };
    }
    p
}

/// Render every output of `patch`, keeping every sample. `progress` is called with the
/// fraction done (0..=1) after each chunk. For long renders prefer [`render_streaming`].
pub fn render(
    patch: &Patch,
    opts: &RenderOptions,
    progress: &mut dyn FnMut(f64),
) -> Result<Run, RenderError> {
    let frames = opts.frames.unwrap_or_else(|| patch.frames());
    let mut full: Vec<Vec<f64>> = patch
        .outputs
        .iter()
        .map(|_| Vec::with_capacity(frames))
        .collect();
    let mut streamed = render_streaming(
        patch,
        opts,
        &mut |i, x| {
            full[i].extend_from_slice(x);
            Ok(())
        },
        progress,
    )?;
    for (o, samples) in streamed.run.outputs.iter_mut().zip(full) {
        o.samples = samples;
    }
    streamed.run.first_frame = 0;
    Ok(streamed.run)
}

/// The same patch with every source muted (its waveform replaced by silence, its DC offset
/// kept): the idle-channel render that noise and SNR figures are measured against.
pub fn muted(patch: &Patch) -> Patch {
    let mut p = patch.clone();
    for s in &mut p.sources {
        s.wave = Wave::Dc { level: 0.0 };
        s.envelope = None;
    }
    p
}

/// Frames of the idle-channel render behind the noise and SNR figures (`None`: the whole
/// length). The figures are taken on the last [`TAIL_MAX`] samples of the idle render after
/// the settle time ([`measure::measure`]); when every source of the muted patch is constant
/// from t = 0 (its offset is 0, or it is on from t = 0 and never off), the idle channel is
/// stationary noise after the settle time, so the settle time plus one capture of that same
/// length gives figures of the same precision as the whole length (a different stretch of
/// the same noise: tested in `tests/render_idle.rs` within the noise figures' 0.1 dB).
pub fn idle_frames(patch: &Patch) -> Option<usize> {
    let constant = patch
        .sources
        .iter()
        .all(|s| s.offset == 0.0 || (s.start == 0.0 && s.stop.is_none()));
    if !constant {
        return None;
    }
    let settle = (measure::settle_time(patch) * patch.rate).round();
    let want = settle + TAIL_MAX as f64;
    (want.is_finite() && (want as usize) < patch.frames()).then_some(want as usize)
}

/// The idle-channel render of `patch` ([`muted`]), streamed without a sink, [`idle_frames`]
/// long (the whole length when `full`).
pub fn render_idle(patch: &Patch, full: bool) -> Result<Streamed, RenderError> {
    let opts = RenderOptions {
        frames: if full { None } else { idle_frames(patch) },
        alias_probe: false,
        uncorrected: false,
    };
    render_streaming(&muted(patch), &opts, &mut |_, _| Ok(()), &mut |_| {})
}

/// Running peak, RMS and DC of a stream (the full-record levels of a long render, without
/// keeping it).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LevelAccumulator {
    n: u64,
    sum: f64,
    sum_sq: f64,
    max: f64,
    min: f64,
}

impl Default for LevelAccumulator {
    fn default() -> Self {
        LevelAccumulator {
            n: 0,
            sum: 0.0,
            sum_sq: 0.0,
            max: f64::NEG_INFINITY,
            min: f64::INFINITY,
        }
    }
}

impl LevelAccumulator {
    /// Add samples.
    pub fn push(&mut self, x: &[f64]) {
        for &v in x {
            self.sum += v;
            self.sum_sq += v * v;
            self.max = self.max.max(v);
            self.min = self.min.min(v);
        }
        self.n += x.len() as u64;
    }

    /// The levels so far (`None` before the first sample).
    pub fn levels(&self) -> Option<crate::analysis::Levels> {
        if self.n == 0 {
            return None;
        }
        let n = self.n as f64;
        let dc = self.sum / n;
        let ms = self.sum_sq / n;
        let rms = ms.sqrt();
        let peak = self.max.abs().max(self.min.abs());
        Some(crate::analysis::Levels {
            peak_v: peak,
            peak_pos_v: self.max,
            peak_neg_v: self.min,
            rms_v: rms,
            ac_rms_v: (ms - dc * dc).max(0.0).sqrt(),
            dc_v: dc,
            crest_db: (rms > 0.0).then(|| 20.0 * (peak / rms).log10()),
        })
    }
}

/// The last `len` samples of a stream.
#[derive(Debug, Clone)]
pub struct Tail {
    buf: Vec<f64>,
    pos: usize,
    filled: bool,
}

impl Tail {
    /// A tail keeping `len` samples (allocated once).
    pub fn new(len: usize) -> Tail {
        Tail {
            buf: vec![0.0; len.max(1)],
            pos: 0,
            filled: false,
        }
    }

    /// Add samples.
    pub fn push(&mut self, x: &[f64]) {
        let n = self.buf.len();
        let x = if x.len() > n { &x[x.len() - n..] } else { x };
        for &v in x {
            self.buf[self.pos] = v;
            self.pos += 1;
            if self.pos == n {
                self.pos = 0;
                self.filled = true;
            }
        }
    }

    /// Number of samples kept so far.
    pub fn len(&self) -> usize {
        if self.filled {
            self.buf.len()
        } else {
            self.pos
        }
    }

    /// Whether nothing was kept yet.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The kept samples, oldest first.
    pub fn into_vec(self) -> Vec<f64> {
        if !self.filled {
            let mut b = self.buf;
            b.truncate(self.pos);
            return b;
        }
        let mut v = Vec::with_capacity(self.buf.len());
        v.extend_from_slice(&self.buf[self.pos..]);
        v.extend_from_slice(&self.buf[..self.pos]);
        v
    }
}

/// Longest tail a streaming render keeps per output for spectral figures: 2^18 samples
/// (5.46 s at 48 kHz, 2 MiB).
pub const TAIL_MAX: usize = 1 << 18;

/// A render whose outputs were streamed: [`Run::outputs`] holds only each output's last
/// [`TAIL_MAX`] samples (all of them for shorter renders); `levels` are over the whole record.
#[derive(Debug, Clone)]
pub struct Streamed {
    /// The run, with tails for outputs.
    pub run: Run,
    /// Full-record levels per output (same order).
    pub levels: Vec<Option<crate::analysis::Levels>>,
    /// Frames rendered.
    pub frames: usize,
}

/// Where [`render_streaming`] hands each chunk: (output index, samples).
pub type Sink<'a> = dyn FnMut(usize, &[f64]) -> Result<(), SignalError> + 'a;

/// Render in chunks of a quarter second, handing each chunk of each output to `sink`
/// (output index, samples) as soon as it exists, so memory stays flat however long the
/// render. `sink` errors stop the render.
pub fn render_streaming(
    patch: &Patch,
    opts: &RenderOptions,
    sink: &mut Sink,
    progress: &mut dyn FnMut(f64),
) -> Result<Streamed, RenderError> {
    let mut plan = engine::compile(&for_compile(patch))?;
    if opts.uncorrected {
        plan.antialias = false;
    }
    let frames = opts.frames.unwrap_or_else(|| patch.frames());
    // WAV inputs as they are before they are read: a change during the render is an error,
    // not silent or garbled audio.
    let inputs: Vec<(String, &std::path::Path, _)> = patch
        .sources
        .iter()
        .filter_map(|s| match &s.wave {
            Wave::File { path, .. } => Some((
                format!("sources.{}.path", s.name),
                path.as_path(),
                signal::file_stamp(path),
            )),
            _ => None,
        })
        .collect();
    let unchanged = || -> Result<(), RenderError> {
        for (key, path, stamp) in &inputs {
            if signal::file_stamp(path) != *stamp {
                return Err(RenderError::Source {
                    key: key.clone(),
                    source: SignalError::Changed {
                        path: path.to_path_buf(),
                    },
                });
            }
        }
        Ok(())
    };
    // A file that changed while it was being checked is reported as changed, not as the
    // damage the change caused.
    let feeds = feeds_for(patch, &plan, frames).map_err(|e| unchanged().err().unwrap_or(e))?;
    let mut eng = Engine::with_feeds(&plan, feeds);
    let chunk = ((patch.rate * 0.25) as usize).max(1);
    let nout = plan.outputs.len();
    let mut bufs: Vec<Vec<f64>> = vec![vec![0.0; chunk]; nout];
    let mut acc = vec![LevelAccumulator::default(); nout];
    let mut tails: Vec<Tail> = (0..nout).map(|_| Tail::new(frames.min(TAIL_MAX))).collect();
    let mut done = 0;
    while done < frames {
        let n = chunk.min(frames - done);
        {
            let mut refs: Vec<&mut [f64]> = bufs.iter_mut().map(|b| &mut b[..n]).collect();
            eng.process(&mut refs);
        }
        if let Some(e) = eng.failure() {
            return Err(e.clone().into());
        }
        unchanged()?;
        for (i, b) in bufs.iter().enumerate() {
            acc[i].push(&b[..n]);
            tails[i].push(&b[..n]);
            sink(i, &b[..n])?;
        }
        done += n;
        progress(done as f64 / frames as f64);
    }
    let kept = tails.first().map_or(0, Tail::len);
    let outputs = plan
        .outputs
        .iter()
        .zip(tails)
        .map(|(o, t)| engine::OutputSignal {
            name: o.name.clone(),
            samples: t.into_vec(),
        })
        .collect();
    let alias = if opts.alias_probe {
        engine::alias_figures(patch)
    } else {
        Vec::new()
    };
    Ok(Streamed {
        run: Run {
            rate: plan.rate,
            oversample: plan.oversample,
            outputs,
            first_frame: frames - kept,
            events: eng.events(),
            alias,
        },
        levels: acc.iter().map(LevelAccumulator::levels).collect(),
        frames,
    })
}

/// Capture taken after the settle time by [`complete_thd`], s.
pub const INTERNAL_CAPTURE_S: f64 = 0.25;

/// THD where the file cannot hold it: for every output of `m` whose THD is missing because
/// its third harmonic lies above the file's Nyquist frequency, measure THD on the engine's
/// internal signal. The patch is rendered at the internal rate (`rate * K` with
/// oversampling 1: the same steps of the same model, without the decimator) for its settle
/// time plus [`INTERNAL_CAPTURE_S`], and THD is taken on what follows the settle time, with
/// the harmonics below the internal Nyquist frequency; a note states that band. Nothing is
/// done at K = 1 (the internal signal is the file's), and an output stays `null` when even
/// the internal rate is too low. `test` overrides the test signal as in
/// [`measure::measure`].
pub fn complete_thd(
    patch: &Patch,
    m: &mut Measurement,
    settings: &Settings,
    test: Option<TestSignal>,
) -> Result<(), RenderError> {
    let missing: Vec<(usize, f64)> = patch
        .outputs
        .iter()
        .enumerate()
        .filter_map(|(i, o)| {
            let f = &m.outputs.get(&o.name)?.figures;
            let above = f.thd_percent.is_none()
                && f.notes
                    .iter()
                    .any(|n| n.starts_with("thd:") && n.contains("above Nyquist"));
            match test.unwrap_or_else(|| measure::test_signal(patch, o.from)) {
                TestSignal::Tone(f0) if above => Some((i, f0)),
                _ => None,
            }
        })
        .collect();
    if missing.is_empty() || patch.oversample < 2 {
        return Ok(());
    }
    let mut p = patch.clone();
    p.rate = patch.rate * patch.oversample as f64;
    p.oversample = 1;
    let settle = measure::settle_time(&p);
    let frames = ((settle + INTERNAL_CAPTURE_S).min(p.length) * p.rate).round() as usize;
    let run = render(
        &p,
        &RenderOptions {
            frames: Some(frames),
            alias_probe: false,
            uncorrected: true,
        },
        &mut |_| {},
    )?;
    let skip = (settle * p.rate).round() as usize;
    for (i, f0) in missing {
        let name = &patch.outputs[i].name;
        let Some(fig) = m.outputs.get_mut(name).map(|r| &mut r.figures) else {
            continue;
        };
        let Some(sig) = run.outputs.iter().find(|s| &s.name == name) else {
            continue;
        };
        let (x, _) = analysis::settled(&sig.samples, skip, p.rate, "internal capture");
        let Ok(t) = analysis::thd(x, p.rate, Some(f0), settings) else {
            continue;
        };
        fig.notes.retain(|n| !n.starts_with("thd:"));
        fig.notes.push(format!(
            "thd: the file's Nyquist frequency ({} Hz) is below the third harmonic, so THD was \
             measured on the engine's internal signal at {} Hz: harmonics 2..{} (up to {} Hz)",
            patch.rate / 2.0,
            p.rate,
            t.harmonics.last().map_or(1, |h| h.order),
            p.rate / 2.0
        ));
        fig.fundamental_hz = Some(t.fundamental_hz);
        fig.thd_percent = Some(t.thd_percent);
        fig.thd_db = Some(t.thd_db);
        fig.thd_harmonics = Some(t.harmonics.len());
        fig.harmonics_dbc = t.harmonics.iter().map(|h| h.dbc).collect();
    }
    Ok(())
}
