//! The alias estimate of a render: how much of each output is alias, measured on the patch's
//! own stages, at its own oversampling and its own (worst) drive.
//!
//! For an output whose test signal is one periodic source ([`measure::test_signal`]) the
//! patch is run again: circuit noise off, every source on from t = 0 with no envelope and no
//! stop (the full level throughout: the patch's worst drive), the periodic source's
//! frequency moved to the nearest odd bin `M` of a power-of-two capture of `N` base-rate
//! samples (at least [`MIN_N`], more for low tones so that `M >= MIN_BIN`), and an open
//! probe output (no load: the circuit is unchanged) on every op-amp stage that feeds the
//! output. After the settle time ([`measure::settle_time`]) one capture of `N` samples is
//! coherent: the output repeats with the tone's period, so its own content lies on the
//! multiples of `M`; a product folded back from the internal rate `K * rate` (`K N` bins, a
//! power of two) lands on `K N - j M`, which `M` (odd, > 1) never divides. Every other
//! in-band bin (20 Hz - 20 kHz, and below the decimator's pass edge) is therefore alias:
//! folded by a nonlinear event sampled on the internal grid, or passed by the decimator.
//! The figure is its power relative to the fundamental (or to the strongest harmonic in band
//! where that is stronger, as at a full-wave rectifier's output), for the output and for each stage's
//! own output, so the stage the alias comes from can be named.
//!
//! Outputs with another signal (a two-tone pair, a mix, noise, a file, a sweep), whose
//! products may fall on any bin, are estimated by difference: the settle time plus up to
//! [`DIFF_N`] samples of the patch as it plays (noise off) against the same stretch with
//! the same source signals (interpolated, so every generator event stays where it was) and
//! the stages stepping [`REF_RATIO`] times finer. The in-band difference, less the best
//! smooth linear filter between the two ([`difference_db`]: the first-order hold's droop and
//! the discretised capacitors' phase are linear effects of the step, not alias), relative to
//! the in-band signal, is an upper bound of the alias (it also holds the finer render's own
//! alias, and any in-band nonlinear effect of the step size); its floor, about -80 to -100 dB, is
//! the decimators' passband ripple.

use crate::engine::halfband::PASS_EDGE;
use crate::engine::{self, SourceFeed, Upsampler};
use crate::measure::{self, Measurement};
use crate::model::{Node, Output, Patch, Wave};
use crate::render::{self, RenderError, RenderOptions};
use rustfft::{num_complex::Complex, FftPlanner};
use serde::Serialize;

/// Smallest capture, base-rate samples.
pub const MIN_N: usize = 1 << 14;
/// Largest capture, base-rate samples (a tone too low for it is not estimated).
pub const MAX_N: usize = 1 << 18;
/// Smallest bin of the moved tone (so the move is at most 1 / `MIN_BIN` of its frequency).
pub const MIN_BIN: usize = 31;
/// Alias above this, dBc, draws a warning.
pub const WARN_DBC: f64 = -60.0;
/// A stage whose alias is within this many dB of the worst one, upstream of it, is named
/// instead (the alias it makes passes on to the stages after it).
pub const NAME_WITHIN_DB: f64 = 1.0;
/// Band of the estimate, Hz.
pub const BAND_HZ: (f64, f64) = (20.0, 20_000.0);
/// Lowest figure given, dBc: below it a capture is clean to the arithmetic (f64 and the FFT
/// of a capture of this length leave about -280 dBc).
pub const FLOOR_DBC: f64 = -200.0;
/// Fundamentals below this (V peak) give no figure.
const MIN_FUNDAMENTAL_V: f64 = 1e-9;

/// What the estimate is (JSON `settings.alias`, and the README).
pub const METHOD: &str = "measured on this patch, per output and per op-amp stage feeding \
    it, 20 Hz - 20 kHz, noise off. method coherent (one periodic test signal): the stages \
    re-run at the patch's own oversampling with every source at full level from t = 0 and the \
    tone moved to the nearest odd bin of a power-of-two capture after the settle time; power \
    off the tone's harmonics re the fundamental (or the strongest harmonic in band, if \
    stronger). method difference (any other signal): the \
    settle time plus up to 2^15 samples of the patch as it plays, against the same stretch with \
    the same source signals and stages stepping 4 times finer; the in-band difference, less \
    the best smooth linear filter between the two, re the in-band signal (an upper bound of \
    the alias; floor about -80 to -100 dB: the decimators' passband ripple)";

/// Alias of one stage's own output.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct StageAlias {
    /// Stage name.
    pub stage: String,
    /// In-band alias re the stage's fundamental (or its strongest harmonic in band, if
    /// stronger), dBc (`None`: no fundamental there).
    pub dbc: Option<f64>,
}

/// The alias estimate of one output.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct OutputAlias {
    /// How it was measured: `"coherent"` (a periodic test signal: power off its harmonics
    /// re the fundamental or the strongest harmonic) or `"difference"` (any other signal: the in-band difference from
    /// a render at [`REF_RATIO`] times the oversampling, re the in-band signal).
    pub method: Option<&'static str>,
    /// In-band alias re the fundamental or the strongest harmonic (or re the in-band signal for `"difference"`), dB;
    /// `None` when not estimated (see `note`).
    pub dbc: Option<f64>,
    /// The tone the stages were run with, Hz (the test tone moved to a coherent bin).
    pub tone_hz: Option<f64>,
    /// Every op-amp stage feeding the output, in patch order, with its own figure.
    pub stages: Vec<StageAlias>,
    /// The stage the alias comes from: the worst one, or the first one upstream of it within
    /// [`NAME_WITHIN_DB`].
    pub stage: Option<String>,
    /// Whether `dbc` is above [`WARN_DBC`].
    pub above_limit: bool,
    /// Why there is no figure, when there is none.
    pub note: Option<String>,
}

impl OutputAlias {
    fn none(note: &str) -> OutputAlias {
        OutputAlias {
            method: None,
            dbc: None,
            tone_hz: None,
            stages: Vec::new(),
            stage: None,
            above_limit: false,
            note: Some(note.to_string()),
        }
    }
}

/// The capture length `N` (a power of two) and the odd bin `M` of the tone nearest `f0`, or
/// `None` when no capture up to [`MAX_N`] holds it on a bin of at least 3 below `N / 2`.
pub fn coherent_bin(f0: f64, rate: f64) -> Option<(usize, usize)> {
    if !(f0 > 0.0 && rate > 0.0) {
        return None;
    }
    let mut n = MIN_N;
    while f0 * n as f64 / rate < MIN_BIN as f64 && n < MAX_N {
        n *= 2;
    }
    let exact = f0 * n as f64 / rate;
    let r = exact.round();
    let m = if r as usize % 2 == 1 {
        r
    } else if exact >= r {
        r + 1.0
    } else {
        r - 1.0
    };
    (m >= 3.0 && m < (n / 2) as f64).then_some((n, m as usize))
}

/// In-band alias of a coherent capture `x` (length `N`) of a tone on bin `m`: the power of
/// every bin in [`BAND_HZ`] (and below the decimator's pass edge) that is not a multiple of
/// `m`, relative to bin `m` (or to the strongest multiple of `m` in band, where that is
/// stronger: a rectifier's), dB, at least [`FLOOR_DBC`]. `None` when that reference is below
/// a nanovolt.
pub fn coherent_alias_dbc(x: &[f64], m: usize, rate: f64) -> Option<f64> {
    let n = x.len();
    if n < 4 || m == 0 || m >= n / 2 {
        return None;
    }
    let mut buf: Vec<Complex<f64>> = x.iter().map(|&v| Complex::new(v, 0.0)).collect();
    FftPlanner::new().plan_fft_forward(n).process(&mut buf);
    let pow = |k: usize| buf[k].norm_sqr();
    let df = rate / n as f64;
    let lo = ((BAND_HZ.0 / df).ceil() as usize).max(1);
    let hi = ((BAND_HZ.1 / df).floor() as usize)
        .min((PASS_EDGE * n as f64).floor() as usize)
        .min(n / 2);
    // the reference: the fundamental, or the strongest harmonic in band where that is
    // stronger (a full-wave rectifier's output is mostly its second harmonic, and its
    // fundamental only the halves' imbalance); a sine of peak A puts (A N / 2)^2 into its bin
    let fund = (m..=hi.max(m)).step_by(m).map(pow).fold(0.0, f64::max);
    if fund.sqrt() * 2.0 / (n as f64) < MIN_FUNDAMENTAL_V {
        return None;
    }
    let alias: f64 = (lo..=hi).filter(|k| k % m != 0).map(pow).sum();
    // a clean capture reads the floor of the arithmetic; held at FLOOR_DBC rather than -inf
    Some((10.0 * (alias / fund).log10()).max(FLOOR_DBC))
}

/// The source carrying an output's single periodic test signal, with its frequency.
fn tone_source(patch: &Patch, node: Node) -> Option<(usize, f64)> {
    let crate::analysis::TestSignal::Tone(f0) = measure::test_signal(patch, node) else {
        return None;
    };
    measure::upstream_sources(patch, node)
        .into_iter()
        .find(|&s| wave_freq(&patch.sources[s].wave).is_some_and(|f| f == f0))
        .map(|s| (s, f0))
}

/// The frequency of a periodic wave (a one-tone multitone included).
fn wave_freq(w: &Wave) -> Option<f64> {
    match w {
        Wave::Sine { freq, .. }
        | Wave::Square { freq, .. }
        | Wave::Triangle { freq, .. }
        | Wave::Saw { freq, .. }
        | Wave::Pulse { freq, .. } => Some(*freq),
        Wave::Multitone { tones } if tones.len() == 1 => Some(tones[0].freq),
        _ => None,
    }
}

fn set_freq(w: &mut Wave, f: f64) {
    match w {
        Wave::Sine { freq, .. }
        | Wave::Square { freq, .. }
        | Wave::Triangle { freq, .. }
        | Wave::Saw { freq, .. }
        | Wave::Pulse { freq, .. } => *freq = f,
        Wave::Multitone { tones } => tones.iter_mut().for_each(|t| t.freq = f),
        _ => {}
    }
}

/// A source feed at `R` times the rate of another one: the same samples, band-limited
/// interpolation ([`Upsampler`]), aligned in time: the reference stages see exactly the
/// patch's own source signals (regenerating them at the higher rate would move every
/// event of a generator to another sample grid, a difference that is not the stages').
struct UpFeed {
    inner: Box<dyn SourceFeed>,
    up: Upsampler,
    rest: f64,
    /// Output samples to drop (positive) or to hold at `rest` first (negative) at the start.
    lead: isize,
    left: isize,
    inb: Vec<f64>,
    outb: Vec<f64>,
    pos: usize,
    len: usize,
}

const UP_BLOCK: usize = 256;

impl UpFeed {
    fn new(inner: Box<dyn SourceFeed>, r: usize, rest: f64, lead: isize) -> UpFeed {
        let mut up = Upsampler::new(r, UP_BLOCK);
        up.reset(rest);
        UpFeed {
            inner,
            up,
            rest,
            lead,
            left: lead,
            inb: vec![0.0; UP_BLOCK],
            outb: vec![0.0; r * UP_BLOCK],
            pos: 0,
            len: 0,
        }
    }

    fn refill(&mut self) {
        self.inner.fill(&mut self.inb);
        self.up.process(&self.inb, &mut self.outb);
        self.pos = 0;
        self.len = self.outb.len();
    }
}

impl SourceFeed for UpFeed {
    fn fill(&mut self, out: &mut [f64]) {
        let mut i = 0;
        while self.left < 0 && i < out.len() {
            out[i] = self.rest;
            self.left += 1;
            i += 1;
        }
        while i < out.len() {
            if self.pos == self.len {
                self.refill();
            }
            if self.left > 0 {
                let d = (self.left as usize).min(self.len - self.pos);
                self.pos += d;
                self.left -= d as isize;
                continue;
            }
            let m = (self.len - self.pos).min(out.len() - i);
            out[i..i + m].copy_from_slice(&self.outb[self.pos..self.pos + m]);
            self.pos += m;
            i += m;
        }
    }

    fn reset(&mut self) {
        self.inner.reset();
        self.up.reset(self.rest);
        self.left = self.lead;
        self.pos = 0;
        self.len = 0;
    }
}

/// Render `p` at `REF_RATIO` times its rate (same oversampling) for `frames` frames of
/// that rate, its sources being `p`'s own, interpolated.
fn reference_run(p: &Patch, frames: usize) -> Result<Vec<engine::OutputSignal>, RenderError> {
    let base = engine::compile(&render::for_compile(p))?;
    let mut q = p.clone();
    q.rate = p.rate * REF_RATIO as f64;
    let plan = engine::compile(&render::for_compile(&q))?;
    let inner = render::feeds(p, &base)?;
    let probe = Upsampler::new(REF_RATIO, UP_BLOCK);
    // reference sample i is time (i - plan.preroll) / (R fs); upsampler output j is inner
    // sample (j - delay) / R, inner sample m is time (m - base.preroll) / fs
    let lead = (REF_RATIO * base.preroll + probe.delay()) as isize - plan.preroll as isize;
    let feeds: Vec<Box<dyn SourceFeed>> = inner
        .into_iter()
        .zip(&base.sources)
        .map(|(f, sp)| Box::new(UpFeed::new(f, REF_RATIO, sp.rest, lead)) as Box<dyn SourceFeed>)
        .collect();
    let mut eng = engine::Engine::with_feeds(&plan, feeds);
    let mut bufs: Vec<Vec<f64>> = plan.outputs.iter().map(|_| vec![0.0; frames]).collect();
    {
        let mut refs: Vec<&mut [f64]> = bufs.iter_mut().map(|b| b.as_mut_slice()).collect();
        eng.process(&mut refs);
    }
    Ok(plan
        .outputs
        .iter()
        .zip(bufs)
        .map(|(o, samples)| engine::OutputSignal {
            name: o.name.clone(),
            samples,
        })
        .collect())
}

/// Oversampling of the reference of the difference estimate, relative to the patch's.
pub const REF_RATIO: usize = 4;
/// Capture of the difference estimate, base-rate samples (at most).
pub const DIFF_N: usize = 1 << 15;

/// Four-term Blackman-Harris window (sidelobes below -92 dB; Harris, "On the use of windows
/// for harmonic analysis with the discrete Fourier transform", Proc. IEEE 1978) at `n`
/// points over the same span (sample `i` at `i / n` of it, so windows of different lengths
/// over one span agree in time).
fn window(n: usize) -> Vec<f64> {
    let a = [0.35875, 0.48829, 0.14128, 0.01168];
    (0..n)
        .map(|i| {
            let x = std::f64::consts::TAU * i as f64 / n as f64;
            a[0] - a[1] * x.cos() + a[2] * (2.0 * x).cos() - a[3] * (3.0 * x).cos()
        })
        .collect()
}

fn spectrum(x: &[f64]) -> Vec<Complex<f64>> {
    let w = window(x.len());
    let mut buf: Vec<Complex<f64>> = x
        .iter()
        .zip(&w)
        .map(|(&v, &w)| Complex::new(v * w, 0.0))
        .collect();
    FftPlanner::new()
        .plan_fft_forward(x.len())
        .process(&mut buf);
    buf
}

/// Terms of the smooth filter fitted by [`difference_db`].
const FIT_TERMS: usize = 4;

/// Solve the (real, symmetric) normal equations `m c = v` for complex `v` by Gaussian
/// elimination with partial pivoting; a singular system gives the identity filter.
fn solve_normal(
    mut m: [[f64; FIT_TERMS]; FIT_TERMS],
    mut v: [Complex<f64>; FIT_TERMS],
) -> [Complex<f64>; FIT_TERMS] {
    let mut ident = [Complex::new(0.0, 0.0); FIT_TERMS];
    ident[0] = Complex::new(1.0, 0.0);
    let scale = m[0][0].abs().max(1e-300);
    for col in 0..FIT_TERMS {
        let piv = (col..FIT_TERMS)
            .max_by(|&i, &j| m[i][col].abs().total_cmp(&m[j][col].abs()))
            .unwrap_or(col);
        if m[piv][col].abs() <= 1e-14 * scale {
            return ident;
        }
        m.swap(col, piv);
        v.swap(col, piv);
        for r in col + 1..FIT_TERMS {
            let f = m[r][col] / m[col][col];
            let pivot_row = m[col];
            for (x, p) in m[r].iter_mut().zip(pivot_row).skip(col) {
                *x -= f * p;
            }
            let vc = v[col];
            v[r] -= vc * f;
        }
    }
    let mut c = [Complex::new(0.0, 0.0); FIT_TERMS];
    for r in (0..FIT_TERMS).rev() {
        let mut acc = v[r];
        for k in r + 1..FIT_TERMS {
            acc -= c[k] * m[r][k];
        }
        c[r] = acc / m[r][r];
    }
    c
}

/// In-band power of `x - r` relative to that of `r`, dB, where `x` is a capture at `rate`
/// and `r` the same stretch at `ratio * rate` (`ratio * x.len()` samples); both windowed
/// alike over the same span. `None` when `r` is silent in band.
pub fn difference_db(x: &[f64], r: &[f64], ratio: usize, rate: f64) -> Option<f64> {
    let n = x.len();
    if n < 16 || r.len() != ratio * n {
        return None;
    }
    let (a, b) = (spectrum(x), spectrum(r));
    let df = rate / n as f64;
    let lo = ((BAND_HZ.0 / df).ceil() as usize).max(1);
    let hi = ((BAND_HZ.1 / df).floor() as usize)
        .min((PASS_EDGE * n as f64).floor() as usize)
        .min(n / 2);
    let scale = 1.0 / ratio as f64;
    // The best smooth linear filter from the reference to the capture, `H(f) = sum of c_j
    // u^j`, `u = f / 20 kHz`, j < FIT_TERMS, complex `c_j` (least squares over the band): the
    // step size's linear effects (the first-order hold of each stage's input, about
    // 1 - (pi f / fs)^2 / 3; the discretised feedback capacitors' small phase) are not alias
    // and are taken out; alias, not a smooth function of the signal's own spectrum, stays.
    let g = |k: usize| {
        let u = k as f64 * df / BAND_HZ.1;
        let mut t = [1.0; FIT_TERMS];
        for j in 1..FIT_TERMS {
            t[j] = t[j - 1] * u;
        }
        t
    };
    let mut m = [[0.0f64; FIT_TERMS]; FIT_TERMS];
    let mut v = [Complex::new(0.0, 0.0); FIT_TERMS];
    for k in lo..=hi {
        let rk = b[k] * scale;
        let (gk, p) = (g(k), rk.norm_sqr());
        let c = rk.conj() * a[k];
        for i in 0..FIT_TERMS {
            v[i] += c * gk[i];
            for j in 0..FIT_TERMS {
                m[i][j] += gk[i] * gk[j] * p;
            }
        }
    }
    let c = solve_normal(m, v);
    let (mut err, mut sig) = (0.0, 0.0);
    for k in lo..=hi {
        let rk = b[k] * scale;
        let gk = g(k);
        let h: Complex<f64> = c.iter().zip(&gk).map(|(c, g)| c * g).sum();
        err += (a[k] - rk * h).norm_sqr();
        sig += rk.norm_sqr();
    }
    let floor = (MIN_FUNDAMENTAL_V * n as f64).powi(2);
    (sig > floor).then(|| (10.0 * (err / sig).log10()).max(FLOOR_DBC))
}

const PROBE: &str = "alias-probe:";

/// The alias estimate of every output of `patch` (`output`: one by name), in patch order.
/// Pure: renders the patch again (see the module documentation) and writes nothing.
pub fn estimate(
    patch: &Patch,
    output: Option<&str>,
) -> Result<Vec<(String, OutputAlias)>, RenderError> {
    let chosen: Vec<usize> = (0..patch.outputs.len())
        .filter(|&i| output.is_none_or(|n| n == patch.outputs[i].name))
        .collect();
    let mut result: Vec<(String, OutputAlias)> = Vec::new();
    // outputs grouped by the source of their tone: one run per source
    let mut groups: Vec<(usize, f64, Vec<usize>)> = Vec::new();
    let mut others: Vec<usize> = Vec::new();
    for &i in &chosen {
        let o = &patch.outputs[i];
        match tone_source(patch, o.from) {
            Some((s, f0)) => match groups.iter_mut().find(|g| g.0 == s) {
                Some(g) => g.2.push(i),
                None => groups.push((s, f0, vec![i])),
            },
            None => others.push(i),
        }
    }
    for (src, f0, outs) in groups {
        let Some((n, m)) = coherent_bin(f0, patch.rate) else {
            for i in outs {
                result.push((
                    patch.outputs[i].name.clone(),
                    OutputAlias::none(
                        "not estimated: the test tone has no coherent bin (too low or too high)",
                    ),
                ));
            }
            continue;
        };
        let tone = m as f64 * patch.rate / n as f64;
        let (mut p, stages) = probed(patch, &outs);
        for (k, s) in p.sources.iter_mut().enumerate() {
            s.start = 0.0;
            s.stop = None;
            s.envelope = None;
            if k == src {
                set_freq(&mut s.wave, tone);
            } else if !matches!(s.wave, Wave::Dc { .. }) {
                // not upstream of these outputs, or silent (the test signal is one source)
                s.wave = Wave::Dc { level: 0.0 };
            }
        }
        let settle_s = measure::settle_time(&p);
        if !(settle_s.is_finite() && settle_s <= patch.length) {
            // the render itself never settles: nor would the capture
            for i in outs {
                result.push((
                    patch.outputs[i].name.clone(),
                    OutputAlias::none(&format!(
                        "not estimated: the circuit settles in {:.3e} s, longer than the \
                         render",
                        settle_s
                    )),
                ));
            }
            continue;
        }
        let settle = (settle_s * p.rate).round() as usize;
        let frames = settle + n;
        p.length = frames as f64 / p.rate;
        let run = render::render(
            &p,
            &RenderOptions {
                frames: Some(frames),
                alias_probe: false,
                uncorrected: false,
            },
            &mut |_| {},
        )?;
        let figure = |name: &str| {
            run.outputs
                .iter()
                .find(|o| o.name == name)
                .and_then(|o| o.samples.get(settle..settle + n))
                .and_then(|x| coherent_alias_dbc(x, m, p.rate))
        };
        let per_stage: Vec<StageAlias> = stages
            .iter()
            .map(|&s| StageAlias {
                stage: patch.stages[s].name.clone(),
                dbc: figure(&format!("{PROBE}{}", patch.stages[s].name)),
            })
            .collect();
        for i in outs {
            let o = &patch.outputs[i];
            let up = measure::upstream(patch, o.from);
            let mine: Vec<StageAlias> = per_stage
                .iter()
                .filter(|a| up.iter().any(|&s| patch.stages[s].name == a.stage))
                .cloned()
                .collect();
            let dbc = figure(&o.name);
            result.push((
                o.name.clone(),
                OutputAlias {
                    method: Some("coherent"),
                    dbc,
                    tone_hz: Some(tone),
                    stage: culprit(&mine),
                    above_limit: dbc.is_some_and(|d| d > WARN_DBC),
                    note: dbc
                        .is_none()
                        .then(|| "not estimated: no fundamental at the output".to_string()),
                    stages: mine,
                },
            ));
        }
    }
    if !others.is_empty() {
        result.extend(by_difference(patch, &others)?);
    }
    let order = |name: &str| patch.outputs.iter().position(|o| o.name == name);
    result.sort_by_key(|(name, _)| order(name));
    Ok(result)
}

/// The patch with noise off and an open probe output on every op-amp stage feeding `outs`;
/// returns the stages probed.
fn probed(patch: &Patch, outs: &[usize]) -> (Patch, Vec<usize>) {
    let mut p = patch.clone();
    p.noise = false;
    let mut stages: Vec<usize> = Vec::new();
    for &i in outs {
        for s in measure::upstream(patch, patch.outputs[i].from) {
            if patch.stages[s].part.is_some() && !stages.contains(&s) {
                stages.push(s);
            }
        }
    }
    stages.sort();
    for &s in &stages {
        p.outputs.push(Output {
            name: format!("{PROBE}{}", patch.stages[s].name),
            from: Node::Stage(s),
            inner: None,
            series: 0.0,
            load: None,
            file: None,
        });
    }
    (p, stages)
}

/// The difference estimate of outputs that carry no single periodic test signal: the patch
/// (noise off, as it plays) and the same patch at [`REF_RATIO`] times its rate (so its
/// stages step `REF_RATIO` times finer), over the settle time plus up to [`DIFF_N`]
/// samples; the in-band difference re the in-band signal, windowed alike. It holds the
/// alias of the patch's oversampling less that of the reference, and any other in-band
/// effect of the step size (the clamp's smoothing kernel: about 1 - sinc^2(f / (K rate)) of
/// the clipped part), so it is an upper bound of the alias.
fn by_difference(patch: &Patch, outs: &[usize]) -> Result<Vec<(String, OutputAlias)>, RenderError> {
    let (p, stages) = probed(patch, outs);
    let frames = patch.frames();
    let settle = (measure::settle_time(&p) * p.rate).round() as usize;
    let n = DIFF_N
        .min(frames.saturating_sub(settle))
        .max(DIFF_N.min(frames));
    let start = settle.min(frames - n);
    let run = render::render(
        &p,
        &RenderOptions {
            frames: Some(start + n),
            alias_probe: false,
            uncorrected: false,
        },
        &mut |_| {},
    )?;
    let reference = reference_run(&p, REF_RATIO * (start + n))?;
    let figure = |name: &str| {
        let x = run
            .outputs
            .iter()
            .find(|o| o.name == name)?
            .samples
            .get(start..start + n)?;
        let r = reference
            .iter()
            .find(|o| o.name == name)?
            .samples
            .get(REF_RATIO * start..REF_RATIO * (start + n))?;
        difference_db(x, r, REF_RATIO, p.rate)
    };
    let per_stage: Vec<StageAlias> = stages
        .iter()
        .map(|&s| StageAlias {
            stage: patch.stages[s].name.clone(),
            dbc: figure(&format!("{PROBE}{}", patch.stages[s].name)),
        })
        .collect();
    Ok(outs
        .iter()
        .map(|&i| {
            let o = &patch.outputs[i];
            let up = measure::upstream(patch, o.from);
            let mine: Vec<StageAlias> = per_stage
                .iter()
                .filter(|a| up.iter().any(|&s| patch.stages[s].name == a.stage))
                .cloned()
                .collect();
            let dbc = figure(&o.name);
            (
                o.name.clone(),
                OutputAlias {
                    method: Some("difference"),
                    dbc,
                    tone_hz: None,
                    stage: culprit(&mine),
                    above_limit: dbc.is_some_and(|d| d > WARN_DBC),
                    note: dbc
                        .is_none()
                        .then(|| "not estimated: the output is silent in band".to_string()),
                    stages: mine,
                },
            )
        })
        .collect())
}

/// The stage the alias comes from: the worst stage, or the first one (in patch order, so
/// upstream) within [`NAME_WITHIN_DB`] of it.
pub fn culprit(stages: &[StageAlias]) -> Option<String> {
    let worst = stages
        .iter()
        .filter_map(|s| s.dbc)
        .fold(f64::NEG_INFINITY, f64::max);
    stages
        .iter()
        .find(|s| s.dbc.is_some_and(|d| d >= worst - NAME_WITHIN_DB))
        .map(|s| s.stage.clone())
}

/// Estimate the alias of every output in `m` ([`estimate`]) and store it in each output's
/// `alias`.
pub fn apply(patch: &Patch, m: &mut Measurement) -> Result<(), RenderError> {
    let only = (m.outputs.len() == 1)
        .then(|| m.outputs.keys().next().cloned())
        .flatten();
    for (name, a) in estimate(patch, only.as_deref())? {
        if let Some(r) = m.outputs.get_mut(&name) {
            r.alias = Some(a);
        }
    }
    Ok(())
}
