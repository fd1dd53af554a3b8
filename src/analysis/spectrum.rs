//! Amplitude spectrum by real FFT, coherent-capture planning and peak finding.
//!
//! Scaling: `amplitude[k] = 2 |X_k| / sum(w)` for `0 < k < N/2`, and `|X_k| / sum(w)` for
//! DC and (even `N`) the Nyquist bin, where `X_k = sum_n w[n] x[n] e^{-j 2 pi k n / N}`.
//! A sine of peak `A` on a bin centre reads `A`; DC reads the mean.
//!
//! Power: each bin carries the mean-square `amplitude^2 / (2 ENBW)` (DC and Nyquist:
//! `amplitude^2 / ENBW`), ENBW the window's equivalent noise bandwidth in bins. With the
//! rectangular window (ENBW = 1) the sum over all bins is exactly the mean square of the
//! record (Parseval); with other windows it is the window-energy-corrected estimate. A tone's
//! amplitude is read as the power sum over its main lobe (`sqrt(2 sum ms)`), which by
//! Parseval's relation does not depend on where the tone falls between bins.

use realfft::RealFftPlanner;

use super::weighting::Weighting;
use super::window::Window;
use super::AnalysisError;

/// Largest distance (in cycles over the record) from an integer that still counts as a
/// coherent capture: a phase error of `2 pi 1e-9` rad leaks below -180 dBc.
pub const COHERENCE_TOLERANCE_CYCLES: f64 = 1e-9;

/// A one-sided amplitude spectrum.
#[derive(Debug, Clone, PartialEq)]
pub struct Spectrum {
    /// The window applied before the FFT.
    pub window: Window,
    /// FFT length `N` (number of samples analysed).
    pub fft_len: usize,
    /// Sample rate, Hz.
    pub rate: f64,
    /// Bin spacing `rate / N`, Hz.
    pub bin_hz: f64,
    /// Peak-amplitude-scaled magnitudes, bins `0..=N/2` (see module docs).
    pub amplitude: Vec<f64>,
}

pub(crate) fn check_rate(rate: f64) -> Result<(), AnalysisError> {
    if rate.is_finite() && rate > 0.0 {
        Ok(())
    } else {
        Err(AnalysisError::BadRate(rate))
    }
}

pub(crate) fn check_samples(
    what: &'static str,
    samples: &[f64],
    need: usize,
) -> Result<(), AnalysisError> {
    if samples.len() < need {
        return Err(AnalysisError::TooShort {
            what,
            got: samples.len(),
            need,
        });
    }
    if let Some((index, &value)) = samples.iter().enumerate().find(|(_, v)| !v.is_finite()) {
        return Err(AnalysisError::NotFinite { what, index, value });
    }
    Ok(())
}

pub(crate) fn check_freq(what: &'static str, value: f64, rate: f64) -> Result<(), AnalysisError> {
    let nyquist = rate / 2.0;
    if value.is_finite() && value > 0.0 && value < nyquist {
        Ok(())
    } else {
        Err(AnalysisError::BadFrequency {
            what,
            value,
            nyquist,
        })
    }
}

impl Spectrum {
    /// Windowed real FFT of all of `samples` (any length realfft handles: every `N >= 2`).
    ///
    /// Needs at least `4 * lobe_half_width` samples so a lobe fits.
    pub fn compute(samples: &[f64], rate: f64, window: Window) -> Result<Self, AnalysisError> {
        check_rate(rate)?;
        check_samples("samples", samples, 4 * window.lobe_half_width())?;
        let n = samples.len();
        let mut planner = RealFftPlanner::<f64>::new();
        let fft = planner.plan_fft_forward(n);
        let mut input = fft.make_input_vec();
        let mut output = fft.make_output_vec();
        let mut s1 = 0.0;
        for (i, (dst, &x)) in input.iter_mut().zip(samples).enumerate() {
            let w = window.value(i, n);
            s1 += w;
            *dst = w * x;
        }
        // The lengths come from the plan itself, so `process` cannot fail; map the
        // impossible error rather than panic.
        fft.process(&mut input, &mut output)
            .map_err(|e| AnalysisError::Fft(e.to_string()))?;
        let half = n / 2;
        let amplitude = output
            .iter()
            .enumerate()
            .map(|(k, c)| {
                let scale = if k == 0 || (n.is_multiple_of(2) && k == half) {
                    1.0
                } else {
                    2.0
                };
                scale * c.norm() / s1
            })
            .collect();
        Ok(Spectrum {
            window,
            fft_len: n,
            rate,
            bin_hz: rate / n as f64,
            amplitude,
        })
    }

    /// Nyquist frequency, Hz.
    pub fn nyquist(&self) -> f64 {
        self.rate / 2.0
    }

    /// Frequency of bin `k`, Hz.
    pub fn freq_of(&self, k: usize) -> f64 {
        k as f64 * self.bin_hz
    }

    /// Mean-square contribution of bin `k` (window-energy corrected), V^2.
    pub fn bin_ms(&self, k: usize) -> f64 {
        let a = match self.amplitude.get(k) {
            Some(a) => *a,
            None => return 0.0,
        };
        let edge = k == 0 || (self.fft_len.is_multiple_of(2) && k == self.fft_len / 2);
        let enbw = self.window.enbw_bins();
        if edge {
            a * a / enbw
        } else {
            a * a / (2.0 * enbw)
        }
    }

    /// Peak amplitude of a tone at `freq` Hz: `sqrt(2 * sum of bin_ms)` over the integer
    /// bins strictly inside its main lobe (`|k - freq/bin_hz| < lobe_half_width`, clipped to
    /// `0..=N/2`).
    pub fn lobe_amplitude(&self, freq: f64) -> f64 {
        (2.0 * self.lobe_ms(freq)).sqrt()
    }

    /// Mean square over the main lobe around `freq` (see [`Spectrum::lobe_amplitude`]).
    pub fn lobe_ms(&self, freq: f64) -> f64 {
        if self.amplitude.is_empty() {
            return 0.0;
        }
        let p = freq / self.bin_hz;
        let half = self.window.lobe_half_width() as f64;
        let last = (self.amplitude.len() - 1) as f64;
        let lo = (p - half).floor() + 1.0;
        let hi = (p + half).ceil() - 1.0;
        let lo = lo.max(0.0);
        let hi = hi.min(last);
        if hi < lo {
            return 0.0;
        }
        (lo as usize..=hi as usize).map(|k| self.bin_ms(k)).sum()
    }

    /// Mean square of the bins whose centre lies in `[lo, hi]` Hz, each weighted by the
    /// power gain of `weighting` at the bin centre. This is the frequency-domain band limit
    /// (a brick wall at bin resolution, smeared by the window's main lobe width).
    pub fn band_ms(&self, lo: f64, hi: f64, weighting: Weighting) -> f64 {
        let mut sum = 0.0;
        for k in 0..self.amplitude.len() {
            let f = self.freq_of(k);
            if f < lo || f > hi {
                continue;
            }
            let g = weighting.gain(f);
            sum += self.bin_ms(k) * g * g;
        }
        sum
    }

    /// The largest bin at or above `min_bin`, if the spectrum is not all zero there.
    pub fn peak_bin(&self, min_bin: usize) -> Option<usize> {
        let mut best: Option<(usize, f64)> = None;
        for (k, &a) in self.amplitude.iter().enumerate().skip(min_bin) {
            if a > 0.0 && best.is_none_or(|(_, b)| a > b) {
                best = Some((k, a));
            }
        }
        best.map(|(k, _)| k)
    }

    /// Frequency of a peak refined by parabolic interpolation of the log magnitude over bins
    /// `k-1, k, k+1` (a first estimate; a sine fit refines it further).
    pub fn interpolate_peak(&self, k: usize) -> f64 {
        if k == 0 || k + 1 >= self.amplitude.len() {
            return self.freq_of(k);
        }
        let (a, b, c) = (
            self.amplitude[k - 1],
            self.amplitude[k],
            self.amplitude[k + 1],
        );
        if a <= 0.0 || b <= 0.0 || c <= 0.0 {
            return self.freq_of(k);
        }
        let (la, lb, lc) = (a.ln(), b.ln(), c.ln());
        let denom = la - 2.0 * lb + lc;
        let delta = if denom.abs() > 0.0 {
            0.5 * (la - lc) / denom
        } else {
            0.0
        };
        (k as f64 + delta.clamp(-0.5, 0.5)) * self.bin_hz
    }
}

/// A capture plan: how many samples to analyse and whether the tones are coherent.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Capture {
    /// Number of samples `N` to analyse (the last `N` of the record).
    pub len: usize,
    /// Cycles of the first tone in the capture, `freq * N / rate`.
    pub cycles: f64,
    /// Whether every tone is within [`COHERENCE_TOLERANCE_CYCLES`] of an integer number of
    /// cycles (then the rectangular window is leakage-free).
    pub coherent: bool,
    /// Whether, for a coherent capture, the first tone's cycle count `M` is odd and coprime
    /// with `N` (every sample then sits at a distinct phase; harmonics and their aliases
    /// land on distinct bins). `false` when not coherent.
    pub coprime: bool,
}

fn gcd(mut a: u64, mut b: u64) -> u64 {
    while b != 0 {
        let t = a % b;
        a = b;
        b = t;
    }
    a
}

fn is_coherent(freq: f64, n: usize, rate: f64) -> bool {
    let m = freq * n as f64 / rate;
    m >= 1.0 && m < n as f64 / 2.0 && (m - m.round()).abs() <= COHERENCE_TOLERANCE_CYCLES
}

/// Choose a capture length for tones `freqs` (Hz) at `rate` from `available` samples.
///
/// Rule: the largest `N <= available` (and `N >= min_len`) for which every tone is coherent,
/// `freq = M rate / N` with `M` an integer; if there is none, `N = available` and the
/// capture is not coherent (use a low-sidelobe window). Any `N` is fine for realfft.
pub fn choose_capture(
    rate: f64,
    freqs: &[f64],
    available: usize,
    min_len: usize,
) -> Result<Capture, AnalysisError> {
    check_rate(rate)?;
    let first = match freqs.first() {
        Some(f) => *f,
        None => {
            return Err(AnalysisError::BadSetting {
                what: "tone frequencies",
                expected: "at least one tone frequency".into(),
            })
        }
    };
    for &f in freqs {
        check_freq("tone frequency", f, rate)?;
    }
    if available < min_len.max(2) {
        return Err(AnalysisError::TooShort {
            what: "samples",
            got: available,
            need: min_len.max(2),
        });
    }
    let floor = min_len.max(2);
    let mut n = available;
    while n >= floor {
        if freqs.iter().all(|&f| is_coherent(f, n, rate)) {
            let m = (first * n as f64 / rate).round() as u64;
            return Ok(Capture {
                len: n,
                cycles: first * n as f64 / rate,
                coherent: true,
                coprime: m % 2 == 1 && gcd(m, n as u64) == 1,
            });
        }
        n -= 1;
    }
    Ok(Capture {
        len: available,
        cycles: first * available as f64 / rate,
        coherent: false,
        coprime: false,
    })
}

/// The coherent test-tone frequency nearest `near_hz` for an `n`-sample capture at `rate`:
/// `M rate / n` with `M` odd and coprime with `n` (so every sample falls at a distinct
/// phase and harmonics land on distinct bins, common practice for coherent sampling), and
/// `1 <= M < n / 2`. A generator producing it with exact integer phase `(M k mod n) / n`
/// gives a leakage-free rectangular-window capture.
pub fn coherent_frequency(rate: f64, n: usize, near_hz: f64) -> Result<f64, AnalysisError> {
    check_rate(rate)?;
    check_freq("tone frequency", near_hz, rate)?;
    if n < 8 {
        return Err(AnalysisError::TooShort {
            what: "capture",
            got: n,
            need: 8,
        });
    }
    let target = near_hz * n as f64 / rate;
    let top = (n as u64 - 1) / 2; // M < n/2
    let ok = |m: u64| m >= 1 && m <= top && m % 2 == 1 && gcd(m, n as u64) == 1;
    let centre = target.round().clamp(1.0, top as f64) as u64;
    for d in 0..=top {
        let (below, above) = (centre.checked_sub(d), centre + d);
        let pick = match (below.filter(|&m| ok(m)), ok(above).then_some(above)) {
            (Some(b), Some(a)) => {
                if (a as f64 - target).abs() < (target - b as f64).abs() {
                    Some(a)
                } else {
                    Some(b)
                }
            }
            (b, a) => b.or(a),
        };
        if let Some(m) = pick {
            return Ok(m as f64 * rate / n as f64);
        }
    }
    Err(AnalysisError::BadSetting {
        what: "capture length",
        expected: format!("a length with an odd cycle count coprime with it (got {n})"),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sine_on_and_off_bin_reads_its_amplitude() {
        // Parseval's theorem (any DSP text): the lobe power sum is independent of the
        // tone's position between bins for a window whose sidelobes are negligible.
        let rate = 48_000.0;
        let n = 4096;
        for (window, tol) in [
            (Window::BlackmanHarris7, 1e-9),
            (Window::BlackmanHarris4, 1e-4),
            (Window::FlatTop, 1e-4),
        ] {
            for bins in [100.0, 100.25, 100.5] {
                let f = bins * rate / n as f64;
                let x: Vec<f64> = (0..n)
                    .map(|i| 0.7 * (2.0 * std::f64::consts::PI * f * i as f64 / rate + 0.3).sin())
                    .collect();
                let s = Spectrum::compute(&x, rate, window).unwrap();
                let a = s.lobe_amplitude(f);
                assert!((a / 0.7 - 1.0).abs() < tol, "{} {bins}: {a}", window.name());
            }
        }
    }

    #[test]
    fn flat_top_peak_bin_reads_amplitude_between_bins() {
        // A flat-top window's purpose (D'Antona and Ferrero 2006): the highest bin reads the
        // amplitude within a few thousandths of a dB even half a bin off centre.
        let rate = 48_000.0;
        let n = 4096;
        let f = 200.5 * rate / n as f64;
        let x: Vec<f64> = (0..n)
            .map(|i| (2.0 * std::f64::consts::PI * f * i as f64 / rate).sin())
            .collect();
        let s = Spectrum::compute(&x, rate, Window::FlatTop).unwrap();
        let k = s.peak_bin(1).unwrap();
        let db = 20.0 * s.amplitude[k].log10();
        assert!(db.abs() < 0.02, "{db}");
    }

    #[test]
    fn capture_of_997_hz_at_48k() {
        // 997 is prime, so 997 Hz at 48 kHz is coherent only for N a multiple of 48000
        // (M = 997 k, common practice of AES17 test tones); M odd and coprime with N.
        let c = choose_capture(48_000.0, &[997.0], 100_000, 1024).unwrap();
        assert_eq!(c.len, 96_000);
        assert!(c.coherent);
        assert!((c.cycles - 1994.0).abs() < 1e-9);
        assert!(!c.coprime); // M = 1994 is even
        let c = choose_capture(48_000.0, &[997.0], 60_000, 1024).unwrap();
        assert_eq!(c.len, 48_000);
        assert!(c.coprime);
        let c = choose_capture(48_000.0, &[997.0], 40_000, 1024).unwrap();
        assert!(!c.coherent);
        assert_eq!(c.len, 40_000);
    }

    #[test]
    fn coherent_frequency_near_one_khz() {
        // N = 65536 = 2^16: any odd M is coprime; 1 kHz at 48 kHz is 1365.33 cycles, so
        // M = 1365 and f = 1365 * 48000 / 65536 Hz (coherent sampling, common practice).
        let f = coherent_frequency(48_000.0, 65_536, 1000.0).unwrap();
        assert_eq!(f, 1365.0 * 48_000.0 / 65_536.0);
        let c = choose_capture(48_000.0, &[f], 65_536, 1024).unwrap();
        assert!(c.coherent && c.coprime && c.len == 65_536);
        // N = 48000: 997 is prime and odd, so 997 Hz itself is chosen
        assert_eq!(coherent_frequency(48_000.0, 48_000, 997.2).unwrap(), 997.0);
        // 1000 is even; 999 = 3^3 * 37 shares the factor 3 with 48000 = 2^7 * 3 * 5^3;
        // 1001 = 7 * 11 * 13 is coprime, so M = 1001.
        assert_eq!(
            coherent_frequency(48_000.0, 48_000, 1000.0).unwrap(),
            1001.0
        );
    }

    #[test]
    fn bad_inputs_are_errors() {
        assert!(matches!(
            Spectrum::compute(&[0.0; 3], 48_000.0, Window::Rectangular),
            Err(AnalysisError::TooShort { .. })
        ));
        assert!(matches!(
            Spectrum::compute(&[0.0; 64], -1.0, Window::Rectangular),
            Err(AnalysisError::BadRate(_))
        ));
        let mut x = vec![0.0; 64];
        x[5] = f64::NAN;
        assert!(matches!(
            Spectrum::compute(&x, 48_000.0, Window::Rectangular),
            Err(AnalysisError::NotFinite { index: 5, .. })
        ));
        assert!(choose_capture(48_000.0, &[30_000.0], 1000, 16).is_err());
    }
}
