//! Analysis: the figures a bench analyser gives, as pure functions over `f64` sample slices
//! (no I/O). Every figure states how it was taken: window, FFT length, bandwidth, weighting.
//!
//! # Spectrum ([`spectrum`], [`window`])
//! Real FFT (realfft) of the capture, any length. Amplitude-correct scaling: a sine of peak
//! `A` reads `A` on its bin (`2 |X_k| / sum(w)`). A tone's level is the power sum over its
//! main lobe (`K` bins either side for a `K`-term cosine window), corrected by the window's
//! equivalent noise bandwidth, so it does not depend on where the tone falls between bins.
//! Windows: rectangular (coherent captures only), 7-term minimum-sidelobe Blackman-Harris
//! (default for non-coherent captures; coefficients as tabulated by Albrecht, ICASSP 2001),
//! 4-term Blackman-Harris (Harris, Proc. IEEE 1978), 5-term flat-top (D'Antona and Ferrero
//! 2006).
//!
//! # Captures
//! The analysed capture is the *last* `N` samples of the record (start-up transients fall
//! outside). For known tones, [`spectrum::choose_capture`] picks the longest `N` (at least
//! half the record) with every tone at an integer number of cycles, `f = M rate / N`; the
//! capture is then coherent and analysed with the rectangular window, where every bin is a
//! harmonic, an alias or noise and the numerical floor is near -290 dB. Otherwise the whole
//! record is analysed with the 7-term window (floor about -180 dB).
//! [`spectrum::coherent_frequency`] gives a generator the nearest coherent tone (`M` odd and
//! coprime with `N`).
//!
//! # Figures ([`distortion`], [`levels`](mod@levels))
//! - **THD** (`THD_F`) = `sqrt(sum_{h=2..N} A_h^2) / A_1`, `N` = 10 by default or every
//!   harmonic below Nyquist; harmonics above Nyquist are not counted by default
//!   ([`AliasRule`]). When even the third harmonic lies above Nyquist the record cannot
//!   show the distortion (a slewing or clipping tone puts nearly all of it in odd
//!   harmonics), so THD is not given ([`AnalysisError::AboveNyquist`], JSON `null` with a
//!   note), never 0. Also each harmonic in dBc.
//! - **THD+N** = rms of the residual after a least-squares sine fit (IEEE Std 1057: three
//!   parameters at a known frequency, four iterating on frequency otherwise), band-limited in
//!   the frequency domain to 20 Hz - 20 kHz by default (AES17 practice; the bins of the
//!   residual spectrum in the band are summed: a brick wall at bin resolution, which meets
//!   the AES17 low-pass mask, flat within 0.1 dB to 20 kHz and more than 60 dB down from
//!   24 kHz, to within the window's lobe width), optionally A- or C-weighted per bin, over the
//!   rms of the whole signal through the same band and weighting.
//! - **SINAD** = `20 log10(whole signal rms / residual rms)` over the same band and weighting,
//!   so `SINAD = -THD+N` in dB and is never negative (AES17 reference: both figures refer to
//!   the whole signal in band); **ENOB** = `(SINAD - 1.76) / 6.02` (IEEE Std 1057 form; use
//!   the full band for a converter's figure).
//! - **THD** refers to the fundamental (`THD_F`), so it can exceed 0 dB for a wave that is
//!   mostly harmonics; THD+N and SINAD cannot.
//! - **SNR** = signal rms (band-limited, or a stated reference) over the rms of an idle
//!   render (sources muted), same band and weighting.
//! - **IMD**: SMPTE RP120 (rss of `fH +/- fL`, `fH +/- 2 fL` over the `fH` amplitude) and twin
//!   tone (difference product over twice the `f2` amplitude, IEC 60268-3; third-order products
//!   in dB re the `f2` amplitude).
//! - **Levels**: peak, rms, crest factor, DC (mean), headroom to each swing limit, dBu
//!   (0 dBu = sqrt(0.6) V rms), dBV (1 V rms), dBFS (a full-scale sine is 0 dBFS).
//! - **Weighting** ([`weighting`]): IEC 61672-1 Annex E closed forms for A and C.
//! - **Level at a THD threshold** ([`sweep::level_at_thd`]), log-log interpolated.
//!
//! [`measure_output`] gathers all that apply for one output into [`OutputFigures`], a serde
//! struct where a figure that does not apply is `None` (JSON `null`), never 0.
//!
//! ```
//! use railsong::analysis::{measure_output, MeasureContext, TestSignal};
//! let rate = 48_000.0;
//! // 997 Hz, 1 V peak, with 1 % third harmonic: coherent in 48000 samples
//! let x: Vec<f64> = (0..48_000)
//!     .map(|n| {
//!         let p = 2.0 * std::f64::consts::PI * 997.0 * n as f64 / rate;
//!         p.sin() + 0.01 * (3.0 * p).sin()
//!     })
//!     .collect();
//! let ctx = MeasureContext { test: TestSignal::Tone(997.0), ..MeasureContext::default() };
//! let fig = measure_output(&x, rate, &ctx);
//! assert!((fig.thd_percent.unwrap() - 1.0).abs() < 1e-9);
//! assert_eq!(fig.window.as_deref(), Some("rectangular"));
//! assert!(fig.imd_smpte_percent.is_none()); // does not apply: JSON null
//! ```

pub mod distortion;
pub mod levels;
pub mod sinefit;
pub mod spectrum;
pub mod sweep;
pub mod weighting;
pub mod window;

use serde::{Deserialize, Serialize};
use thiserror::Error;

pub use distortion::{
    band_rms, detect_fundamental, imd_smpte, imd_twin_tone, plan_capture, snr, thd,
    thd_from_spectrum, thdn, AliasRule, Bandwidth, CapturePlan, Harmonics, Settings, SmpteImd,
    SnrResult, ThdResult, ThdnResult, TwinToneImd,
};
pub use levels::{headroom_db, levels, Levels, SwingLimits};
pub use spectrum::{choose_capture, coherent_frequency, Capture, Spectrum};
pub use weighting::{a_weight_db, c_weight_db, AWeightingFilter, Weighting};
pub use window::Window;

/// Errors of the analysis functions (bad input, not bugs).
#[derive(Debug, Clone, PartialEq, Error)]
pub enum AnalysisError {
    /// A record is shorter than the analysis needs.
    #[error("analysis: `{what}` has {got} samples, at least {need} are needed")]
    TooShort {
        /// Which record.
        what: &'static str,
        /// Samples given.
        got: usize,
        /// Samples needed.
        need: usize,
    },
    /// The sample rate is not a positive finite number.
    #[error("analysis: the sample rate must be finite and above 0 Hz (and above 2 kHz for weighting filters), got {0}")]
    BadRate(f64),
    /// A frequency is outside `(0, Nyquist)`.
    #[error(
        "analysis: `{what}` = {value} Hz must be finite and between 0 and Nyquist ({nyquist} Hz)"
    )]
    BadFrequency {
        /// Which frequency.
        what: &'static str,
        /// The value given, Hz.
        value: f64,
        /// Nyquist at the rate in use, Hz.
        nyquist: f64,
    },
    /// A sample is NaN or infinite.
    #[error("analysis: `{what}` sample {index} is not finite ({value})")]
    NotFinite {
        /// Which record.
        what: &'static str,
        /// Index of the first bad sample.
        index: usize,
        /// Its value.
        value: f64,
    },
    /// A setting is out of range.
    #[error("analysis: `{what}`: expected {expected}")]
    BadSetting {
        /// Which setting.
        what: &'static str,
        /// What was expected.
        expected: String,
    },
    /// No tone to measure (silent record, or only DC).
    #[error("analysis: no tone found in `{what}` (silent, or nothing above DC)")]
    NoTone {
        /// Which record.
        what: &'static str,
    },
    /// A least-squares fit was singular.
    #[error("analysis: {what} is singular (record too short or silent)")]
    FitFailed {
        /// Which fit.
        what: &'static str,
    },
    /// The harmonics that THD needs lie above Nyquist, where the record cannot hold them.
    #[error(
        "harmonic {order} of {fundamental_hz} Hz ({} Hz) lies above Nyquist ({nyquist} Hz), \
         so THD is not measured at this rate (it is not 0: raise patch.rate to see it)",
        *order as f64 * fundamental_hz
    )]
    AboveNyquist {
        /// The first harmonic missing.
        order: usize,
        /// Fundamental, Hz.
        fundamental_hz: f64,
        /// Nyquist at the rate in use, Hz.
        nyquist: f64,
    },
    /// The FFT library refused its buffers (cannot happen with planned lengths).
    #[error("analysis: FFT failed: {0}")]
    Fft(String),
}

/// The test signal an output carries, which decides the figures that apply.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum TestSignal {
    /// A single tone of unknown frequency: detect it (four-parameter fit).
    #[default]
    Detect,
    /// A single tone at a known frequency, Hz (three-parameter fit; coherent if possible).
    Tone(f64),
    /// SMPTE RP120 pair: low and high tone, Hz.
    Smpte {
        /// Low tone, Hz (60 in the standard).
        low: f64,
        /// High tone, Hz (7000 in the standard).
        high: f64,
    },
    /// Twin tone, Hz (19 and 20 kHz in common use).
    TwinTone {
        /// Lower tone, Hz.
        f1: f64,
        /// Upper tone, Hz.
        f2: f64,
    },
    /// No tone figures (levels, and SNR if an idle render is given).
    None,
}

/// Everything [`measure_output`] needs besides the samples.
#[derive(Debug, Clone, Default)]
pub struct MeasureContext<'a> {
    /// Output swing limits for headroom (`None`: headroom not given).
    pub swing: Option<SwingLimits>,
    /// Voltage of digital full scale (peak of a full-scale sine), for dBFS.
    pub full_scale_v: Option<f64>,
    /// An idle render (sources muted) of the same output, for SNR.
    pub idle: Option<&'a [f64]>,
    /// SNR against this level (V rms) instead of the measured signal.
    pub snr_reference_v: Option<f64>,
    /// The test signal.
    pub test: TestSignal,
    /// Analysis settings.
    pub settings: Settings,
    /// Samples at the start of `samples` that spectral figures skip (the switch-on; levels
    /// still cover every sample). When fewer than [`MIN_CAPTURE_S`] remain, the last
    /// [`MIN_CAPTURE_S`] are taken instead and `notes` says so.
    pub skip: usize,
    /// The same for `idle`.
    pub idle_skip: usize,
}

/// Shortest capture taken after a settle time, s: when less is left, the capture reaches
/// back into the settle time (and a note says so).
pub const MIN_CAPTURE_S: f64 = 0.1;

/// The part of a record spectral figures analyse: everything after `skip` samples, or, when
/// that is shorter than [`MIN_CAPTURE_S`], the last `MIN_CAPTURE_S` of the record with a
/// note saying how much of it lies inside the settle time.
pub fn settled<'a>(
    samples: &'a [f64],
    skip: usize,
    rate: f64,
    what: &str,
) -> (&'a [f64], Option<String>) {
    let min = (MIN_CAPTURE_S * rate).ceil() as usize;
    let left = samples.len().saturating_sub(skip);
    if skip == 0 || left >= min {
        return (&samples[skip.min(samples.len())..], None);
    }
    let take = min.min(samples.len());
    let note = format!(
        "{what}: only {:.1} ms of the record lies after the settle time; the capture takes the \
         last {:.1} ms, which may include the switch-on (render a longer patch)",
        1e3 * left as f64 / rate,
        1e3 * take as f64 / rate
    );
    (&samples[samples.len() - take..], Some(note))
}

/// The figures of one output. `None` (JSON `null`) when a figure does not apply.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub struct OutputFigures {
    /// Fundamental frequency, Hz.
    pub fundamental_hz: Option<f64>,
    /// THD_F over the harmonics counted, %.
    pub thd_percent: Option<f64>,
    /// THD, dB.
    pub thd_db: Option<f64>,
    /// Harmonics counted by THD (their number).
    pub thd_harmonics: Option<usize>,
    /// THD+N, %.
    pub thdn_percent: Option<f64>,
    /// THD+N, dB.
    pub thdn_db: Option<f64>,
    /// SINAD, dB.
    pub sinad_db: Option<f64>,
    /// Effective number of bits from SINAD.
    pub enob: Option<f64>,
    /// SNR against the idle render, dB.
    pub snr_db: Option<f64>,
    /// Peak |x|, V: the circuit's own peak where the caller knows it (`measure`: the
    /// op-amp's output after its clamp), else the record's.
    pub peak_v: Option<f64>,
    /// Peak |x| of the record (the output at the file's rate, band-limited: it may
    /// overshoot the circuit's peak; before a file's edge fade and listening gain), V.
    pub file_peak_v: Option<f64>,
    /// AC RMS (about the mean, DC excluded: DC is `dc_v`), V.
    pub rms_v: Option<f64>,
    /// Mean, V.
    pub dc_v: Option<f64>,
    /// Crest factor, peak over the RMS including DC, dB.
    pub crest_db: Option<f64>,
    /// Headroom to the positive swing limit, dB.
    pub headroom_pos_db: Option<f64>,
    /// Headroom to the negative swing limit, dB.
    pub headroom_neg_db: Option<f64>,
    /// Harmonics 2, 3, ... in dBc (the ones THD counted, in order; a harmonic of exactly
    /// zero amplitude is `-inf`, written as JSON `null`).
    pub harmonics_dbc: Vec<f64>,
    /// AC rms in dBu.
    pub rms_dbu: Option<f64>,
    /// AC rms in dBV.
    pub rms_dbv: Option<f64>,
    /// Peak in dBFS.
    pub peak_dbfs: Option<f64>,
    /// AC rms in dBFS (sine-peak convention).
    pub rms_dbfs: Option<f64>,
    /// SMPTE RP120 IMD, %.
    pub imd_smpte_percent: Option<f64>,
    /// SMPTE RP120 IMD, dB.
    pub imd_smpte_db: Option<f64>,
    /// Twin-tone difference product d2 (IEC 60268-3 normalisation), %.
    pub imd_ccif_percent: Option<f64>,
    /// Twin-tone difference product d2, dB.
    pub imd_ccif_db: Option<f64>,
    /// Twin-tone 2f1 - f2, dB re the f2 amplitude.
    pub imd_ccif_d3_low_dbc: Option<f64>,
    /// Twin-tone 2f2 - f1, dB re the f2 amplitude.
    pub imd_ccif_d3_high_dbc: Option<f64>,
    /// Window of the spectral figures.
    pub window: Option<String>,
    /// FFT length of the spectral figures.
    pub fft_len: Option<usize>,
    /// Whether the capture was coherent.
    pub coherent: Option<bool>,
    /// Band of THD+N, SINAD and SNR, Hz.
    pub bandwidth_hz: Option<[f64; 2]>,
    /// Weighting of THD+N, SINAD and SNR.
    pub weighting: Option<String>,
    /// Why a figure is missing, one line each.
    pub notes: Vec<String>,
}

/// Set the level figures of `fig` from `l`: peak, RMS, DC, crest factor, dBu, dBV, dBFS
/// (when `full_scale_v` is a positive voltage) and headroom (when `swing` is given). A figure
/// that does not apply becomes `None`. [`measure_output`] uses it on the analysed record; a
/// caller that kept only part of a long record uses it with levels of the whole.
pub fn set_level_figures(
    fig: &mut OutputFigures,
    l: &Levels,
    swing: Option<&SwingLimits>,
    full_scale_v: Option<f64>,
) {
    fig.peak_v = Some(l.peak_v);
    fig.file_peak_v = Some(l.peak_v);
    fig.rms_v = Some(l.ac_rms_v);
    fig.dc_v = Some(l.dc_v);
    fig.crest_db = l.crest_db;
    let ac = (l.ac_rms_v > 0.0).then_some(l.ac_rms_v);
    fig.rms_dbu = ac.map(levels::v_to_dbu);
    fig.rms_dbv = ac.map(levels::v_to_dbv);
    let fs = full_scale_v.filter(|v| v.is_finite() && *v > 0.0);
    fig.peak_dbfs = fs
        .filter(|_| l.peak_v > 0.0)
        .map(|fs| levels::peak_to_dbfs(l.peak_v, fs));
    fig.rms_dbfs = fs.and_then(|fs| ac.map(|a| levels::rms_to_dbfs(a, fs)));
    if let Some(lim) = swing {
        let (p, n) = headroom_db(l, lim);
        fig.headroom_pos_db = p;
        fig.headroom_neg_db = n;
    }
}

/// Measure one output: levels always; THD, THD+N, SINAD, ENOB or IMD according to
/// `ctx.test`; SNR when an idle render is given. Never panics: a figure that cannot be
/// taken is `None` with a line in `notes`.
pub fn measure_output(samples: &[f64], rate: f64, ctx: &MeasureContext) -> OutputFigures {
    let mut fig = OutputFigures::default();
    let s = &ctx.settings;
    match levels(samples) {
        Ok(l) => set_level_figures(&mut fig, &l, ctx.swing.as_ref(), ctx.full_scale_v),
        Err(e) => fig.notes.push(format!("levels: {e}")),
    }
    let note = |fig: &mut OutputFigures, what: &str, e: AnalysisError| {
        fig.notes.push(format!("{what}: {e}"));
    };
    // Spectral figures start after the settle time.
    let (samples, settle_note) = settled(samples, ctx.skip, rate, "capture");
    fig.notes.extend(settle_note);
    let idle = ctx
        .idle
        .map(|x| settled(x, ctx.idle_skip, rate, "idle capture").0);
    match ctx.test {
        TestSignal::Detect | TestSignal::Tone(_) => {
            let known = match ctx.test {
                TestSignal::Tone(f) => Some(f),
                _ => None,
            };
            match thd(samples, rate, known, s) {
                Ok(t) => {
                    fig.fundamental_hz = Some(t.fundamental_hz);
                    fig.thd_percent = Some(t.thd_percent);
                    fig.thd_db = Some(t.thd_db);
                    fig.thd_harmonics = Some(t.harmonics.len());
                    fig.harmonics_dbc = t.harmonics.iter().map(|h| h.dbc).collect();
                    fig.window = Some(t.window.name().to_string());
                    fig.fft_len = Some(t.fft_len);
                    fig.coherent = Some(t.coherent);
                }
                Err(e) => note(&mut fig, "thd", e),
            }
            match thdn(samples, rate, known, s) {
                Ok(t) => {
                    fig.thdn_percent = Some(t.thdn_percent);
                    fig.thdn_db = Some(t.thdn_db);
                    fig.sinad_db = Some(t.sinad_db);
                    fig.enob = Some(t.enob);
                    fig.bandwidth_hz = Some(t.bandwidth_hz);
                    fig.weighting = Some(t.weighting.name().to_string());
                }
                Err(e) => note(&mut fig, "thd+n", e),
            }
        }
        TestSignal::Smpte { low, high } => match imd_smpte(samples, rate, low, high, s) {
            Ok(r) => {
                fig.imd_smpte_percent = Some(r.imd_percent);
                fig.imd_smpte_db = Some(r.imd_db);
                fig.window = Some(r.window.name().to_string());
                fig.fft_len = Some(r.fft_len);
                fig.coherent = Some(r.coherent);
            }
            Err(e) => note(&mut fig, "imd (smpte)", e),
        },
        TestSignal::TwinTone { f1, f2 } => match imd_twin_tone(samples, rate, f1, f2, s) {
            Ok(r) => {
                fig.imd_ccif_percent = Some(r.d2_percent);
                fig.imd_ccif_db = Some(r.d2_db);
                fig.imd_ccif_d3_low_dbc = Some(r.d3_low.dbc);
                fig.imd_ccif_d3_high_dbc = r.d3_high.map(|p| p.dbc);
                fig.window = Some(r.window.name().to_string());
                fig.fft_len = Some(r.fft_len);
                fig.coherent = Some(r.coherent);
            }
            Err(e) => note(&mut fig, "imd (twin tone)", e),
        },
        TestSignal::None => {}
    }
    if let Some(idle) = idle {
        match snr(samples, idle, rate, ctx.snr_reference_v, s) {
            Ok(r) => {
                fig.snr_db = Some(r.snr_db);
                fig.bandwidth_hz = Some(r.bandwidth_hz);
                fig.weighting = Some(r.weighting.name().to_string());
            }
            Err(e) => note(&mut fig, "snr", e),
        }
    }
    fig
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn silent_output_has_no_tone_figures() {
        // A figure that does not apply is None (JSON null), never 0 (project rule).
        let x = vec![0.0; 4800];
        let f = measure_output(&x, 48_000.0, &MeasureContext::default());
        assert_eq!(f.thd_percent, None);
        assert_eq!(f.thdn_db, None);
        assert_eq!(f.crest_db, None);
        assert_eq!(f.peak_v, Some(0.0));
        assert!(!f.notes.is_empty());
        let json = serde_json::to_value(&f).unwrap();
        assert!(json["thd_percent"].is_null());
        assert!(json["snr_db"].is_null());
    }
}
