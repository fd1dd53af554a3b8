//! ITU-R BS.1770 K-weighting and integrated loudness (`railsong::study::loudness`).

use railsong::study::loudness::{integrated_lkfs, k_weighting};

// ITU-R BS.1770-4, tables 1 and 2: the 48 kHz coefficients of the pre-filter and of the RLB
// high-pass (values of the standard's tables, from memory).
#[test]
fn coefficients_at_48k_match_the_standard_tables() {
    let [shelf, hp] = k_weighting(48_000.0);
    let b1 = [1.53512485958697, -2.69169618940638, 1.19839281085285];
    let a1 = [-1.69065929318241, 0.73248077421585];
    let a2 = [-1.99004745483398, 0.99007225036621];
    for (g, w) in shelf.b.iter().zip(&b1) {
        assert!((g - w).abs() < 1e-7, "{g} vs {w}");
    }
    for (g, w) in shelf.a.iter().zip(&a1) {
        assert!((g - w).abs() < 1e-7, "{g} vs {w}");
    }
    assert_eq!(hp.b, [1.0, -2.0, 1.0]);
    for (g, w) in hp.a.iter().zip(&a2) {
        assert!((g - w).abs() < 1e-7, "{g} vs {w}");
    }
}

// BS.1770-4: a 0 dBFS 997 Hz sine in one channel reads -3.01 LKFS [S]; loudness scales
// with level (-20 dB of level is -20 LU) and silence is gated out.
#[test]
fn full_scale_sine_reads_minus_3_01() {
    let fs = 48_000.0;
    let sine: Vec<f64> = (0..(3.0 * fs) as usize)
        .map(|n| (2.0 * std::f64::consts::PI * 997.0 * n as f64 / fs).sin())
        .collect();
    let l = integrated_lkfs(&sine, fs).unwrap();
    assert!((l + 3.01).abs() < 0.02, "{l}");
    let quiet: Vec<f64> = sine.iter().map(|x| x * 0.1).collect();
    let lq = integrated_lkfs(&quiet, fs).unwrap();
    assert!((lq - (l - 20.0)).abs() < 1e-9, "{lq}");
    assert_eq!(integrated_lkfs(&vec![0.0; 48_000], fs), None);
    assert_eq!(integrated_lkfs(&sine[..1000], fs), None);
}
