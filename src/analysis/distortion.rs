//! Distortion and noise figures: THD, THD+N / SINAD / ENOB, SNR, IMD.
//!
//! Every function here analyses the *last* `N` samples of the record it is given (so a
//! start-up transient falls outside the capture), with `N` from [`plan_capture`]: for known
//! tone frequencies, the longest coherent length if there is one (then the rectangular window
//! unless [`Settings::window`] says otherwise), else the whole record with the 7-term
//! Blackman-Harris window. Each result states its window, FFT length, coherence and
//! bandwidth.

use serde::{Deserialize, Serialize};

use super::sinefit::{fit_sine_3, fit_sine_4, SineFit};
use super::spectrum::{check_freq, check_rate, check_samples, choose_capture, Spectrum};
use super::weighting::Weighting;
use super::window::Window;
use super::AnalysisError;

/// How many harmonics THD sums.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Harmonics {
    /// Harmonics 2..=N (N >= 2).
    UpTo(usize),
    /// Every harmonic at or below Nyquist.
    Nyquist,
}

impl Default for Harmonics {
    fn default() -> Self {
        Harmonics::UpTo(10)
    }
}

/// What to do with harmonics above Nyquist.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum AliasRule {
    /// Stop at Nyquist: a harmonic above Nyquist is not counted (default). A harmonic whose
    /// lobe straddles Nyquist counts only the bins up to Nyquist.
    #[default]
    StopAtNyquist,
    /// Count a harmonic above Nyquist at its folded frequency `|h f0 - k rate|`, unless its
    /// lobe would overlap DC, the fundamental's lobe or a harmonic already counted (then it is
    /// skipped, never counted twice).
    Fold,
}

/// The measurement bandwidth for THD+N, SNR and noise.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Bandwidth {
    /// DC to Nyquist.
    Full,
    /// `lo` to `hi` Hz (`hi` is clamped to Nyquist).
    Band {
        /// Lower edge, Hz.
        lo: f64,
        /// Upper edge, Hz.
        hi: f64,
    },
}

impl Default for Bandwidth {
    /// 20 Hz to 20 kHz (AES17 practice).
    fn default() -> Self {
        Bandwidth::Band {
            lo: 20.0,
            hi: 20_000.0,
        }
    }
}

impl Bandwidth {
    /// The band actually used at `rate`, `[lo, hi]` Hz.
    pub fn resolve(self, rate: f64) -> Result<[f64; 2], AnalysisError> {
        let nyq = rate / 2.0;
        match self {
            Bandwidth::Full => Ok([0.0, nyq]),
            Bandwidth::Band { lo, hi } => {
                let finite = lo.is_finite() && hi.is_finite();
                let lo = lo.max(0.0);
                let hi = hi.min(nyq);
                if finite && lo < hi {
                    Ok([lo, hi])
                } else {
                    Err(AnalysisError::BadSetting {
                        what: "settings.bandwidth",
                        expected: format!("lo < hi within 0..{nyq} Hz (got lo = {lo}, hi = {hi})"),
                    })
                }
            }
        }
    }
}

/// Default longest capture: 2^20 samples (21.8 s at 48 kHz).
pub const DEFAULT_MAX_CAPTURE: usize = 1 << 20;

/// Analysis settings shared by every figure.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Settings {
    /// Window; `None` = automatic (rectangular for a coherent capture, 7-term
    /// Blackman-Harris otherwise).
    pub window: Option<Window>,
    /// Harmonics counted by THD (default 2..=10).
    pub harmonics: Harmonics,
    /// Harmonics above Nyquist (default: stop at Nyquist).
    pub alias: AliasRule,
    /// Bandwidth of THD+N, SINAD and SNR (default 20 Hz - 20 kHz).
    pub bandwidth: Bandwidth,
    /// Weighting of THD+N, SINAD and SNR (default flat).
    pub weighting: Weighting,
    /// Longest capture analysed, samples (default [`DEFAULT_MAX_CAPTURE`]); a longer record
    /// is analysed over its last `max_capture` samples, which bounds FFT memory and time.
    pub max_capture: usize,
}

impl Default for Settings {
    fn default() -> Self {
        Settings {
            window: None,
            harmonics: Harmonics::default(),
            alias: AliasRule::default(),
            bandwidth: Bandwidth::default(),
            weighting: Weighting::default(),
            max_capture: DEFAULT_MAX_CAPTURE,
        }
    }
}

/// A capture: the last `len` samples of a record, and how to window them.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CapturePlan {
    /// Number of samples analysed.
    pub len: usize,
    /// Whether the tones are coherent in the capture.
    pub coherent: bool,
    /// Window in use.
    pub window: Window,
}

impl CapturePlan {
    /// The captured slice (the tail of `samples`).
    pub fn slice<'a>(&self, samples: &'a [f64]) -> &'a [f64] {
        &samples[samples.len().saturating_sub(self.len)..]
    }
}

/// Plan a capture from a record of `available` samples for tones `freqs` (empty: unknown,
/// not coherent), with the window and capture limit of `settings`.
pub fn plan_capture(
    rate: f64,
    freqs: &[f64],
    available: usize,
    settings: &Settings,
) -> Result<CapturePlan, AnalysisError> {
    let need = 4 * Window::BlackmanHarris7.lobe_half_width();
    let available = available.min(settings.max_capture.max(need));
    let window = settings.window;
    let (len, coherent) = if freqs.is_empty() {
        (available, false)
    } else {
        // keep at least half the record
        let c = choose_capture(rate, freqs, available, (available / 2).max(need))?;
        (c.len, c.coherent)
    };
    if len < need {
        return Err(AnalysisError::TooShort {
            what: "samples",
            got: len,
            need,
        });
    }
    let window = window.unwrap_or(if coherent {
        Window::Rectangular
    } else {
        Window::BlackmanHarris7
    });
    Ok(CapturePlan {
        len,
        coherent,
        window,
    })
}

/// Find the fundamental: the largest spectral peak above the DC lobe (7-term window),
/// refined by parabolic interpolation and then by a four-parameter sine fit.
pub fn detect_fundamental(samples: &[f64], rate: f64) -> Result<SineFit, AnalysisError> {
    let spec = Spectrum::compute(samples, rate, Window::BlackmanHarris7)?;
    let min_bin = Window::BlackmanHarris7.lobe_half_width() + 1;
    let k = spec
        .peak_bin(min_bin)
        .ok_or(AnalysisError::NoTone { what: "samples" })?;
    if k + 1 >= spec.amplitude.len() {
        return Err(AnalysisError::NoTone { what: "samples" });
    }
    let guess = spec.interpolate_peak(k);
    fit_sine_4(samples, rate, guess)
}

/// One harmonic's level.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct HarmonicLevel {
    /// Harmonic order (2 = second harmonic).
    pub order: usize,
    /// Frequency where it was read, Hz (folded if above Nyquist under [`AliasRule::Fold`]).
    pub freq_hz: f64,
    /// Peak amplitude, V.
    pub amplitude_v: f64,
    /// Level relative to the fundamental, dBc.
    pub dbc: f64,
}

/// THD result.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ThdResult {
    /// Fundamental frequency, Hz.
    pub fundamental_hz: f64,
    /// Fundamental peak amplitude (main-lobe power sum), V.
    pub fundamental_v: f64,
    /// THD_F = sqrt(sum of harmonic powers) / fundamental, as a ratio.
    pub thd_ratio: f64,
    /// THD in percent.
    pub thd_percent: f64,
    /// THD in dB, `20 log10(thd_ratio)`.
    pub thd_db: f64,
    /// Harmonics counted, in order.
    pub harmonics: Vec<HarmonicLevel>,
    /// Orders skipped: under [`AliasRule::StopAtNyquist`] every order from the first one
    /// above Nyquist to the last asked for; under [`AliasRule::Fold`] the folded orders that
    /// would collide with DC, the fundamental or a harmonic already counted.
    pub skipped_orders: Vec<usize>,
    /// Window used.
    pub window: Window,
    /// FFT length.
    pub fft_len: usize,
    /// Whether the capture was coherent at the fundamental.
    pub coherent: bool,
    /// Band the harmonics were looked for in, Hz (0 to Nyquist).
    pub bandwidth_hz: [f64; 2],
    /// Rule for harmonics above Nyquist.
    pub alias: AliasRule,
}

fn db(ratio: f64) -> f64 {
    20.0 * ratio.log10()
}

/// THD from a spectrum, given the fundamental frequency.
pub fn thd_from_spectrum(
    spec: &Spectrum,
    fundamental_hz: f64,
    harmonics: Harmonics,
    alias: AliasRule,
    coherent: bool,
) -> Result<ThdResult, AnalysisError> {
    check_freq("fundamental frequency", fundamental_hz, spec.rate)?;
    let nyq = spec.nyquist();
    let lobe_bins = spec.window.lobe_half_width() as f64;
    if fundamental_hz < lobe_bins * spec.bin_hz {
        return Err(AnalysisError::BadSetting {
            what: "fundamental frequency",
            expected: format!(
                "at least {} Hz (the {} window's lobe half width at {} Hz per bin) so the \
                 fundamental is apart from DC; got {fundamental_hz} Hz: use a longer record",
                lobe_bins * spec.bin_hz,
                spec.window.name(),
                spec.bin_hz
            ),
        });
    }
    let f1 = spec.lobe_amplitude(fundamental_hz);
    if f1 <= 0.0 {
        return Err(AnalysisError::NoTone { what: "samples" });
    }
    let last = match harmonics {
        Harmonics::UpTo(n) if n >= 2 => n,
        Harmonics::UpTo(n) => {
            return Err(AnalysisError::BadSetting {
                what: "settings.harmonics",
                expected: format!("at least 2 (got {n})"),
            })
        }
        Harmonics::Nyquist => (nyq / fundamental_hz).floor() as usize,
    };
    // With the third harmonic above Nyquist the record shows at most the second, which a
    // symmetric nonlinearity (clipping, slewing) does not make: a sum of what is left would
    // read near 0 for a badly distorted tone. Not measured, rather than wrong.
    let asks_h3 = last >= 3 || harmonics == Harmonics::Nyquist;
    if alias == AliasRule::StopAtNyquist && asks_h3 && 3.0 * fundamental_hz > nyq {
        return Err(AnalysisError::AboveNyquist {
            order: if 2.0 * fundamental_hz > nyq { 2 } else { 3 },
            fundamental_hz,
            nyquist: nyq,
        });
    }
    // Beyond N orders the folded positions only repeat: examine at most N orders.
    let last = last.min(spec.fft_len.max(2));
    let lobe = spec.window.lobe_half_width() as f64 * spec.bin_hz;
    let mut taken: Vec<f64> = vec![0.0, fundamental_hz];
    let mut out = Vec::new();
    let mut skipped = Vec::new();
    let mut power = 0.0;
    for h in 2..=last {
        let f = h as f64 * fundamental_hz;
        let at = if f <= nyq {
            f
        } else {
            match alias {
                AliasRule::StopAtNyquist => {
                    skipped.extend(h..=last);
                    break;
                }
                AliasRule::Fold => {
                    let r = f.rem_euclid(spec.rate);
                    let folded = if r > nyq { spec.rate - r } else { r };
                    if taken.iter().any(|&t| (t - folded).abs() < 2.0 * lobe) {
                        skipped.push(h);
                        continue;
                    }
                    folded
                }
            }
        };
        taken.push(at);
        let a = spec.lobe_amplitude(at);
        power += a * a;
        out.push(HarmonicLevel {
            order: h,
            freq_hz: at,
            amplitude_v: a,
            dbc: db(a / f1),
        });
    }
    let ratio = power.sqrt() / f1;
    Ok(ThdResult {
        fundamental_hz,
        fundamental_v: f1,
        thd_ratio: ratio,
        thd_percent: 100.0 * ratio,
        thd_db: db(ratio),
        harmonics: out,
        skipped_orders: skipped,
        window: spec.window,
        fft_len: spec.fft_len,
        coherent,
        bandwidth_hz: [0.0, nyq],
        alias,
    })
}

/// THD of a record. With `fundamental_hz = None` the fundamental is detected
/// ([`detect_fundamental`]) and the capture is treated as non-coherent.
pub fn thd(
    samples: &[f64],
    rate: f64,
    fundamental_hz: Option<f64>,
    settings: &Settings,
) -> Result<ThdResult, AnalysisError> {
    check_rate(rate)?;
    check_samples("samples", samples, 32)?;
    let (f0, plan) = match fundamental_hz {
        Some(f) => (f, plan_capture(rate, &[f], samples.len(), settings)?),
        None => {
            let plan = plan_capture(rate, &[], samples.len(), settings)?;
            (detect_fundamental(plan.slice(samples), rate)?.freq, plan)
        }
    };
    let spec = Spectrum::compute(plan.slice(samples), rate, plan.window)?;
    thd_from_spectrum(&spec, f0, settings.harmonics, settings.alias, plan.coherent)
}

/// Which sine fit removes the fundamental.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum FitKind {
    /// Three-parameter fit at a known frequency (IEEE Std 1057).
    ThreeParameter,
    /// Four-parameter fit iterating on frequency (IEEE Std 1057).
    FourParameter,
}

/// THD+N, SINAD and ENOB.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ThdnResult {
    /// Fundamental frequency (given, or from the four-parameter fit), Hz.
    pub fundamental_hz: f64,
    /// Fitted fundamental peak amplitude, V.
    pub fundamental_v: f64,
    /// Fit used to remove the fundamental.
    pub fit: FitKind,
    /// RMS of the residual in the band (and weighting), V.
    pub residual_rms_v: f64,
    /// RMS of the whole signal in the same band (and weighting), V.
    pub signal_rms_v: f64,
    /// THD+N = residual_rms / signal_rms, as a ratio.
    pub thdn_ratio: f64,
    /// THD+N in percent.
    pub thdn_percent: f64,
    /// THD+N in dB.
    pub thdn_db: f64,
    /// SINAD = 20 log10(signal_rms / residual_rms) = -THD+N in dB: the whole signal in the
    /// band over what remains without the fundamental (AES17 reference). At least 0 dB
    /// (the fitted fundamental is removed from the signal, so the residual is at most the
    /// whole).
    pub sinad_db: f64,
    /// ENOB = (SINAD - 1.76) / 6.02, bits (IEEE Std 1057 form, from the SINAD above).
    pub enob: f64,
    /// Window of the residual spectrum.
    pub window: Window,
    /// FFT length.
    pub fft_len: usize,
    /// Whether the capture was coherent at the fundamental.
    pub coherent: bool,
    /// Band, Hz.
    pub bandwidth_hz: [f64; 2],
    /// Weighting.
    pub weighting: Weighting,
}

/// THD+N of a record: the fundamental is removed by a least-squares sine fit (three-parameter
/// when `fundamental_hz` is given, else four-parameter from a detected start), and the
/// residual is band-limited in the frequency domain: the mean square of the residual
/// spectrum's bins inside the band (each weighted if asked). The whole signal's rms is taken
/// through the same band and weighting. SINAD and ENOB use the same residual, so for the
/// IEEE Std 1057 figure of a converter set [`Bandwidth::Full`]. Both THD+N and SINAD refer to
/// the whole signal in the band (AES17), so `sinad_db = -thdn_db` exactly.
pub fn thdn(
    samples: &[f64],
    rate: f64,
    fundamental_hz: Option<f64>,
    settings: &Settings,
) -> Result<ThdnResult, AnalysisError> {
    check_rate(rate)?;
    check_samples("samples", samples, 32)?;
    let band = settings.bandwidth.resolve(rate)?;
    let (fit, kind, plan) = match fundamental_hz {
        Some(f) => {
            let plan = plan_capture(rate, &[f], samples.len(), settings)?;
            (
                fit_sine_3(plan.slice(samples), rate, f)?,
                FitKind::ThreeParameter,
                plan,
            )
        }
        None => {
            let plan = plan_capture(rate, &[], samples.len(), settings)?;
            (
                detect_fundamental(plan.slice(samples), rate)?,
                FitKind::FourParameter,
                plan,
            )
        }
    };
    let capture = plan.slice(samples);
    let mut residual = vec![0.0; capture.len()];
    fit.residual(capture, rate, &mut residual);
    let rspec = Spectrum::compute(&residual, rate, plan.window)?;
    let sspec = Spectrum::compute(capture, rate, plan.window)?;
    let res = rspec.band_ms(band[0], band[1], settings.weighting).sqrt();
    let sig = sspec.band_ms(band[0], band[1], settings.weighting).sqrt();
    if sig <= 0.0 {
        return Err(AnalysisError::NoTone { what: "samples" });
    }
    // The fitted fundamental is a least-squares projection, so the residual never exceeds
    // the whole signal; a windowed band limit can leave a rounding-sized excess, held at 1.
    let ratio = (res / sig).min(1.0);
    // AES17: THD+N is the residual over the whole signal in band; SINAD is its inverse.
    let sinad = -db(ratio);
    Ok(ThdnResult {
        fundamental_hz: fit.freq,
        fundamental_v: fit.amplitude,
        fit: kind,
        residual_rms_v: res,
        signal_rms_v: sig,
        thdn_ratio: ratio,
        thdn_percent: 100.0 * ratio,
        thdn_db: db(ratio),
        sinad_db: sinad,
        enob: (sinad - 1.76) / 6.02,
        window: plan.window,
        fft_len: plan.len,
        coherent: plan.coherent,
        bandwidth_hz: band,
        weighting: settings.weighting,
    })
}

/// RMS of a record in the band and weighting of `settings`, with its spectrum's window.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct BandRms {
    /// RMS in the band, V.
    pub rms_v: f64,
    /// Window used.
    pub window: Window,
    /// FFT length.
    pub fft_len: usize,
    /// Band, Hz.
    pub bandwidth_hz: [f64; 2],
    /// Weighting.
    pub weighting: Weighting,
}

/// Band-limited (and weighted) RMS of a record (its last [`Settings::max_capture`] samples),
/// by the frequency-domain band limit (window: [`Settings::window`], else 7-term
/// Blackman-Harris).
pub fn band_rms(samples: &[f64], rate: f64, settings: &Settings) -> Result<BandRms, AnalysisError> {
    let band = settings.bandwidth.resolve(rate)?;
    let window = settings.window.unwrap_or(Window::BlackmanHarris7);
    let take = samples.len().min(settings.max_capture.max(1));
    let spec = Spectrum::compute(&samples[samples.len() - take..], rate, window)?;
    Ok(BandRms {
        rms_v: spec.band_ms(band[0], band[1], settings.weighting).sqrt(),
        window,
        fft_len: spec.fft_len,
        bandwidth_hz: band,
        weighting: settings.weighting,
    })
}

/// SNR result.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SnrResult {
    /// Signal level used, V rms.
    pub signal_rms_v: f64,
    /// Whether the signal level is a stated reference rather than measured.
    pub stated_reference: bool,
    /// Idle-render noise in the band, V rms.
    pub noise_rms_v: f64,
    /// SNR = 20 log10(signal / noise), dB.
    pub snr_db: f64,
    /// Window of the noise spectrum.
    pub window: Window,
    /// FFT length of the noise spectrum.
    pub fft_len: usize,
    /// Band, Hz.
    pub bandwidth_hz: [f64; 2],
    /// Weighting.
    pub weighting: Weighting,
}

/// SNR: the signal's band-limited rms (or `reference_v_rms` if given) against the rms of an
/// idle render (sources muted) in the same band and weighting.
pub fn snr(
    signal: &[f64],
    idle: &[f64],
    rate: f64,
    reference_v_rms: Option<f64>,
    settings: &Settings,
) -> Result<SnrResult, AnalysisError> {
    check_rate(rate)?;
    check_samples("idle samples", idle, 32)?;
    let noise = band_rms(idle, rate, settings)?;
    let (sig, stated) = match reference_v_rms {
        Some(r) if r.is_finite() && r > 0.0 => (r, true),
        Some(r) => {
            return Err(AnalysisError::BadSetting {
                what: "snr reference",
                expected: format!("a positive V rms (got {r})"),
            })
        }
        None => {
            check_samples("samples", signal, 32)?;
            (band_rms(signal, rate, settings)?.rms_v, false)
        }
    };
    Ok(SnrResult {
        signal_rms_v: sig,
        stated_reference: stated,
        noise_rms_v: noise.rms_v,
        snr_db: db(sig / noise.rms_v),
        window: noise.window,
        fft_len: noise.fft_len,
        bandwidth_hz: noise.bandwidth_hz,
        weighting: noise.weighting,
    })
}

/// One intermodulation product.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Product {
    /// Label, e.g. `"fH+1fL"` or `"2f1-f2"`.
    pub label: &'static str,
    /// Frequency, Hz.
    pub freq_hz: f64,
    /// Peak amplitude, V.
    pub amplitude_v: f64,
    /// Relative to the reference tone (see the result's normalisation), dB.
    pub dbc: f64,
}

/// SMPTE RP120 IMD result.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SmpteImd {
    /// Low tone, Hz.
    pub f_low_hz: f64,
    /// High tone, Hz.
    pub f_high_hz: f64,
    /// High-tone amplitude, V peak.
    pub high_v: f64,
    /// Low-tone amplitude, V peak.
    pub low_v: f64,
    /// Sidebands fH -/+ n fL, n = 1, 2 (dBc relative to the high tone).
    pub sidebands: Vec<Product>,
    /// IMD = rss(sidebands) / high-tone amplitude, ratio.
    pub imd_ratio: f64,
    /// IMD in percent.
    pub imd_percent: f64,
    /// IMD in dB.
    pub imd_db: f64,
    /// How the figure is normalised.
    pub normalisation: &'static str,
    /// Window used.
    pub window: Window,
    /// FFT length.
    pub fft_len: usize,
    /// Whether both tones were coherent.
    pub coherent: bool,
}

fn check_lobes(spec: &Spectrum, freqs: &[f64]) -> Result<(), AnalysisError> {
    let lobe = 2.0 * spec.window.lobe_half_width() as f64 * spec.bin_hz;
    for (i, a) in freqs.iter().enumerate() {
        if *a < lobe {
            return Err(AnalysisError::BadSetting {
                what: "imd tones",
                expected: format!(
                    "every product at least {lobe} Hz (two lobe widths) from DC: a longer record"
                ),
            });
        }
        for b in &freqs[i + 1..] {
            if (a - b).abs() < lobe {
                return Err(AnalysisError::BadSetting {
                    what: "imd tones",
                    expected: format!(
                        "products at least {lobe} Hz apart ({a} and {b} Hz are not): a longer record"
                    ),
                });
            }
        }
    }
    Ok(())
}

/// SMPTE RP120 IMD: tones `f_low` and `f_high` (60 Hz and 7 kHz at 4:1 in the standard).
/// IMD = sqrt(sum over n = 1, 2 of A(fH - n fL)^2 + A(fH + n fL)^2) / A(fH).
pub fn imd_smpte(
    samples: &[f64],
    rate: f64,
    f_low: f64,
    f_high: f64,
    settings: &Settings,
) -> Result<SmpteImd, AnalysisError> {
    check_rate(rate)?;
    check_samples("samples", samples, 32)?;
    check_freq("imd low tone", f_low, rate)?;
    check_freq("imd high tone", f_high, rate)?;
    let products = [
        ("fH-2fL", f_high - 2.0 * f_low),
        ("fH-1fL", f_high - f_low),
        ("fH+1fL", f_high + f_low),
        ("fH+2fL", f_high + 2.0 * f_low),
    ];
    for (_, f) in products {
        check_freq("imd sideband", f, rate)?;
    }
    let plan = plan_capture(rate, &[f_low, f_high], samples.len(), settings)?;
    let spec = Spectrum::compute(plan.slice(samples), rate, plan.window)?;
    let mut all = vec![f_low, f_high];
    all.extend(products.iter().map(|p| p.1));
    check_lobes(&spec, &all)?;
    let high = spec.lobe_amplitude(f_high);
    let low = spec.lobe_amplitude(f_low);
    if high <= 0.0 {
        return Err(AnalysisError::NoTone { what: "samples" });
    }
    let mut power = 0.0;
    let sidebands = products
        .iter()
        .map(|&(label, f)| {
            let a = spec.lobe_amplitude(f);
            power += a * a;
            Product {
                label,
                freq_hz: f,
                amplitude_v: a,
                dbc: db(a / high),
            }
        })
        .collect();
    let ratio = power.sqrt() / high;
    Ok(SmpteImd {
        f_low_hz: f_low,
        f_high_hz: f_high,
        high_v: high,
        low_v: low,
        sidebands,
        imd_ratio: ratio,
        imd_percent: 100.0 * ratio,
        imd_db: db(ratio),
        normalisation: "SMPTE RP120: rss of fH+/-fL and fH+/-2fL over the fH amplitude",
        window: plan.window,
        fft_len: plan.len,
        coherent: plan.coherent,
    })
}

/// Twin-tone IMD result.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TwinToneImd {
    /// Lower tone, Hz.
    pub f1_hz: f64,
    /// Upper tone, Hz.
    pub f2_hz: f64,
    /// Lower-tone amplitude, V peak.
    pub a1_v: f64,
    /// Upper-tone amplitude, V peak.
    pub a2_v: f64,
    /// Difference product f2 - f1 (dbc relative to 2 A(f2)).
    pub d2: Product,
    /// d2 = A(f2 - f1) / (2 A(f2)), ratio (IEC 60268-3 normalisation).
    pub d2_ratio: f64,
    /// d2 in percent.
    pub d2_percent: f64,
    /// d2 in dB.
    pub d2_db: f64,
    /// 2f1 - f2 (dbc relative to A(f2)).
    pub d3_low: Product,
    /// 2f2 - f1 (dbc relative to A(f2)); `None` above Nyquist.
    pub d3_high: Option<Product>,
    /// How the figures are normalised.
    pub normalisation: &'static str,
    /// Window used.
    pub window: Window,
    /// FFT length.
    pub fft_len: usize,
    /// Whether both tones were coherent.
    pub coherent: bool,
}

/// Twin-tone IMD (19 + 20 kHz at 1:1 in common use): the difference product `f2 - f1`
/// referred to twice the `f2` amplitude (IEC 60268-3 normalisation; equal to the sum of the
/// two amplitudes at 1:1), and the third-order products `2f1 - f2`, `2f2 - f1` in dB
/// relative to the `f2` amplitude (per-tone dBc).
pub fn imd_twin_tone(
    samples: &[f64],
    rate: f64,
    f1: f64,
    f2: f64,
    settings: &Settings,
) -> Result<TwinToneImd, AnalysisError> {
    check_rate(rate)?;
    check_samples("samples", samples, 32)?;
    check_freq("twin tone f1", f1, rate)?;
    check_freq("twin tone f2", f2, rate)?;
    if f1 >= f2 {
        return Err(AnalysisError::BadSetting {
            what: "twin tone",
            expected: format!("f1 < f2 (got {f1} and {f2} Hz)"),
        });
    }
    let fd = f2 - f1;
    let f3l = 2.0 * f1 - f2;
    let f3h = 2.0 * f2 - f1;
    let plan = plan_capture(rate, &[f1, f2], samples.len(), settings)?;
    let spec = Spectrum::compute(plan.slice(samples), rate, plan.window)?;
    let high_ok = f3h < rate / 2.0;
    let mut all = vec![f1, f2, fd, f3l];
    if high_ok {
        all.push(f3h);
    }
    check_lobes(&spec, &all)?;
    let a1 = spec.lobe_amplitude(f1);
    let a2 = spec.lobe_amplitude(f2);
    if a2 <= 0.0 {
        return Err(AnalysisError::NoTone { what: "samples" });
    }
    let ad = spec.lobe_amplitude(fd);
    let mk = |label, f: f64, reference: f64| {
        let a = spec.lobe_amplitude(f);
        Product {
            label,
            freq_hz: f,
            amplitude_v: a,
            dbc: db(a / reference),
        }
    };
    let d2_ratio = ad / (2.0 * a2);
    Ok(TwinToneImd {
        f1_hz: f1,
        f2_hz: f2,
        a1_v: a1,
        a2_v: a2,
        d2: mk("f2-f1", fd, 2.0 * a2),
        d2_ratio,
        d2_percent: 100.0 * d2_ratio,
        d2_db: db(d2_ratio),
        d3_low: mk("2f1-f2", f3l, a2),
        d3_high: if high_ok {
            Some(mk("2f2-f1", f3h, a2))
        } else {
            None
        },
        normalisation: "IEC 60268-3: d2 = A(f2-f1) / (2 A(f2)); d3 products in dB re A(f2)",
        window: plan.window,
        fft_len: plan.len,
        coherent: plan.coherent,
    })
}
