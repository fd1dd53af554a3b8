//! Periodic generators against their Fourier series, with coherent captures.
//!
//! Coherent capture (common practice, see also IEEE Std 1241 on coherent sampling): with
//! `f = M fs / N`, `M` odd and coprime with `N = 2^14`, harmonic `n` below Nyquist falls exactly
//! on bin `n M`, with no leakage; any other bin can only hold an alias (a component above
//! Nyquist folded back) or numerical error. Expected amplitudes are computed in the tests
//! from the Fourier series (any signals text):
//! square `4 / (pi n)` (odd n), triangle `8 / (pi^2 n^2)` (odd n), saw `2 / (pi n)`,
//! pulse of duty `w`: `(4 / (pi n)) |sin(pi n w)|`, mean `2w - 1`.

use std::f64::consts::PI;

use railsong::model::{Envelope, Source, Tone, Wave};
use railsong::signal::generator;
use rustfft::{num_complex::Complex64, FftPlanner};

const N: usize = 16_384;

fn source(wave: Wave) -> Source {
    Source {
        name: "src".into(),
        wave,
        offset: 0.0,
        start: 0.0,
        stop: None,
        envelope: None,
        r: 0.0,
    }
}

fn render(wave: Wave, rate: f64, n: usize) -> Vec<f64> {
    let mut g = generator(&source(wave), rate, 1).expect("valid source");
    let mut out = vec![0.0; n];
    g.fill(&mut out);
    out
}

/// Single-sided amplitude spectrum: bin 0 is the mean, bin k the peak amplitude at k fs / N.
fn amplitudes(x: &[f64]) -> Vec<f64> {
    let n = x.len();
    let mut buf: Vec<Complex64> = x.iter().map(|&v| Complex64::new(v, 0.0)).collect();
    FftPlanner::new().plan_fft_forward(n).process(&mut buf);
    (0..=n / 2)
        .map(|k| {
            let s = if k == 0 || k == n / 2 { 1.0 } else { 2.0 };
            s * buf[k].norm() / n as f64
        })
        .collect()
}

fn db(x: f64) -> f64 {
    20.0 * x.log10()
}

/// Compare a capture with expected harmonic magnitudes `expect(n)` (fundamental amplitude
/// `expect(1)`), mean `mean`. Returns (worst harmonic error dB, worst other bin dBc).
fn check_series(x: &[f64], m: usize, mean: f64, expect: impl Fn(usize) -> f64) -> (f64, f64) {
    let a = amplitudes(x);
    let len = x.len();
    let fund = expect(1);
    let mut is_harm = vec![false; a.len()];
    let mut worst_harm: f64 = 0.0;
    let mut n = 1;
    while n * m < len.div_ceil(2) {
        let e = expect(n);
        if e > 1e-9 * fund {
            is_harm[n * m] = true;
            worst_harm = worst_harm.max((db(a[n * m]) - db(e)).abs());
        }
        n += 1;
    }
    if mean.abs() > 1e-12 {
        is_harm[0] = true;
        worst_harm = worst_harm.max((db(a[0]) - db(mean.abs())).abs());
    }
    let worst_other = a
        .iter()
        .zip(&is_harm)
        .filter(|(_, &h)| !h)
        .map(|(&v, _)| db(v / fund))
        .fold(f64::NEG_INFINITY, f64::max);
    (worst_harm, worst_other)
}

fn coherent(m: usize, fs: f64) -> f64 {
    m as f64 * fs / N as f64
}

// Coherent tones: M = 23 (about 67 Hz at 48 kHz, 356 harmonics), 341 (about 1 kHz), 2731
// (about 8 kHz: one harmonic below Nyquist); all odd, coprime with 2^14.
const MS: [usize; 3] = [23, 341, 2731];

/// A second capture length, 3^9, so that sample phases fall between the (power-of-two)
/// table points of the band-limited oscillators; M coprime with it.
const N3: usize = 19_683;
const MS3: [usize; 3] = [29, 409, 3001];

#[test]
fn sine_rms_is_peak_over_root_two() {
    // Closed form: the RMS of A sin over whole periods is A / sqrt(2).
    for (m, phase) in [(341, 0.0), (1001, 1.0)] {
        let amp = 3.3;
        let x = render(
            Wave::Sine {
                freq: coherent(m, 48_000.0),
                amp,
                phase,
            },
            48_000.0,
            N,
        );
        let rms = (x.iter().map(|v| v * v).sum::<f64>() / N as f64).sqrt();
        let want = amp / 2f64.sqrt();
        assert!((rms / want - 1.0).abs() < 1e-12, "rms {rms}, want {want}");
        // Start phase: sample 0 is A sin(phase).
        assert!((x[0] - amp * phase.sin()).abs() < 1e-12);
    }
}

#[test]
fn band_limited_square_follows_fourier_series_and_does_not_alias() {
    for fs in [48_000.0, 192_000.0] {
        for m in MS {
            let x = render(
                Wave::Square {
                    freq: coherent(m, fs),
                    amp: 1.0,
                    phase: 0.0,
                    raw: false,
                },
                fs,
                N,
            );
            let (h, other) = check_series(&x, m, 0.0, |n| {
                if n % 2 == 1 {
                    4.0 / (PI * n as f64)
                } else {
                    0.0
                }
            });
            println!(
                "square fs {fs} M {m}: harmonic error {h:.2e} dB, worst other bin {other:.1} dBc"
            );
            assert!(h < 1e-3, "harmonic error {h} dB");
            assert!(other < -80.0, "alias/other bin at {other} dBc");
        }
    }
}

#[test]
fn band_limited_shapes_between_table_points() {
    // Same Fourier-series checks with N = 3^9: sample phases k M / N never sit on table points.
    let fs = 48_000.0;
    type Series = fn(usize) -> f64;
    let square: Series = |n| {
        if n % 2 == 1 {
            4.0 / (PI * n as f64)
        } else {
            0.0
        }
    };
    let triangle: Series = |n| {
        if n % 2 == 1 {
            8.0 / (PI * PI * (n * n) as f64)
        } else {
            0.0
        }
    };
    let saw: Series = |n| 2.0 / (PI * n as f64);
    for m in MS3 {
        let f = m as f64 * fs / N3 as f64;
        let cases: [(&str, Wave, Series); 3] = [
            (
                "square",
                Wave::Square {
                    freq: f,
                    amp: 1.0,
                    phase: 0.0,
                    raw: false,
                },
                square,
            ),
            (
                "triangle",
                Wave::Triangle {
                    freq: f,
                    amp: 1.0,
                    phase: 0.0,
                    raw: false,
                },
                triangle,
            ),
            (
                "saw",
                Wave::Saw {
                    freq: f,
                    amp: 1.0,
                    phase: 0.0,
                    raw: false,
                },
                saw,
            ),
        ];
        for (name, wave, series) in cases {
            let x = render(wave, fs, N3);
            let (h, other) = check_series(&x, m, 0.0, series);
            println!(
                "{name} N 3^9 M {m}: harmonic error {h:.2e} dB, worst other bin {other:.1} dBc"
            );
            assert!(h < 1e-3);
            assert!(other < -80.0);
        }
    }
}

#[test]
fn band_limited_triangle_follows_fourier_series() {
    for m in MS {
        let x = render(
            Wave::Triangle {
                freq: coherent(m, 48_000.0),
                amp: 2.0,
                phase: 0.0,
                raw: false,
            },
            48_000.0,
            N,
        );
        let (h, other) = check_series(&x, m, 0.0, |n| {
            if n % 2 == 1 {
                2.0 * 8.0 / (PI * PI * (n * n) as f64)
            } else {
                0.0
            }
        });
        println!("triangle M {m}: harmonic error {h:.2e} dB, worst other bin {other:.1} dBc");
        assert!(h < 1e-3);
        assert!(other < -80.0);
    }
}

#[test]
fn band_limited_saw_follows_fourier_series() {
    for m in MS {
        let x = render(
            Wave::Saw {
                freq: coherent(m, 48_000.0),
                amp: 1.0,
                phase: 0.0,
                raw: false,
            },
            48_000.0,
            N,
        );
        let (h, other) = check_series(&x, m, 0.0, |n| 2.0 / (PI * n as f64));
        println!("saw M {m}: harmonic error {h:.2e} dB, worst other bin {other:.1} dBc");
        assert!(h < 1e-3);
        assert!(other < -80.0);
    }
}

#[test]
fn pulse_width_sets_the_harmonic_pattern() {
    for w in [0.25, 0.3, 0.125] {
        let m = 341;
        let x = render(
            Wave::Pulse {
                freq: coherent(m, 48_000.0),
                amp: 1.0,
                phase: 0.0,
                width: w,
                raw: false,
            },
            48_000.0,
            N,
        );
        let expect = |n: usize| 4.0 / (PI * n as f64) * (PI * n as f64 * w).sin().abs();
        let (h, other) = check_series(&x, m, 2.0 * w - 1.0, expect);
        println!("pulse w {w}: harmonic error {h:.2e} dB, worst other bin {other:.1} dBc");
        assert!(h < 1e-3);
        // The harmonics with n w integer vanish (4th for w = 1/4, 10th for 0.3, 8th for 1/8):
        // they are among the "other" bins and must be below -80 dBc too.
        assert!(other < -80.0);
    }
}

#[test]
fn raw_versions_do_alias() {
    // The same checks fail for the naive waveforms: this shows the alias test can fail.
    let m = 341;
    let f = coherent(m, 48_000.0);
    let sq = render(
        Wave::Square {
            freq: f,
            amp: 1.0,
            phase: 0.0,
            raw: true,
        },
        48_000.0,
        N,
    );
    let (_, other) = check_series(&sq, m, 0.0, |n| {
        if n % 2 == 1 {
            4.0 / (PI * n as f64)
        } else {
            0.0
        }
    });
    println!("raw square: worst alias {other:.1} dBc");
    assert!(other > -60.0);
    let saw = render(
        Wave::Saw {
            freq: f,
            amp: 1.0,
            phase: 0.0,
            raw: true,
        },
        48_000.0,
        N,
    );
    let (_, other) = check_series(&saw, m, 0.0, |n| 2.0 / (PI * n as f64));
    println!("raw saw: worst alias {other:.1} dBc");
    assert!(other > -60.0);
    let tri = render(
        Wave::Triangle {
            freq: f,
            amp: 1.0,
            phase: 0.0,
            raw: true,
        },
        48_000.0,
        N,
    );
    let (_, other) = check_series(&tri, m, 0.0, |n| {
        if n % 2 == 1 {
            8.0 / (PI * PI * (n * n) as f64)
        } else {
            0.0
        }
    });
    println!("raw triangle: worst alias {other:.1} dBc");
    assert!(other > -80.0);
}

#[test]
fn raw_shapes_match_their_definitions() {
    // Naive square: +amp for the first half period, -amp for the second (definition).
    let fs = 48_000.0;
    let x = render(
        Wave::Square {
            freq: fs / 8.0,
            amp: 2.0,
            phase: 0.0,
            raw: true,
        },
        fs,
        8,
    );
    assert_eq!(x, vec![2.0, 2.0, 2.0, 2.0, -2.0, -2.0, -2.0, -2.0]);
    // Naive triangle: 0, peak at a quarter period, 0, trough at three quarters.
    let t = render(
        Wave::Triangle {
            freq: fs / 8.0,
            amp: 1.0,
            phase: 0.0,
            raw: true,
        },
        fs,
        8,
    );
    let want = [0.0, 0.5, 1.0, 0.5, 0.0, -0.5, -1.0, -0.5];
    for (a, b) in t.iter().zip(want) {
        assert!((a - b).abs() < 1e-15);
    }
}

#[test]
fn multitone_puts_each_tone_in_its_bin() {
    let fs = 48_000.0;
    let tones = vec![
        Tone {
            freq: coherent(101, fs),
            amp: 1.0,
            phase: 0.3,
        },
        Tone {
            freq: coherent(1203, fs),
            amp: 0.25,
            phase: 0.0,
        },
    ];
    let x = render(Wave::Multitone { tones }, fs, N);
    let a = amplitudes(&x);
    assert!((a[101] - 1.0).abs() < 1e-12);
    assert!((a[1203] - 0.25).abs() < 1e-12);
    let other = a
        .iter()
        .enumerate()
        .filter(|(k, _)| *k != 101 && *k != 1203)
        .map(|(_, v)| db(*v))
        .fold(f64::NEG_INFINITY, f64::max);
    assert!(other < -200.0, "other bins {other} dB");
}

#[test]
fn phase_does_not_drift() {
    // With f = M fs / N the exact phase returns to its start every N samples: the samples of
    // period 200 equal those of period 0 bit for bit.
    let fs = 48_000.0;
    let mut g = generator(
        &source(Wave::Square {
            freq: coherent(341, fs),
            amp: 1.0,
            phase: 0.4,
            raw: false,
        }),
        fs,
        1,
    )
    .unwrap();
    let mut first = vec![0.0; N];
    g.fill(&mut first);
    let mut block = vec![0.0; N];
    for _ in 0..200 {
        g.fill(&mut block);
    }
    assert_eq!(first, block);
}

fn all_waves() -> Vec<Source> {
    let f = 440.0;
    let mut v: Vec<Source> = vec![
        Wave::Sine {
            freq: f,
            amp: 1.0,
            phase: 0.1,
        },
        Wave::Square {
            freq: f,
            amp: 1.0,
            phase: 0.0,
            raw: false,
        },
        Wave::Square {
            freq: f,
            amp: 1.0,
            phase: 0.0,
            raw: true,
        },
        Wave::Triangle {
            freq: f,
            amp: 1.0,
            phase: 0.0,
            raw: false,
        },
        Wave::Saw {
            freq: f,
            amp: 1.0,
            phase: 0.0,
            raw: false,
        },
        Wave::Pulse {
            freq: f,
            amp: 1.0,
            phase: 0.0,
            width: 0.2,
            raw: false,
        },
        Wave::Multitone {
            tones: vec![Tone {
                freq: 60.0,
                amp: 1.0,
                phase: 0.0,
            }],
        },
        Wave::Sweep {
            from: 20.0,
            to: 2000.0,
            amp: 1.0,
            duration: 0.05,
        },
        Wave::Noise {
            pink: false,
            rms: 1.0,
        },
        Wave::Noise {
            pink: true,
            rms: 1.0,
        },
        Wave::Dc { level: 1.5 },
        Wave::Steps {
            levels: vec![0.0, 1.0, 2.0],
            hold: 0.001,
        },
        Wave::Ramp {
            from: -1.0,
            to: 1.0,
            duration: 0.02,
        },
    ]
    .into_iter()
    .map(source)
    .collect();
    // One gated, offset, enveloped source too.
    v.push(Source {
        offset: 0.5,
        start: 0.003,
        stop: Some(0.04),
        envelope: Some(Envelope {
            attack: 0.002,
            decay: 0.005,
            every: Some(0.01),
        }),
        ..source(Wave::Sine {
            freq: f,
            amp: 1.0,
            phase: 0.0,
        })
    });
    v
}

#[test]
fn block_sizes_do_not_matter_and_reset_repeats() {
    // Property of every generator (block processing must equal one long block).
    let fs = 48_000.0;
    let len = 2400;
    for src in all_waves() {
        let mut g = generator(&src, fs, 7).unwrap();
        let mut whole = vec![0.0; len];
        g.fill(&mut whole);
        g.reset();
        let mut pieces = vec![0.0; len];
        let sizes = [1usize, 7, 64, 0, 500, 3];
        let mut at = 0;
        let mut i = 0;
        while at < len {
            let n = sizes[i % sizes.len()].min(len - at);
            g.fill(&mut pieces[at..at + n]);
            at += n;
            i += 1;
        }
        assert_eq!(whole, pieces, "source {:?}", src.wave);
        assert!(whole.iter().all(|v| v.is_finite()));
    }
}

#[test]
fn control_voltages() {
    let fs = 1000.0;
    let steps = render(
        Wave::Steps {
            levels: vec![1.0, -2.0, 3.0],
            hold: 0.002,
        },
        fs,
        8,
    );
    assert_eq!(steps, vec![1.0, 1.0, -2.0, -2.0, 3.0, 3.0, 1.0, 1.0]);
    let ramp = render(
        Wave::Ramp {
            from: 0.0,
            to: 1.0,
            duration: 0.004,
        },
        fs,
        7,
    );
    assert_eq!(ramp, vec![0.0, 0.25, 0.5, 0.75, 1.0, 1.0, 1.0]);
    assert_eq!(render(Wave::Dc { level: -4.0 }, fs, 3), vec![-4.0; 3]);
}

#[test]
fn bad_parameters_are_errors_not_panics() {
    let bad = [
        Wave::Sine {
            freq: -1.0,
            amp: 1.0,
            phase: 0.0,
        },
        Wave::Pulse {
            freq: 100.0,
            amp: 1.0,
            phase: 0.0,
            width: 1.0,
            raw: false,
        },
        Wave::Steps {
            levels: vec![],
            hold: 1.0,
        },
        Wave::Sweep {
            from: 0.0,
            to: 10.0,
            amp: 1.0,
            duration: 1.0,
        },
        Wave::File {
            path: "x.wav".into(),
            channel: None,
            full_scale: 1.0,
            looped: false,
        },
    ];
    for w in bad {
        let e = generator(&source(w), 48_000.0, 0).err().expect("error");
        assert!(e.to_string().contains("`src`"), "{e}");
    }
    assert!(generator(&source(Wave::Dc { level: 0.0 }), f64::NAN, 0).is_err());
}

#[test]
fn extreme_fundamentals() {
    // At or above Nyquist a band-limited square has no harmonic left: silence (its mean).
    let x = render(
        Wave::Square {
            freq: 30_000.0,
            amp: 1.0,
            phase: 0.0,
            raw: false,
        },
        48_000.0,
        64,
    );
    assert!(x.iter().all(|v| v.abs() < 1e-15));
    // A 0.05 Hz LFO (table at its size cap): bounded by the Gibbs overshoot of the series,
    // about 1.179 (2/pi Si(pi), Wilbraham-Gibbs constant, from memory), and +1 for most of
    // the first half period.
    let y = render(
        Wave::Square {
            freq: 0.05,
            amp: 1.0,
            phase: 0.0,
            raw: false,
        },
        48_000.0,
        48_000,
    );
    assert!(y.iter().all(|v| v.abs() < 1.18));
    assert!(y[1000..].iter().all(|v| (v - 1.0).abs() < 0.01));
}
