//! Streaming WAV playback (`signal::WavStream`) against whole-file loading (`load_wav`): the
//! same samples, so a long file input needs no more memory than a short one.

use railsong::signal::{load_wav, Generator, WavStream};

fn write_wav(path: &std::path::Path, rate: u32, channels: u16, frames: usize, f: f64) {
    let spec = hound::WavSpec {
        channels,
        sample_rate: rate,
        bits_per_sample: 32,
        sample_format: hound::SampleFormat::Float,
    };
    let mut w = hound::WavWriter::create(path, spec).unwrap();
    for n in 0..frames {
        let t = n as f64 / rate as f64;
        for c in 0..channels {
            let v = 0.5 * (2.0 * std::f64::consts::PI * f * t + c as f64).sin();
            w.write_sample(v as f32).unwrap();
        }
    }
    w.finalize().unwrap();
}

fn stream(
    path: &std::path::Path,
    ch: Option<usize>,
    rate: f64,
    n: usize,
    looped: bool,
) -> Vec<f64> {
    let mut s = WavStream::open(path, ch, 5.0, rate, looped).unwrap();
    let mut out = vec![0.0; n];
    // odd block sizes, as the engine's blocks never line up with the file's chunks
    let mut k = 0;
    for (i, len) in [1usize, 700, 513, 4096, 3].iter().cycle().enumerate() {
        if k >= n || i > 100_000 {
            break;
        }
        let e = (k + len).min(n);
        s.fill(&mut out[k..e]);
        k = e;
    }
    out
}

// Same rate: the stream is the file, sample for sample (channel mix = mean of channels).
#[test]
fn same_rate_stream_equals_the_whole_file() {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("a.wav");
    write_wav(&p, 48_000, 2, 20_000, 997.0);
    let whole = load_wav(&p, None, 5.0, 48_000.0, 30_000, false).unwrap();
    let s = stream(&p, None, 48_000.0, 30_000, false);
    for (i, (a, b)) in whole.iter().zip(&s).enumerate() {
        assert!((a - b).abs() < 1e-12, "sample {i}: {a} vs {b}");
    }
    // looped: the second pass repeats the first exactly
    let s = stream(&p, Some(1), 48_000.0, 45_000, true);
    let w = load_wav(&p, Some(1), 5.0, 48_000.0, 45_000, true).unwrap();
    for i in 0..45_000 {
        assert!((s[i] - w[i]).abs() < 1e-12, "looped sample {i}");
    }
}

// Resampled 44.1 -> 48 kHz: the stream matches the whole-file resampling (same sinc
// resampler) away from the ends, and a reset replays it bit for bit.
#[test]
fn resampled_stream_matches_whole_file_resampling() {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("b.wav");
    write_wav(&p, 44_100, 1, 44_100, 1000.0);
    let n = 40_000;
    let whole = load_wav(&p, None, 5.0, 48_000.0, n, false).unwrap();
    let s = stream(&p, None, 48_000.0, n, false);
    let worst = whole[500..n - 500]
        .iter()
        .zip(&s[500..n - 500])
        .map(|(a, b)| (a - b).abs())
        .fold(0.0, f64::max);
    assert!(worst < 1e-6, "worst difference {worst} V");
    let mut g = WavStream::open(&p, None, 5.0, 48_000.0, false).unwrap();
    let mut a = vec![0.0; 10_000];
    let mut b = vec![0.0; 10_000];
    g.fill(&mut a);
    g.reset();
    g.fill(&mut b);
    assert_eq!(a, b);
}
