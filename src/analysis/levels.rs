//! Levels: peak, RMS, crest factor, DC, headroom to each rail, and unit conversions.
//!
//! Definitions (over every sample of the record given):
//! - `dc_v` = mean; `rms_v` = sqrt(mean of x^2) (includes DC); `ac_rms_v` = RMS about the mean;
//! - `peak_pos_v` = max x, `peak_neg_v` = min x, `peak_v` = max |x|;
//! - crest factor `crest_db = 20 log10(peak_v / rms_v)` (3.01 dB for a sine);
//! - headroom to each rail, against swing limits `pos` and `neg` (absolute voltages the
//!   output can reach: rail minus its output drop) and a reference `centre` (0 V for a split
//!   supply, the bias point for a single supply):
//!   `headroom_pos_db = 20 log10((pos - centre) / (peak_pos_v - centre))`,
//!   `headroom_neg_db = 20 log10((centre - neg) / (centre - peak_neg_v))`:
//!   how much the excursion on that side could grow before it reaches the limit (negative
//!   when it already exceeds it). `None` when the signal never leaves the centre on that side
//!   or the limit is not beyond the centre.
//!
//! Conversions: 0 dBu = sqrt(0.6) V rms = 0.7746 V (1 mW into 600 ohm); 0 dBV = 1 V rms;
//! dBFS with the sine-peak convention (AES17): a sine whose peak equals the full-scale
//! voltage is 0 dBFS, so `peak_dbfs = 20 log10(peak / fs)` and
//! `rms_dbfs = 20 log10(sqrt 2 rms / fs)`.

use serde::{Deserialize, Serialize};

use super::spectrum::check_samples;
use super::AnalysisError;

/// 0 dBu in V rms: sqrt(0.6) (1 mW into 600 ohm).
pub const DBU_REF_V: f64 = 0.774_596_669_241_483_4;

/// Peak, RMS and DC of a record.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Levels {
    /// Largest |x|, V.
    pub peak_v: f64,
    /// Largest x, V.
    pub peak_pos_v: f64,
    /// Smallest x, V.
    pub peak_neg_v: f64,
    /// RMS including DC, V.
    pub rms_v: f64,
    /// RMS about the mean, V.
    pub ac_rms_v: f64,
    /// Mean (DC offset), V.
    pub dc_v: f64,
    /// Crest factor `20 log10(peak / rms)`, dB; `None` for an all-zero record.
    pub crest_db: Option<f64>,
}

/// The output swing limits and the centre that headroom is measured from.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct SwingLimits {
    /// Highest reachable output voltage, V (positive rail minus output drop).
    pub pos: f64,
    /// Lowest reachable output voltage, V (negative rail plus output drop).
    pub neg: f64,
    /// Reference voltage excursions are measured from, V (0 for a split supply).
    pub centre: f64,
}

/// Levels of `samples` (at least one finite sample).
pub fn levels(samples: &[f64]) -> Result<Levels, AnalysisError> {
    check_samples("samples", samples, 1)?;
    let n = samples.len() as f64;
    let mut max = f64::NEG_INFINITY;
    let mut min = f64::INFINITY;
    let mut sum = 0.0;
    let mut sum2 = 0.0;
    for &x in samples {
        max = max.max(x);
        min = min.min(x);
        sum += x;
        sum2 += x * x;
    }
    let dc = sum / n;
    let rms = (sum2 / n).sqrt();
    let ac_ms: f64 = samples.iter().map(|x| (x - dc) * (x - dc)).sum::<f64>() / n;
    let peak = max.abs().max(min.abs());
    Ok(Levels {
        peak_v: peak,
        peak_pos_v: max,
        peak_neg_v: min,
        rms_v: rms,
        ac_rms_v: ac_ms.sqrt(),
        dc_v: dc,
        crest_db: if rms > 0.0 {
            Some(20.0 * (peak / rms).log10())
        } else {
            None
        },
    })
}

/// Headroom to the positive and negative limit, dB (see module docs).
pub fn headroom_db(levels: &Levels, limits: &SwingLimits) -> (Option<f64>, Option<f64>) {
    let ratio = |room: f64, excursion: f64| {
        if room > 0.0 && excursion > 0.0 {
            Some(20.0 * (room / excursion).log10())
        } else {
            None
        }
    };
    (
        ratio(
            limits.pos - limits.centre,
            levels.peak_pos_v - limits.centre,
        ),
        ratio(
            limits.centre - limits.neg,
            limits.centre - levels.peak_neg_v,
        ),
    )
}

/// V rms to dBu.
pub fn v_to_dbu(v_rms: f64) -> f64 {
    20.0 * (v_rms / DBU_REF_V).log10()
}

/// dBu to V rms.
pub fn dbu_to_v(dbu: f64) -> f64 {
    DBU_REF_V * 10f64.powf(dbu / 20.0)
}

/// V rms to dBV.
pub fn v_to_dbv(v_rms: f64) -> f64 {
    20.0 * v_rms.log10()
}

/// dBV to V rms.
pub fn dbv_to_v(dbv: f64) -> f64 {
    10f64.powf(dbv / 20.0)
}

/// A peak voltage in dBFS, `full_scale_v` being the peak of a full-scale sine.
pub fn peak_to_dbfs(v_peak: f64, full_scale_v: f64) -> f64 {
    20.0 * (v_peak / full_scale_v).log10()
}

/// An RMS voltage in dBFS, sine-peak convention: `20 log10(sqrt 2 v_rms / full_scale_v)`.
pub fn rms_to_dbfs(v_rms: f64, full_scale_v: f64) -> f64 {
    20.0 * (std::f64::consts::SQRT_2 * v_rms / full_scale_v).log10()
}

/// dBFS (sine-peak convention) to the sine's peak voltage.
pub fn dbfs_to_peak(dbfs: f64, full_scale_v: f64) -> f64 {
    full_scale_v * 10f64.powf(dbfs / 20.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sine_levels() {
        // A sine: rms = peak / sqrt 2, crest factor 20 log10 sqrt 2 = 3.0103 dB (any
        // circuits text).
        let n = 48_000;
        let x: Vec<f64> = (0..n)
            .map(|i| 0.25 + 5.0 * (2.0 * std::f64::consts::PI * 100.0 * i as f64 / n as f64).sin())
            .collect();
        let l = levels(&x).unwrap();
        assert!((l.dc_v - 0.25).abs() < 1e-12);
        assert!((l.ac_rms_v - 5.0 / 2f64.sqrt()).abs() < 1e-12);
        assert!((l.peak_pos_v - 5.25).abs() < 1e-9);
        assert!((l.peak_neg_v + 4.75).abs() < 1e-9);
        let lim = SwingLimits {
            pos: 10.5,
            neg: -9.5,
            centre: 0.0,
        };
        let (p, m) = headroom_db(&l, &lim);
        assert!((p.unwrap() - 20.0 * 2f64.log10()).abs() < 1e-9);
        assert!((m.unwrap() - 20.0 * 2f64.log10()).abs() < 1e-9);
    }

    #[test]
    fn conversions() {
        // 0 dBu = sqrt(0.6) V = 0.7746 V; +4 dBu = 1.228 V (common practice);
        // -10 dBV = 0.3162 V.
        assert!((dbu_to_v(0.0) - 0.6f64.sqrt()).abs() < 1e-15);
        assert!((dbu_to_v(4.0) - 1.228).abs() < 5e-4);
        assert!((v_to_dbu(dbu_to_v(-7.3)) + 7.3).abs() < 1e-12);
        assert!((dbv_to_v(-10.0) - 0.316_227_766).abs() < 1e-9);
        assert!((v_to_dbv(1.0)).abs() < 1e-15);
        // AES17 sine-peak convention: a full-scale sine is 0 dBFS both by peak and by rms.
        assert!(rms_to_dbfs(10.0 / 2f64.sqrt(), 10.0).abs() < 1e-12);
        assert!((peak_to_dbfs(5.0, 10.0) + 6.0206).abs() < 1e-4);
        assert!((dbfs_to_peak(-6.0206, 10.0) - 5.0).abs() < 1e-4);
    }
}
