//! Log sweep against its closed-form instantaneous frequency; seeded Gaussian noise against
//! its statistics and, for pink noise, the 1/f slope.

use std::f64::consts::PI;

use railsong::model::{Source, Wave};
use railsong::signal::{generator, source_seed};
use rustfft::{num_complex::Complex64, FftPlanner};

fn source(name: &str, wave: Wave) -> Source {
    Source {
        name: name.into(),
        wave,
        offset: 0.0,
        start: 0.0,
        stop: None,
        envelope: None,
        r: 0.0,
    }
}

fn render(src: &Source, rate: f64, seed: u64, n: usize) -> Vec<f64> {
    let mut g = generator(src, rate, seed).expect("valid source");
    let mut out = vec![0.0; n];
    g.fill(&mut out);
    out
}

/// Rising zero crossings, linearly interpolated, in seconds.
fn rising_crossings(x: &[f64], fs: f64) -> Vec<f64> {
    let mut t = Vec::new();
    for i in 1..x.len() {
        if x[i - 1] < 0.0 && x[i] >= 0.0 {
            let frac = -x[i - 1] / (x[i] - x[i - 1]);
            t.push((i as f64 - 1.0 + frac) / fs);
        }
    }
    t
}

#[test]
fn log_sweep_follows_exponential_frequency_law() {
    // Exponential sweep (Farina, AES preprint 5093, 2000): f(t) = f0 (f1 / f0)^(t / T).
    // The frequency measured from successive rising zero crossings is the mean of f over the
    // cycle; for Delta t <= 10 ms and ln(f1/f0)/T = 3 /s that differs from f at the midpoint
    // by (3 Delta t)^2 / 24 < 4e-5 (series of sinh x / x), well inside the tolerance.
    let (f0, f1, big_t, fs) = (100.0, 2000.0, 1.0, 48_000.0);
    let src = source(
        "sweep",
        Wave::Sweep {
            from: f0,
            to: f1,
            amp: 1.0,
            duration: big_t,
        },
    );
    let n = (1.5 * fs) as usize;
    let x = render(&src, fs, 0, n);
    let cross = rising_crossings(&x, fs);
    let mut worst: f64 = 0.0;
    let mut checked = 0;
    for w in cross.windows(2) {
        let mid = 0.5 * (w[0] + w[1]);
        let measured = 1.0 / (w[1] - w[0]);
        let expect = if w[1] <= big_t {
            f0 * (f1 / f0).powf(mid / big_t)
        } else if w[0] >= big_t {
            f1
        } else {
            continue;
        };
        worst = worst.max((measured / expect - 1.0).abs());
        checked += 1;
    }
    println!("sweep: {checked} cycles checked, worst relative frequency error {worst:.2e}");
    assert!(checked > 1000);
    assert!(worst < 5e-4, "worst relative error {worst}");
    // The number of cycles in the sweep is the closed-form phase at T:
    // f0 T / ln(f1/f0) (f1/f0 - 1).
    let cycles = f0 * big_t / (f1 / f0).ln() * (f1 / f0 - 1.0);
    let in_sweep = cross.iter().filter(|&&t| t < big_t).count() as f64;
    assert!((in_sweep - cycles).abs() <= 1.0, "{in_sweep} vs {cycles}");
    // Phase-continuous hold: no step at T larger than one sample's slope at f1.
    let k = (big_t * fs) as usize;
    let max_step = 2.0 * PI * f1 / fs * 1.01;
    for i in k - 5..k + 5 {
        assert!(
            (x[i + 1] - x[i]).abs() < max_step,
            "{i}: {} {}",
            x[i],
            x[i + 1]
        );
    }
}

#[test]
fn noise_seeds_repeat_and_differ() {
    for pink in [false, true] {
        let a = source("hiss", Wave::Noise { pink, rms: 1.0 });
        let b = source("other", Wave::Noise { pink, rms: 1.0 });
        let x1 = render(&a, 48_000.0, 42, 4096);
        let x2 = render(&a, 48_000.0, 42, 4096);
        let y = render(&a, 48_000.0, 43, 4096);
        let z = render(&b, 48_000.0, 42, 4096);
        assert_eq!(x1, x2, "same seed and name repeat");
        assert_ne!(x1, y, "another seed differs");
        assert_ne!(x1, z, "another source name differs");
        // And they are not merely shifted copies: correlation near zero (pink noise has
        // fewer independent samples in 4096, so a wider bound).
        let corr: f64 = x1.iter().zip(&z).map(|(a, b)| a * b).sum::<f64>()
            / x1.iter().map(|a| a * a).sum::<f64>();
        let limit = if pink { 0.3 } else { 0.1 };
        assert!(corr.abs() < limit, "corr {corr}");
    }
    assert_ne!(source_seed(1, "a"), source_seed(1, "b"));
    assert_eq!(source_seed(1, "a"), source_seed(1, "a"));
}

#[test]
fn white_noise_is_gaussian_with_the_asked_rms() {
    // Sample statistics of a Gaussian (any statistics text): over n samples the RMS estimate
    // has relative standard deviation 1 / sqrt(2 n) (0.2 % here), the mean sigma / sqrt(n),
    // the kurtosis 3 with standard deviation sqrt(24 / n) (0.014). Bounds are 5 sigma.
    let n = 1 << 17;
    let rms = 0.7;
    let x = render(
        &source("w", Wave::Noise { pink: false, rms }),
        96_000.0,
        9,
        n,
    );
    let nf = n as f64;
    let mean = x.iter().sum::<f64>() / nf;
    let var = x.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / nf;
    let m4 = x.iter().map(|v| (v - mean).powi(4)).sum::<f64>() / nf;
    let measured = (x.iter().map(|v| v * v).sum::<f64>() / nf).sqrt();
    println!(
        "white: rms {measured:.5} (asked {rms}), mean {mean:.2e}, kurtosis {:.3}",
        m4 / (var * var)
    );
    assert!((measured / rms - 1.0).abs() < 5.0 / (2.0 * nf).sqrt());
    assert!(mean.abs() < 5.0 * rms / nf.sqrt());
    assert!((m4 / (var * var) - 3.0).abs() < 5.0 * (24.0 / nf).sqrt());
}

/// Welch power spectral density (Hann window, 50 % overlap), one value per bin.
fn welch(x: &[f64], nfft: usize) -> Vec<f64> {
    let win: Vec<f64> = (0..nfft)
        .map(|i| 0.5 - 0.5 * (2.0 * PI * i as f64 / nfft as f64).cos())
        .collect();
    let fft = FftPlanner::new().plan_fft_forward(nfft);
    let mut acc = vec![0.0; nfft / 2 + 1];
    let mut buf = vec![Complex64::new(0.0, 0.0); nfft];
    let mut segs = 0;
    let mut at = 0;
    while at + nfft <= x.len() {
        for i in 0..nfft {
            buf[i] = Complex64::new(x[at + i] * win[i], 0.0);
        }
        fft.process(&mut buf);
        for k in 0..acc.len() {
            acc[k] += buf[k].norm_sqr();
        }
        segs += 1;
        at += nfft / 2;
    }
    acc.iter().map(|v| v / segs as f64).collect()
}

#[test]
fn pink_noise_falls_ten_db_per_decade() {
    // 1/f power spectrum: -10 dB/decade = -3.01 dB/octave (definition of pink noise).
    // Band-averaged Welch PSD in 15 equal log bands from 50 Hz to 10 kHz, a least-squares line
    // through (log10 f, dB): slope within 0.5 dB/decade of -10, and every band within 1 dB of
    // the ideal -10 dB/decade line through the same mean.
    let fs = 48_000.0;
    let rms = 1.0;
    let n = 1 << 20;
    let x = render(&source("pink", Wave::Noise { pink: true, rms }), fs, 3, n);
    let measured = (x.iter().map(|v| v * v).sum::<f64>() / n as f64).sqrt();
    println!("pink: rms {measured:.4} (asked {rms})");
    assert!((measured / rms - 1.0).abs() < 0.03);
    let nfft = 8192;
    let psd = welch(&x, nfft);
    let df = fs / nfft as f64;
    let (lo, hi, bands) = (50.0f64, 10_000.0f64, 15);
    let r = (hi / lo).powf(1.0 / bands as f64);
    let mut pts = Vec::new();
    for b in 0..bands {
        let (a, z) = (lo * r.powi(b), lo * r.powi(b + 1));
        let bins: Vec<f64> = (0..psd.len())
            .filter(|&k| {
                let f = k as f64 * df;
                f >= a && f < z
            })
            .map(|k| psd[k])
            .collect();
        let mean = bins.iter().sum::<f64>() / bins.len() as f64;
        pts.push(((a * z).sqrt().log10(), 10.0 * mean.log10()));
    }
    let m = pts.len() as f64;
    let (sx, sy) = pts.iter().fold((0.0, 0.0), |(a, b), p| (a + p.0, b + p.1));
    let (mx, my) = (sx / m, sy / m);
    let sxy: f64 = pts.iter().map(|p| (p.0 - mx) * (p.1 - my)).sum();
    let sxx: f64 = pts.iter().map(|p| (p.0 - mx).powi(2)).sum();
    let slope = sxy / sxx;
    let worst = pts
        .iter()
        .map(|p| (p.1 - (my - 10.0 * (p.0 - mx))).abs())
        .fold(0.0f64, f64::max);
    println!(
        "pink: slope {slope:.3} dB/decade, worst band deviation from -10 dB/decade {worst:.3} dB"
    );
    assert!((slope + 10.0).abs() < 0.5, "slope {slope}");
    assert!(worst < 1.0, "deviation {worst} dB");
}

#[test]
fn pink_noise_rms_at_other_rates() {
    // The RMS is set over the full band at whatever rate the generator runs.
    for fs in [44_100.0, 192_000.0] {
        let n = 1 << 19;
        let x = render(
            &source(
                "p",
                Wave::Noise {
                    pink: true,
                    rms: 0.2,
                },
            ),
            fs,
            5,
            n,
        );
        let measured = (x.iter().map(|v| v * v).sum::<f64>() / n as f64).sqrt();
        println!("pink at {fs} Hz: rms {measured:.4}");
        assert!((measured / 0.2 - 1.0).abs() < 0.05);
    }
}
