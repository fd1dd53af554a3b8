//! Frequency weightings A and C of IEC 61672-1:2013, Annex E (closed forms), and a digital
//! A-weighting filter.
//!
//! `A(f) = 20 log10( f4^2 f^4 / ((f^2 + f1^2) sqrt(f^2 + f2^2) sqrt(f^2 + f3^2) (f^2 + f4^2)) ) - A1000`
//! with `A1000 = -2.000 dB`;
//! `C(f) = 20 log10( f4^2 f^2 / ((f^2 + f1^2)(f^2 + f4^2)) ) - C1000` with `C1000 = -0.062 dB`;
//! `f1 = 20.598997`, `f2 = 107.65265`, `f3 = 737.86223`, `f4 = 12194.217` Hz (IEC 61672-1,
//! equations E.1 to E.6 rounded as printed in the standard).
//!
//! Applied to spectra, the weighting multiplies each bin's amplitude by the linear gain at the
//! bin centre ([`Weighting::gain`]), exactly as an ideal analog weighting network would.
//!
//! [`AWeightingFilter`] is the bilinear transform (no pre-warping) of the analog A network,
//! built as six first-order sections. Bilinear warping maps analog `fa` to digital
//! `fd = (rate / pi) atan(pi fa / rate)`, so the error grows towards Nyquist;
//! [`AWeightingFilter::max_error_db`] states it for the rate in use. Measured largest error
//! from 10 Hz up to the given frequency:
//!
//! | rate | to 2 kHz | to 5 kHz | to 10 kHz | to 20 kHz |
//! |---|---|---|---|---|
//! | 44.1 kHz | 0.006 dB | 0.11 dB | 1.5 dB | 25 dB |
//! | 48 kHz | 0.005 dB | 0.09 dB | 1.2 dB | 16 dB |
//! | 96 kHz | 0.001 dB | 0.02 dB | 0.26 dB | 2.1 dB |
//! | 192 kHz | 0.001 dB | 0.006 dB | 0.06 dB | 0.47 dB |
//!
//! At 48 kHz the response still lies inside the IEC 61672-1 class 1 limits at every table
//! frequency (the upper-band limits are wide), but it is not an exact A-weighting above a few
//! kHz. For figures, prefer the spectral weighting, which is exact at every bin.

use rustfft::num_complex::Complex64;
use serde::{Deserialize, Serialize};

use super::spectrum::check_rate;
use super::AnalysisError;

/// IEC 61672-1 Annex E pole frequency f1, Hz.
pub const F1: f64 = 20.598_997;
/// IEC 61672-1 Annex E pole frequency f2, Hz.
pub const F2: f64 = 107.652_65;
/// IEC 61672-1 Annex E pole frequency f3, Hz.
pub const F3: f64 = 737.862_23;
/// IEC 61672-1 Annex E pole frequency f4, Hz.
pub const F4: f64 = 12_194.217;
/// IEC 61672-1 Annex E normalisation of A at 1 kHz, dB.
pub const A1000: f64 = -2.000;
/// IEC 61672-1 Annex E normalisation of C at 1 kHz, dB.
pub const C1000: f64 = -0.062;

/// Linear A-weighting gain at `f` Hz (0 at DC).
pub fn a_weight_gain(f: f64) -> f64 {
    let f2 = f * f;
    let num = F4 * F4 * f2 * f2;
    let den = (f2 + F1 * F1) * (f2 + F2 * F2).sqrt() * (f2 + F3 * F3).sqrt() * (f2 + F4 * F4);
    num / den * 10f64.powf(-A1000 / 20.0)
}

/// A-weighting at `f` Hz in dB (IEC 61672-1 eq. E.6); `-inf` at DC.
pub fn a_weight_db(f: f64) -> f64 {
    20.0 * a_weight_gain(f).log10()
}

/// Linear C-weighting gain at `f` Hz (0 at DC).
pub fn c_weight_gain(f: f64) -> f64 {
    let f2 = f * f;
    let num = F4 * F4 * f2;
    let den = (f2 + F1 * F1) * (f2 + F4 * F4);
    num / den * 10f64.powf(-C1000 / 20.0)
}

/// C-weighting at `f` Hz in dB (IEC 61672-1 eq. E.1); `-inf` at DC.
pub fn c_weight_db(f: f64) -> f64 {
    20.0 * c_weight_gain(f).log10()
}

/// A frequency weighting applied to a measurement.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Weighting {
    /// No weighting (gain 1 at every frequency).
    #[default]
    Flat,
    /// A-weighting, IEC 61672-1.
    A,
    /// C-weighting, IEC 61672-1.
    C,
}

impl Weighting {
    /// Linear gain at `f` Hz.
    pub fn gain(self, f: f64) -> f64 {
        match self {
            Weighting::Flat => 1.0,
            Weighting::A => a_weight_gain(f),
            Weighting::C => c_weight_gain(f),
        }
    }

    /// A short stable name (`"flat"`, `"A"`, `"C"`).
    pub fn name(self) -> &'static str {
        match self {
            Weighting::Flat => "flat",
            Weighting::A => "A",
            Weighting::C => "C",
        }
    }

    /// Multiply each bin of `spectrum` by the gain at its centre frequency.
    pub fn apply(self, spectrum: &mut super::spectrum::Spectrum) {
        let bin = spectrum.bin_hz;
        for (k, a) in spectrum.amplitude.iter_mut().enumerate() {
            *a *= self.gain(k as f64 * bin);
        }
    }
}

/// One first-order digital section `y = (b0 x + b1 x1 - a1 y1)` (already divided by `a0`).
#[derive(Debug, Clone, Copy, PartialEq)]
struct Section {
    b0: f64,
    b1: f64,
    a1: f64,
    x1: f64,
    y1: f64,
}

impl Section {
    /// Bilinear transform of `s / (s + w)` (`highpass`) or `w / (s + w)`, `K = 2 rate`.
    fn new(w: f64, k: f64, highpass: bool) -> Self {
        let a0 = k + w;
        let a1 = (w - k) / a0;
        let (b0, b1) = if highpass {
            (k / a0, -k / a0)
        } else {
            (w / a0, w / a0)
        };
        Section {
            b0,
            b1,
            a1,
            x1: 0.0,
            y1: 0.0,
        }
    }

    #[inline]
    fn tick(&mut self, x: f64) -> f64 {
        let y = self.b0 * x + self.b1 * self.x1 - self.a1 * self.y1;
        self.x1 = x;
        self.y1 = y;
        y
    }

    fn response(&self, z_inv: Complex64) -> Complex64 {
        (self.b0 + self.b1 * z_inv) / (1.0 + self.a1 * z_inv)
    }
}

/// Digital A-weighting filter: bilinear transform of the IEC 61672-1 analog network
/// `G s^4 / ((s + w1)^2 (s + w2)(s + w3)(s + w4)^2)`, `wi = 2 pi fi`, as six first-order
/// sections (four high-pass, two low-pass), normalised to 0 dB at 1 kHz at the given rate.
#[derive(Debug, Clone, PartialEq)]
pub struct AWeightingFilter {
    rate: f64,
    gain: f64,
    sections: [Section; 6],
}

impl AWeightingFilter {
    /// Design the filter for `rate` Hz.
    pub fn new(rate: f64) -> Result<Self, AnalysisError> {
        check_rate(rate)?;
        let k = 2.0 * rate;
        let w = |f: f64| 2.0 * std::f64::consts::PI * f;
        let sections = [
            Section::new(w(F1), k, true),
            Section::new(w(F1), k, true),
            Section::new(w(F2), k, true),
            Section::new(w(F3), k, true),
            Section::new(w(F4), k, false),
            Section::new(w(F4), k, false),
        ];
        let mut filter = AWeightingFilter {
            rate,
            gain: 1.0,
            sections,
        };
        if 1000.0 >= rate / 2.0 {
            return Err(AnalysisError::BadRate(rate));
        }
        let g1k = filter.response(1000.0).norm();
        filter.gain = 1.0 / g1k;
        Ok(filter)
    }

    /// Complex response at `f` Hz.
    fn response(&self, f: f64) -> Complex64 {
        let z_inv = Complex64::from_polar(1.0, -2.0 * std::f64::consts::PI * f / self.rate);
        self.sections
            .iter()
            .fold(Complex64::new(self.gain, 0.0), |acc, s| {
                acc * s.response(z_inv)
            })
    }

    /// Magnitude response at `f` Hz, dB.
    pub fn response_db(&self, f: f64) -> f64 {
        20.0 * self.response(f).norm().log10()
    }

    /// Largest |digital - IEC formula| in dB over 200 log-spaced points from 10 Hz to
    /// `f_max` Hz (clamped below Nyquist): the filter's stated accuracy at this rate.
    pub fn max_error_db(&self, f_max: f64) -> f64 {
        let top = f_max.min(0.499 * self.rate).max(10.0);
        let points = 200;
        (0..=points)
            .map(|i| {
                let f = 10.0 * (top / 10.0).powf(i as f64 / points as f64);
                (self.response_db(f) - a_weight_db(f)).abs()
            })
            .fold(0.0, f64::max)
    }

    /// Clear the state (no allocation).
    pub fn reset(&mut self) {
        for s in &mut self.sections {
            s.x1 = 0.0;
            s.y1 = 0.0;
        }
    }

    /// Filter `buf` in place.
    pub fn process(&mut self, buf: &mut [f64]) {
        for x in buf.iter_mut() {
            let mut y = *x * self.gain;
            for s in &mut self.sections {
                y = s.tick(y);
            }
            *x = y;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn one_khz_is_zero_db() {
        // IEC 61672-1 Annex E: A1000 and C1000 normalise both curves to 0 dB at 1 kHz
        // (to the printed 3 decimals of the normalisation constants).
        assert!(a_weight_db(1000.0).abs() < 0.001);
        assert!(c_weight_db(1000.0).abs() < 0.001);
    }

    #[test]
    fn filter_impulse_response_matches_its_transfer_function() {
        // Analytic z-domain response vs the FFT of the filter's own impulse response
        // (common practice; STYLE.md point 5).
        let rate = 48_000.0;
        let mut f = AWeightingFilter::new(rate).unwrap();
        let n = 1 << 16;
        let mut h = vec![0.0; n];
        h[0] = 1.0;
        f.process(&mut h);
        let s = super::super::spectrum::Spectrum::compute(
            &h,
            rate,
            super::super::window::Window::Rectangular,
        )
        .unwrap();
        for k in [100usize, 1365, 5000, 20000] {
            let freq = s.freq_of(k);
            // rectangular scaling is 2|X|/N; the impulse response's DFT is |X| itself.
            let mag = s.amplitude[k] * n as f64 / 2.0;
            let db = 20.0 * mag.log10();
            assert!((db - f.response_db(freq)).abs() < 1e-6, "{freq}: {db}");
        }
    }
}
