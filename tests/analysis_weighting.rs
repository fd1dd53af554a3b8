//! A- and C-weighting against IEC 61672-1, and weighted noise against the integrated curve.

use railsong::analysis::weighting::{a_weight_gain, c_weight_db};
use railsong::analysis::{
    a_weight_db, band_rms, AWeightingFilter, Bandwidth, Settings, Weighting, Window,
};

/// IEC 61672-1 (2002) Table 2, A-weighting at the nominal one-third-octave frequencies
/// 10 Hz .. 20 kHz (index n = -20..=13, exact frequency 1000 * 10^(n/10) Hz), and the class 1
/// tolerance limits (upper, lower; `None` = minus infinity).
/// Sources: the values at 31.5, 63, 125, 250, 500, 1k, 2k, 4k, 8k, 16k Hz and at 10 Hz and
/// 20 kHz, and their class 1 tolerances, are as stated in CHECKS.md [S]; the other values and
/// tolerances are from memory (they are checked below against the Annex E formula, which the
/// table is generated from, so a misremembered value would fail).
const TABLE: [(f64, f64, f64, Option<f64>); 34] = [
    (10.0, -70.4, 3.5, None),
    (12.5, -63.4, 3.0, None),
    (16.0, -56.7, 2.5, Some(4.5)),
    (20.0, -50.5, 2.5, Some(2.5)),
    (25.0, -44.7, 2.0, Some(2.0)),
    (31.5, -39.4, 2.0, Some(2.0)),
    (40.0, -34.6, 1.5, Some(1.5)),
    (50.0, -30.2, 1.5, Some(1.5)),
    (63.0, -26.2, 1.5, Some(1.5)),
    (80.0, -22.5, 1.5, Some(1.5)),
    (100.0, -19.1, 1.5, Some(1.5)),
    (125.0, -16.1, 1.5, Some(1.5)),
    (160.0, -13.4, 1.5, Some(1.5)),
    (200.0, -10.9, 1.5, Some(1.5)),
    (250.0, -8.6, 1.4, Some(1.4)),
    (315.0, -6.6, 1.4, Some(1.4)),
    (400.0, -4.8, 1.4, Some(1.4)),
    (500.0, -3.2, 1.4, Some(1.4)),
    (630.0, -1.9, 1.4, Some(1.4)),
    (800.0, -0.8, 1.4, Some(1.4)),
    (1000.0, 0.0, 1.1, Some(1.1)),
    (1250.0, 0.6, 1.4, Some(1.4)),
    (1600.0, 1.0, 1.6, Some(1.6)),
    (2000.0, 1.2, 1.6, Some(1.6)),
    (2500.0, 1.3, 1.6, Some(1.6)),
    (3150.0, 1.2, 1.6, Some(1.6)),
    (4000.0, 1.0, 1.6, Some(1.6)),
    (5000.0, 0.5, 2.1, Some(2.1)),
    (6300.0, -0.1, 2.1, Some(2.6)),
    (8000.0, -1.1, 2.1, Some(3.1)),
    (10000.0, -2.5, 2.6, Some(3.6)),
    (12500.0, -4.3, 3.0, Some(6.0)),
    (16000.0, -6.6, 3.5, Some(17.0)),
    (20000.0, -9.3, 4.0, None),
];

/// Exact frequency of table row `i` (n = i - 20): 1000 * 10^(n/10) Hz (IEC 61672-1).
fn exact(i: usize) -> f64 {
    1000.0 * 10f64.powf((i as f64 - 20.0) / 10.0)
}

fn within(got: f64, table: f64, up: f64, down: Option<f64>) -> bool {
    got <= table + up && down.is_none_or(|d| got >= table - d)
}

#[test]
fn a_weighting_formula_matches_table_rounding() {
    // IEC 61672-1: the tabulated values are the Annex E formula at the exact frequencies,
    // rounded to 0.1 dB, so the formula is within 0.05 dB (+ the 3-decimal A1000) of each.
    for (i, &(nominal, table, up, down)) in TABLE.iter().enumerate() {
        let f = exact(i);
        assert!((f / nominal - 1.0).abs() < 0.03, "{nominal}");
        let a = a_weight_db(f);
        assert!((a - table).abs() <= 0.0505, "{nominal} Hz: {a} vs {table}");
        assert!(within(a, table, up, down), "{nominal} Hz: class 1");
    }
    // 0.0 dB at 1 kHz within 0.05 dB (A1000 normalisation).
    assert!(a_weight_db(1000.0).abs() < 0.05);
    // CHECKS.md trap: at the nominal 16000 Hz instead of 15848.9 Hz the formula gives -6.71.
    assert!((a_weight_db(16_000.0) + 6.71).abs() < 0.005);
}

#[test]
fn c_weighting_formula_matches_table_rounding() {
    // IEC 61672-1 Table 2 C-weighting values as given in CHECKS.md [S].
    let c_table = [
        (-15, -3.0),
        (-12, -0.8),
        (-9, -0.2),
        (-6, 0.0),
        (-3, 0.0),
        (0, 0.0),
        (3, -0.2),
        (6, -0.8),
        (9, -3.0),
        (12, -8.5),
    ];
    for (n, table) in c_table {
        let f = 1000.0 * 10f64.powf(n as f64 / 10.0);
        let c = c_weight_db(f);
        assert!((c - table).abs() <= 0.0505, "{f} Hz: {c} vs {table}");
    }
}

#[test]
fn digital_a_filter_meets_class_1_at_48k_and_states_its_error() {
    // The bilinear A-weighting filter, evaluated from its own transfer function (checked
    // against its impulse response in a unit test), against the IEC 61672-1 class 1 limits
    // at every table frequency: at 48 kHz warping pushes 16 kHz towards -15.5 dB, still
    // inside the -17 dB lower limit.
    for rate in [48_000.0, 96_000.0] {
        let f = AWeightingFilter::new(rate).unwrap();
        for (i, &(nominal, table, up, down)) in TABLE.iter().enumerate() {
            let got = f.response_db(exact(i));
            assert!(
                within(got, table, up, down),
                "{rate} Hz rate, {nominal} Hz: {got} vs {table}"
            );
        }
    }
    // The stated accuracy: error grows towards Nyquist. Bilinear warping maps analog fa to
    // digital fd = (rate/pi) atan(pi fa / rate) (any DSP text): at 48 kHz a 10 kHz reading
    // comes from the analog curve at 11.74 kHz, where A is about 1.2 dB lower (formula), so
    // the filter is good to 0.01 dB only below about 2 kHz; at 192 kHz it holds 0.1 dB to
    // 10 kHz. These are the accuracies the module docs state.
    let f48 = AWeightingFilter::new(48_000.0).unwrap();
    let warped =
        48_000.0 / std::f64::consts::PI * (std::f64::consts::PI * 10_000.0 / 48_000.0).tan();
    let warp_err = a_weight_db(10_000.0) - a_weight_db(warped);
    assert!((f48.response_db(10_000.0) - a_weight_db(10_000.0) + warp_err).abs() < 0.05);
    assert!(
        f48.max_error_db(2000.0) < 0.01,
        "{}",
        f48.max_error_db(2000.0)
    );
    assert!(f48.max_error_db(5000.0) < 0.1);
    let f192 = AWeightingFilter::new(192_000.0).unwrap();
    assert!(
        f192.max_error_db(10_000.0) < 0.1,
        "{}",
        f192.max_error_db(10_000.0)
    );
}

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
            (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
        })
        .collect()
}

#[test]
fn white_noise_a_weighted_vs_flat_matches_integrated_curve() {
    // White noise has a flat power density, so the A-weighted to flat power ratio over
    // 20 Hz - 20 kHz is (1/(f_hi - f_lo)) * integral of A(f)^2 df (IEC 61672-1 curve,
    // integrated here by Simpson's rule). CHECKS.md states about -2.05 dB [D].
    let (lo, hi) = (20.0, 20_000.0);
    let steps = 200_000;
    let h = (hi - lo) / steps as f64;
    let mut integral = 0.0;
    for i in 0..=steps {
        let f = lo + i as f64 * h;
        let g = a_weight_gain(f);
        let wgt = if i == 0 || i == steps {
            1.0
        } else if i % 2 == 1 {
            4.0
        } else {
            2.0
        };
        integral += wgt * g * g;
    }
    integral *= h / 3.0;
    let expected_db = 10.0 * (integral / (hi - lo)).log10();
    assert!((expected_db + 2.05).abs() < 0.01, "{expected_db}");

    let rate = 48_000.0;
    let x = gaussian(1 << 20, 7);
    let flat = Settings {
        window: Some(Window::BlackmanHarris7),
        bandwidth: Bandwidth::Band { lo, hi },
        ..Settings::default()
    };
    let aw = Settings {
        weighting: Weighting::A,
        ..flat
    };
    let f = band_rms(&x, rate, &flat).unwrap();
    let a = band_rms(&x, rate, &aw).unwrap();
    let measured_db = 20.0 * (a.rms_v / f.rms_v).log10();
    assert!(
        (measured_db - expected_db).abs() < 0.05,
        "{measured_db} vs {expected_db}"
    );
    // the flat reading itself: unit-variance noise in 19.98 kHz of a 24 kHz band
    let expect_flat = ((hi - lo) / (rate / 2.0)).sqrt();
    assert!((20.0 * (f.rms_v / expect_flat).log10()).abs() < 0.05);
}

#[test]
fn digital_a_filter_on_noise_matches_its_response_and_the_curve() {
    // Filtering white noise scales its power by (1/B) * integral of |H(f)|^2 over the band
    // (any DSP text); the filter's |H| is its stated response (checked against its impulse
    // response in a unit test). At 192 kHz that response is within 0.5 dB of the IEC curve
    // to 20 kHz, and the A-weighted to flat ratio over 20 Hz - 20 kHz stays within 0.05 dB
    // of the spectral weighting.
    let rate = 192_000.0;
    let x = gaussian(1 << 20, 11);
    let mut y = x.clone();
    let mut filt = AWeightingFilter::new(rate).unwrap();
    filt.process(&mut y);
    let flat = Settings {
        window: Some(Window::BlackmanHarris7),
        bandwidth: Bandwidth::Band {
            lo: 20.0,
            hi: 20_000.0,
        },
        ..Settings::default()
    };
    let spectral = Settings {
        weighting: Weighting::A,
        ..flat
    };
    let reference = band_rms(&x, rate, &flat).unwrap().rms_v;
    let through_filter = band_rms(&y, rate, &flat).unwrap().rms_v;
    let spectral_a = band_rms(&x, rate, &spectral).unwrap().rms_v;
    // integral of the filter's own |H|^2 by the midpoint rule on 1 Hz steps
    let (mut num, mut den) = (0.0, 0.0);
    let mut f = 20.5;
    while f < 20_000.0 {
        num += 10f64.powf(filt.response_db(f) / 10.0);
        den += 1.0;
        f += 1.0;
    }
    let expect_filter_db = 10.0 * (num / den).log10();
    let got_filter_db = 20.0 * (through_filter / reference).log10();
    assert!(
        (got_filter_db - expect_filter_db).abs() < 0.05,
        "{got_filter_db} vs {expect_filter_db}"
    );
    let spectral_db = 20.0 * (spectral_a / reference).log10();
    assert!(
        (got_filter_db - spectral_db).abs() < 0.05,
        "{got_filter_db} vs {spectral_db}"
    );
    assert!(filt.max_error_db(20_000.0) < 0.5);
}
