//! Integrated loudness of a mono signal per ITU-R BS.1770-4: K-weighting (a high-shelf
//! pre-filter and the RLB high-pass, both second order), mean square over 400 ms blocks
//! overlapping by 75 %, an absolute gate at -70 LKFS and a relative gate 10 LU below the
//! absolutely gated level.
//!
//! The two filters are designed for any rate from their analog parameters with the bilinear
//! transform (pre-warped at the filter frequency); at 48 kHz this reproduces the
//! coefficients tabulated in BS.1770 to about 1e-8.

use std::f64::consts::PI;

/// A second-order IIR section, direct form I, `a0 = 1`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Biquad {
    /// Feed-forward coefficients.
    pub b: [f64; 3],
    /// Feedback coefficients `a1`, `a2`.
    pub a: [f64; 2],
}

impl Biquad {
    /// Filter `x` into `y` (same length), starting from rest.
    pub fn run(&self, x: &[f64], y: &mut [f64]) {
        let (mut x1, mut x2, mut y1, mut y2) = (0.0, 0.0, 0.0, 0.0);
        for (xi, yi) in x.iter().zip(y.iter_mut()) {
            let v =
                self.b[0] * xi + self.b[1] * x1 + self.b[2] * x2 - self.a[0] * y1 - self.a[1] * y2;
            x2 = x1;
            x1 = *xi;
            y2 = y1;
            y1 = v;
            *yi = v;
        }
    }
}

/// The K-weighting stages at `rate` Hz: `[pre-filter (high shelf), RLB high-pass]`.
pub fn k_weighting(rate: f64) -> [Biquad; 2] {
    // Analog parameters of the two stages (they give the BS.1770 48 kHz table exactly).
    let (f0, gain_db, q) = (1681.974450955533, 3.999843853973347, 0.7071752369554196);
    let k = (PI * f0 / rate).tan();
    let vh = 10f64.powf(gain_db / 20.0);
    let vb = vh.powf(0.4996667741545416);
    let a0 = 1.0 + k / q + k * k;
    let shelf = Biquad {
        b: [
            (vh + vb * k / q + k * k) / a0,
            2.0 * (k * k - vh) / a0,
            (vh - vb * k / q + k * k) / a0,
        ],
        a: [2.0 * (k * k - 1.0) / a0, (1.0 - k / q + k * k) / a0],
    };
    let (f0, q) = (38.13547087602444, 0.5003270373238773);
    let k = (PI * f0 / rate).tan();
    let a0 = 1.0 + k / q + k * k;
    let hp = Biquad {
        b: [1.0, -2.0, 1.0],
        a: [2.0 * (k * k - 1.0) / a0, (1.0 - k / q + k * k) / a0],
    };
    [shelf, hp]
}

/// Integrated loudness in LKFS of `x` (in units of digital full scale, so a full-scale sine
/// has peak 1) at `rate` Hz, one channel (weight 1). `None` when the signal is shorter than
/// one 400 ms block or every block is gated out (silence).
pub fn integrated_lkfs(x: &[f64], rate: f64) -> Option<f64> {
    let [s1, s2] = k_weighting(rate);
    let mut a = vec![0.0; x.len()];
    let mut b = vec![0.0; x.len()];
    s1.run(x, &mut a);
    s2.run(&a, &mut b);
    let block = (0.4 * rate).round() as usize;
    let step = (0.1 * rate).round() as usize;
    if block == 0 || step == 0 || b.len() < block {
        return None;
    }
    let z: Vec<f64> = (0..=(b.len() - block) / step)
        .map(|j| {
            let s = &b[j * step..j * step + block];
            s.iter().map(|v| v * v).sum::<f64>() / block as f64
        })
        .collect();
    let lk = |z: f64| -0.691 + 10.0 * z.log10();
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    let abs: Vec<f64> = z.iter().copied().filter(|&z| lk(z) > -70.0).collect();
    if abs.is_empty() {
        return None;
    }
    let gate = lk(mean(&abs)) - 10.0;
    let rel: Vec<f64> = abs.into_iter().filter(|&z| lk(z) > gate).collect();
    if rel.is_empty() {
        return None;
    }
    Some(lk(mean(&rel)))
}
