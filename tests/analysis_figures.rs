//! THD+N, SINAD/ENOB, SNR, IMD, level sweeps and the figures struct, against standards and
//! closed forms.

use std::f64::consts::PI;

use railsong::analysis::sweep::level_at_thd;
use railsong::analysis::{
    imd_smpte, imd_twin_tone, measure_output, snr, thd, thdn, Bandwidth, MeasureContext, Settings,
    SwingLimits, TestSignal, Window,
};

const RATE: f64 = 48_000.0;

/// Standard normal deviates from a fixed-seed generator (64-bit LCG + Box-Muller).
fn gaussian(n: usize, mut seed: u64) -> Vec<f64> {
    let mut next = move || {
        seed = seed
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((seed >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    };
    (0..n)
        .map(|_| {
            let (u1, u2) = (next(), next());
            (-2.0 * u1.ln()).sqrt() * (2.0 * PI * u2).cos()
        })
        .collect()
}

fn sine(f: f64, amp: f64, phase: f64, n: usize) -> Vec<f64> {
    (0..n)
        .map(|i| amp * (2.0 * PI * f * i as f64 / RATE + phase).sin())
        .collect()
}

fn db(x: f64) -> f64 {
    20.0 * x.log10()
}

#[test]
fn enob_of_ideal_16_bit_full_scale_sine() {
    // Ideal N-bit quantiser, full-scale sine: SNR = 6.02 N + 1.76 dB (IEEE Std 1241 /
    // CHECKS.md [S]), so ENOB = (SINAD - 1.76) / 6.02 = N. Full band (the converter figure),
    // 997 Hz at 48 kHz: coherent, M = 997 coprime with N = 48000, so the quantisation error
    // is spread over many bins. Full scale = 2^15 LSB peak.
    let bits = 16;
    let lsb = 1.0 / f64::from(1u32 << (bits - 1));
    let x: Vec<f64> = sine(997.0, 1.0 - lsb, 0.1, 48_000)
        .iter()
        .map(|v| (v / lsb).round() * lsb)
        .collect();
    let settings = Settings {
        bandwidth: Bandwidth::Full,
        ..Settings::default()
    };
    let r = thdn(&x, RATE, Some(997.0), &settings).unwrap();
    assert!(r.coherent);
    let expected_sinad = 6.02 * bits as f64 + 1.76;
    let expected_enob = (expected_sinad - 1.76) / 6.02;
    assert!(
        (r.enob - expected_enob).abs() < 0.1,
        "ENOB {} SINAD {}",
        r.enob,
        r.sinad_db
    );
    // a 12-bit quantiser reads 12 the same way
    let lsb12 = 1.0 / 2048.0;
    let x12: Vec<f64> = sine(997.0, 1.0 - lsb12, 0.1, 48_000)
        .iter()
        .map(|v| (v / lsb12).round() * lsb12)
        .collect();
    let r12 = thdn(&x12, RATE, Some(997.0), &settings).unwrap();
    assert!((r12.enob - 12.0).abs() < 0.1, "{}", r12.enob);
}

#[test]
fn thdn_of_sine_plus_white_noise_reads_the_noise() {
    // THD+N (AES17): residual after removing the fundamental, band-limited to 20 kHz, over
    // the signal. For a sine plus white noise the residual is the noise in the band: the
    // record's own noise variance times the band's share of 0..Nyquist (flat density).
    let n = 48_000;
    let sigma = 1e-3;
    let noise: Vec<f64> = gaussian(n, 99).iter().map(|v| v * sigma).collect();
    let var: f64 = noise.iter().map(|v| v * v).sum::<f64>() / n as f64;
    let band = (20_000.0 - 20.0) / (RATE / 2.0);
    let expect_res = (var * band).sqrt();
    for (f0, known) in [(997.0, true), (1003.3, true), (1003.3, false)] {
        let x: Vec<f64> = sine(f0, 1.0, 0.4, n)
            .iter()
            .zip(&noise)
            .map(|(s, v)| s + v)
            .collect();
        let r = thdn(&x, RATE, known.then_some(f0), &Settings::default()).unwrap();
        assert_eq!(r.bandwidth_hz, [20.0, 20_000.0]);
        assert!(
            (db(r.residual_rms_v / expect_res)).abs() < 0.2,
            "{f0} {known}: {} vs {expect_res}",
            r.residual_rms_v
        );
        // signal rms through the same band: the sine's 1/sqrt 2 plus in-band noise
        let expect_sig = (0.5 + var * band).sqrt();
        assert!((r.signal_rms_v / expect_sig - 1.0).abs() < 1e-3);
        assert!((r.thdn_db - db(expect_res / expect_sig)).abs() < 0.2);
        assert!((r.thdn_percent - 100.0 * r.thdn_ratio).abs() < 1e-12);
        // AES17 reference: SINAD is the whole in-band signal over the residual, -THD+N
        assert!((r.sinad_db - db(r.signal_rms_v / r.residual_rms_v)).abs() < 1e-9);
        assert!((r.sinad_db + r.thdn_db).abs() < 1e-9);
    }
}

#[test]
fn thdn_of_pure_sine_is_at_the_numerical_floor_and_sees_harmonics() {
    // A pure f64 sine leaves only rounding in the residual (IEEE 1057 fit is exact for a
    // sine); a -60 dBc harmonic then dominates THD+N at -60 dB (definition).
    let x = sine(997.0, 1.0, 0.0, 48_000);
    let r = thdn(&x, RATE, Some(997.0), &Settings::default()).unwrap();
    assert!(r.thdn_db < -250.0, "{}", r.thdn_db);
    let h: Vec<f64> = x
        .iter()
        .zip(sine(2.0 * 997.0, 1e-3, 0.3, 48_000))
        .map(|(a, b)| a + b)
        .collect();
    let r = thdn(&h, RATE, Some(997.0), &Settings::default()).unwrap();
    // residual = the harmonic; signal = sqrt(0.5 + 0.5e-6)
    let expect = db((0.5e-6f64).sqrt() / (0.5f64 + 0.5e-6).sqrt());
    assert!((r.thdn_db - expect).abs() < 1e-6, "{}", r.thdn_db);
    // band limit: a 21 kHz component is outside 20 Hz - 20 kHz
    let out: Vec<f64> = x
        .iter()
        .zip(sine(21_000.0, 1e-3, 0.0, 48_000))
        .map(|(a, b)| a + b)
        .collect();
    let r = thdn(&out, RATE, Some(997.0), &Settings::default()).unwrap();
    assert!(r.thdn_db < -250.0, "{}", r.thdn_db);
}

#[test]
fn snr_against_idle_render() {
    // SNR = signal rms over idle-render noise rms in the same band (AES17 practice). White
    // noise of known variance in 20 Hz - 20 kHz; the 1 V peak sine is 1/sqrt 2 V rms.
    let n = 65_536;
    let sigma = 1e-4;
    let idle: Vec<f64> = gaussian(n, 5).iter().map(|v| v * sigma).collect();
    let var: f64 = idle.iter().map(|v| v * v).sum::<f64>() / n as f64;
    let noise_rms = (var * (20_000.0 - 20.0) / (RATE / 2.0)).sqrt();
    let signal = sine(1001.7, 1.0, 0.0, n);
    let r = snr(&signal, &idle, RATE, None, &Settings::default()).unwrap();
    assert!((r.signal_rms_v * 2f64.sqrt() - 1.0).abs() < 1e-9);
    let expect = db(std::f64::consts::FRAC_1_SQRT_2 / noise_rms);
    assert!((r.snr_db - expect).abs() < 0.1, "{} vs {expect}", r.snr_db);
    // stated reference level
    let r2 = snr(&signal, &idle, RATE, Some(1.0), &Settings::default()).unwrap();
    assert!(r2.stated_reference);
    assert!((r2.snr_db - db(1.0 / noise_rms)).abs() < 0.1);
}

#[test]
fn smpte_sidebands_read_back() {
    // SMPTE RP120: 60 Hz + 7 kHz at 4:1, IMD = rss of fH +/- n fL (n = 1, 2) over the 7 kHz
    // amplitude. Known sidebands synthesised directly: each within 0.2 dB, on-bin
    // (coherent) and off-bin (7-term window).
    let n = 48_000;
    let side = [(-2.0, -72.0), (-1.0, -50.0), (1.0, -52.0), (2.0, -70.0)];
    for f_high in [7000.0, 7000.37] {
        let f_low = 60.0;
        let mut x = sine(f_low, 0.8, 0.0, n);
        for (v, h) in x.iter_mut().zip(sine(f_high, 0.2, 0.5, n)) {
            *v += h;
        }
        for (k, dbc) in side {
            let a = 0.2 * 10f64.powf(dbc / 20.0);
            for (v, s) in x.iter_mut().zip(sine(f_high + k * f_low, a, 1.0 + k, n)) {
                *v += s;
            }
        }
        let r = imd_smpte(&x, RATE, f_low, f_high, &Settings::default()).unwrap();
        assert_eq!(r.coherent, f_high == 7000.0);
        for (k, dbc) in side {
            let f = f_high + k * f_low;
            let got = r
                .sidebands
                .iter()
                .find(|p| (p.freq_hz - f).abs() < 1e-9)
                .unwrap();
            assert!((got.dbc - dbc).abs() < 0.2, "{f_high} {k}: {}", got.dbc);
        }
        let rss: f64 = side
            .iter()
            .map(|(_, d)| 10f64.powf(d / 10.0))
            .sum::<f64>()
            .sqrt();
        assert!((r.imd_db - db(rss)).abs() < 0.2);
        assert!((r.high_v - 0.2).abs() < 1e-6 && (r.low_v - 0.8).abs() < 1e-6);
    }
}

fn power_series(x: &[f64], a2: f64, a3: f64) -> Vec<f64> {
    x.iter().map(|&v| v + a2 * v * v + a3 * v * v * v).collect()
}

#[test]
fn power_series_products_match_closed_forms() {
    // y = x + a2 x^2 + a3 x^3 (CHECKS.md [D]): two tones A1 (low), A2 (high):
    // |f2 +/- f1| = a2 A1 A2, |f2 +/- 2 f1| = (3/4) a3 A1^2 A2; the high tone itself becomes
    // A2 + a3 (3/4 A2^3 + 3/2 A1^2 A2) (expanding sin^3 and sin^2 sin).
    let (a2, a3) = (0.02, -0.005);
    let n = 48_000;

    // SMPTE pair 60 Hz + 7 kHz at 4:1
    let (al, ah) = (0.8, 0.2);
    let x: Vec<f64> = sine(60.0, al, 0.0, n)
        .iter()
        .zip(sine(7000.0, ah, 0.3, n))
        .map(|(a, b)| a + b)
        .collect();
    let y = power_series(&x, a2, a3);
    let r = imd_smpte(&y, RATE, 60.0, 7000.0, &Settings::default()).unwrap();
    let high = ah + a3 * (0.75 * ah.powi(3) + 1.5 * al * al * ah);
    let s1 = a2 * al * ah;
    let s2 = 0.75 * a3.abs() * al * al * ah;
    assert!((r.high_v / high - 1.0).abs() < 1e-9);
    for p in &r.sidebands {
        let expect = if p.label.contains("1fL") { s1 } else { s2 };
        assert!((p.amplitude_v / expect - 1.0).abs() < 1e-6, "{}", p.label);
    }
    let expect_ratio = (2.0 * s1 * s1 + 2.0 * s2 * s2).sqrt() / high;
    assert!((r.imd_ratio / expect_ratio - 1.0).abs() < 1e-6);

    // twin tone 19 + 20 kHz at 1:1: f2 - f1 = a2 A1 A2, 2f1 - f2 = (3/4) a3 A1^2 A2,
    // 2f2 - f1 = (3/4) a3 A1 A2^2; d2 referred to 2 A(f2) (IEC 60268-3).
    let a = 0.5;
    let x: Vec<f64> = sine(19_000.0, a, 0.0, n)
        .iter()
        .zip(sine(20_000.0, a, 0.9, n))
        .map(|(p, q)| p + q)
        .collect();
    let y = power_series(&x, a2, a3);
    for window in [None, Some(Window::BlackmanHarris7)] {
        let settings = Settings {
            window,
            ..Settings::default()
        };
        let r = imd_twin_tone(&y, RATE, 19_000.0, 20_000.0, &settings).unwrap();
        let a2_meas = a + a3 * (0.75 * a * a * a + 1.5 * a * a * a);
        assert!((r.a2_v / a2_meas - 1.0).abs() < 1e-6);
        let d2 = a2 * a * a;
        assert!((r.d2.amplitude_v / d2 - 1.0).abs() < 1e-6);
        assert!((r.d2_ratio - d2 / (2.0 * a2_meas)).abs() < 1e-9);
        let d3 = 0.75 * a3.abs() * a * a * a;
        assert!((r.d3_low.amplitude_v / d3 - 1.0).abs() < 1e-6);
        let hi = r.d3_high.unwrap();
        assert!((hi.amplitude_v / d3 - 1.0).abs() < 1e-6);
        assert!((r.d3_low.dbc - db(d3 / a2_meas)).abs() < 1e-6);
        assert!(r.normalisation.contains("2 A(f2)"));
    }

    // single tone: HD2 = a2 A^2 / 2, HD3 = a3 A^3 / 4 (CHECKS.md [D])
    let amp = 2.0;
    let y = power_series(&sine(1000.0, amp, 0.0, n), a2, a3);
    let t = thd(&y, RATE, Some(1000.0), &Settings::default()).unwrap();
    let fund = amp + 0.75 * a3 * amp.powi(3);
    assert!((t.harmonics[0].amplitude_v - a2 * amp * amp / 2.0).abs() < 1e-12);
    assert!((t.harmonics[1].amplitude_v - a3.abs() * amp.powi(3) / 4.0).abs() < 1e-12);
    assert!((t.fundamental_v - fund).abs() < 1e-12);
}

#[test]
fn level_at_one_percent_thd_from_a_sweep() {
    // y = x + a3 x^3: THD = |a3| A^2 / 4 / (1 + 3/4 a3 A^2) (power series, CHECKS.md [D]);
    // with a3 = -0.01 the 1 % crossing solves 0.01 (1 + 3/4 a3 A^2) = |a3| A^2 / 4.
    let a3: f64 = -0.01;
    let exact = (0.01 / (a3.abs() / 4.0 - 0.01 * 0.75 * a3)).sqrt();
    let n = 48_000;
    let points: Vec<(f64, f64)> = (0..=18)
        .map(|i| {
            let amp = 0.5 * 10f64.powf(i as f64 / 20.0); // 1 dB steps from 0.5 V
            let y = power_series(&sine(997.0, amp, 0.0, n), 0.0, a3);
            let t = thd(&y, RATE, Some(997.0), &Settings::default()).unwrap();
            (amp, t.thd_percent)
        })
        .collect();
    let got = level_at_thd(&points, 1.0).unwrap();
    assert!((got / exact - 1.0).abs() < 0.002, "{got} vs {exact}");
    assert_eq!(level_at_thd(&points, 50.0), None);
}

#[test]
fn measure_output_fills_the_figures_that_apply() {
    // Figures for one output: names as the project's figures contract; a figure that does
    // not apply is JSON null, never 0 (project rule).
    let n = 96_000;
    let amp: f64 = 5.0;
    let a3 = -0.001;
    let clean = sine(997.0, amp, 0.0, n);
    let noise: Vec<f64> = gaussian(n, 3).iter().map(|v| v * 1e-5).collect();
    let y: Vec<f64> = power_series(&clean, 0.0, a3)
        .iter()
        .zip(&noise)
        .map(|(s, v)| s + v + 0.01)
        .collect();
    let ctx = MeasureContext {
        swing: Some(SwingLimits {
            pos: 10.5,
            neg: -10.5,
            centre: 0.0,
        }),
        full_scale_v: Some(12.0),
        idle: Some(&noise),
        test: TestSignal::Tone(997.0),
        ..MeasureContext::default()
    };
    let f = measure_output(&y, RATE, &ctx);
    assert!(f.notes.is_empty(), "{:?}", f.notes);
    let t = thd(&y, RATE, Some(997.0), &Settings::default()).unwrap();
    assert_eq!(f.thd_percent, Some(t.thd_percent));
    assert!((f.thd_db.unwrap() - db(f.thd_percent.unwrap() / 100.0)).abs() < 1e-9);
    // HD3 closed form: |a3| A^3 / 4 over A + 3/4 a3 A^3
    let hd3 = a3.abs() * amp.powi(3) / 4.0 / (amp + 0.75 * a3 * amp.powi(3));
    assert!((f.harmonics_dbc[1] - db(hd3)).abs() < 0.01);
    assert_eq!(f.harmonics_dbc.len(), 9);
    assert!((f.dc_v.unwrap() - 0.01).abs() < 1e-6);
    let peak = f.peak_v.unwrap();
    assert!((f.headroom_pos_db.unwrap() - db(10.5 / (peak))).abs() < 0.01);
    assert!(f.snr_db.unwrap() > 100.0);
    assert_eq!(f.window.as_deref(), Some("rectangular"));
    assert_eq!(f.fft_len, Some(96_000));
    assert_eq!(f.bandwidth_hz, Some([20.0, 20_000.0]));
    let json = serde_json::to_value(&f).unwrap();
    for key in [
        "fundamental_hz",
        "thd_percent",
        "thd_db",
        "thdn_db",
        "sinad_db",
        "enob",
        "snr_db",
        "peak_v",
        "rms_v",
        "dc_v",
        "headroom_pos_db",
        "headroom_neg_db",
        "harmonics_dbc",
    ] {
        assert!(
            json.get(key).is_some_and(|v| !v.is_null()),
            "{key} missing or null"
        );
    }
    assert!(json["imd_smpte_percent"].is_null());
    assert!(json["imd_ccif_db"].is_null());

    // an IMD test signal: THD does not apply
    let ctx = MeasureContext {
        test: TestSignal::Smpte {
            low: 60.0,
            high: 7000.0,
        },
        ..MeasureContext::default()
    };
    let x: Vec<f64> = sine(60.0, 0.8, 0.0, n)
        .iter()
        .zip(sine(7000.0, 0.2, 0.0, n))
        .map(|(a, b)| a + b)
        .collect();
    let f = measure_output(&power_series(&x, 0.01, 0.0), RATE, &ctx);
    assert_eq!(f.thd_percent, None);
    assert_eq!(f.snr_db, None);
    let expect = (2.0f64).sqrt() * 0.01 * 0.8 * 0.2 / 0.2;
    assert!((f.imd_smpte_percent.unwrap() - 100.0 * expect).abs() < 1e-6);
}

#[test]
fn capture_limit_and_bad_settings() {
    // The capture is the tail of the record, at most `max_capture` samples; within that the
    // longest coherent length is used (997 Hz at 48 kHz: multiples of 48000, AES17 tone).
    let x = sine(997.0, 1.0, 0.0, 150_000);
    let s = Settings {
        max_capture: 100_000,
        ..Settings::default()
    };
    let r = thd(&x, RATE, Some(997.0), &s).unwrap();
    assert!(r.coherent);
    assert_eq!(r.fft_len, 96_000);
    // a NaN band edge is an error naming the setting, not a silent full band
    let bad = Settings {
        bandwidth: Bandwidth::Band {
            lo: f64::NAN,
            hi: 20_000.0,
        },
        ..Settings::default()
    };
    let e = thdn(&x, RATE, Some(997.0), &bad).unwrap_err();
    assert!(e.to_string().contains("settings.bandwidth"), "{e}");
    // a fundamental inside the DC lobe cannot be separated from DC: 35 Hz in 4800 samples
    // is not coherent (7-term window, lobe half width 7 bins of 10 Hz = 70 Hz)
    let e = thd(&x[..4800], RATE, Some(35.0), &Settings::default()).unwrap_err();
    assert!(e.to_string().contains("fundamental"), "{e}");
}
