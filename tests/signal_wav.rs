//! WAV output and input: round trips read by an independent decoder (the hound crate) and by
//! Python's standard-library `wave` module, calibration, dither, clipping, resampling,
//! malformed inputs, atomic writes, the overwrite guard and the name filter.

use std::f64::consts::PI;
use std::fs;
use std::io::{self, Cursor, Seek, SeekFrom, Write};
use std::path::Path;
use std::process::Command;

use railsong::model::{Source, Wave};
use railsong::signal::{
    check_file_name, file_source, listen_gain, load_wav, Depth, OutputDir, SignalError, WavSpec,
    WavWriter, MANIFEST_NAME,
};

fn spec(depth: Depth, channels: u16, rate: u32, full_scale: f64) -> WavSpec {
    WavSpec {
        rate,
        channels,
        depth,
        full_scale,
        dither_seed: 11,
    }
}

fn to_bytes(spec: WavSpec, samples: &[f64]) -> (Vec<u8>, u64) {
    let mut w = WavWriter::new(Cursor::new(Vec::new()), spec).unwrap();
    w.write(samples).unwrap();
    let (cur, stats) = w.finish().unwrap();
    (cur.into_inner(), stats.clipped)
}

/// Decode with hound into full-scale fractions (`code / 2^(bits-1)` or float).
fn hound_read(bytes: &[u8]) -> (hound::WavSpec, Vec<f64>) {
    let mut r = hound::WavReader::new(Cursor::new(bytes)).unwrap();
    let s = r.spec();
    let v = match s.sample_format {
        hound::SampleFormat::Int => {
            let k = 2f64.powi(i32::from(s.bits_per_sample) - 1);
            r.samples::<i32>()
                .map(|x| f64::from(x.unwrap()) / k)
                .collect()
        }
        hound::SampleFormat::Float => r.samples::<f32>().map(|x| f64::from(x.unwrap())).collect(),
    };
    (s, v)
}

fn test_signal(n: usize, amp: f64) -> Vec<f64> {
    (0..n)
        .map(|i| amp * (2.0 * PI * 997.0 * i as f64 / 48_000.0).sin())
        .collect()
}

#[test]
fn round_trip_each_depth() {
    // Quantisation bounds: rounding to the nearest code errs by at most 0.5 LSB; TPDF dither
    // of +/-1 LSB peak adds at most 1 LSB more (so 16-bit errs by < 1.5 LSB); float32 keeps
    // 24 bits of mantissa (relative error <= 2^-24).
    let fs = 10.0;
    let x = test_signal(4801, 9.0);
    for (depth, lsb_bound) in [
        (Depth::Pcm16, 1.5 / 32_768.0),
        (Depth::Pcm24, 0.5 / 8_388_608.0 + 1e-12),
        (Depth::Float32, 0.0),
    ] {
        let (bytes, clipped) = to_bytes(spec(depth, 1, 48_000, fs), &x);
        assert_eq!(clipped, 0);
        let (s, y) = hound_read(&bytes);
        assert_eq!(s.sample_rate, 48_000);
        assert_eq!(s.channels, 1);
        assert_eq!(s.bits_per_sample, depth.bits());
        assert_eq!(y.len(), x.len());
        for (a, b) in x.iter().zip(&y) {
            let want = a / fs;
            let bound = if depth == Depth::Float32 {
                want.abs() * 2f64.powi(-24)
            } else {
                lsb_bound
            };
            assert!((b - want).abs() <= bound, "{depth:?}: {b} vs {want}");
        }
    }
}

#[test]
fn tpdf_dither_is_unbiased_and_adds_4_77_db() {
    // TPDF dither of +/-1 LSB: total error variance 3 x (1/12) LSB^2 = 1/4 LSB^2, i.e. 4.77 dB
    // above plain rounding (10 log10 3), independent of the signal (CHECKS.md, [D]).
    let x = test_signal(200_000, 3.1);
    let (bytes, _) = to_bytes(spec(Depth::Pcm16, 1, 48_000, 10.0), &x);
    let (_, y) = hound_read(&bytes);
    let e: Vec<f64> = x
        .iter()
        .zip(&y)
        .map(|(a, b)| (b - a / 10.0) * 32_768.0)
        .collect();
    let n = e.len() as f64;
    let mean = e.iter().sum::<f64>() / n;
    let var = e.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n;
    let rise = 10.0 * (var / (1.0 / 12.0)).log10();
    println!("16-bit TPDF: error mean {mean:.4} LSB, noise rise {rise:.3} dB (theory 4.771)");
    assert!(mean.abs() < 0.01);
    assert!((rise - 10.0 * 3f64.log10()).abs() < 0.1);
}

#[test]
fn streaming_blocks_give_the_same_file() {
    let x = test_signal(10_000, 4.0);
    let sp = spec(Depth::Pcm16, 2, 44_100, 10.0);
    let (whole, _) = to_bytes(sp, &x);
    let mut w = WavWriter::new(Cursor::new(Vec::new()), sp).unwrap();
    for chunk in x.chunks(333) {
        w.write(chunk).unwrap();
    }
    let (cur, stats) = w.finish().unwrap();
    assert_eq!(cur.into_inner(), whole);
    assert_eq!(stats.frames, 5000);
}

#[test]
fn calibration_five_volts_at_ten_volt_full_scale() {
    // 20 log10(5 / 10) = -6.0206 dBFS peak (definition of dBFS: relative to full scale).
    let fs = 10.0;
    // 1 kHz at 48 kHz: sample 12 is exactly on the crest.
    let x: Vec<f64> = (0..480)
        .map(|i| 5.0 * (2.0 * PI * 1000.0 * i as f64 / 48_000.0).sin())
        .collect();
    for depth in [Depth::Pcm24, Depth::Float32, Depth::Pcm16] {
        let (bytes, _) = to_bytes(spec(depth, 1, 48_000, fs), &x);
        let (_, y) = hound_read(&bytes);
        let peak = y.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        let dbfs = 20.0 * peak.log10();
        let want = 20.0 * (5.0f64 / fs).log10();
        let tol = if depth == Depth::Pcm16 { 1e-3 } else { 1e-5 };
        println!("{depth:?}: peak {dbfs:.5} dBFS (want {want:.5})");
        assert!((dbfs - want).abs() < tol);
    }
}

#[test]
fn clipping_is_in_the_file_only_and_counted() {
    let x = [0.0, 11.0, -12.0, 9.99, 10.0, -10.0, f64::NAN, 10.5];
    let (bytes, clipped) = to_bytes(spec(Depth::Pcm24, 1, 48_000, 10.0), &x);
    assert_eq!(
        clipped, 4,
        "11, -12, NaN and 10.5 are beyond full scale or not finite"
    );
    let mut r = hound::WavReader::new(Cursor::new(&bytes)).unwrap();
    let codes: Vec<i32> = r.samples::<i32>().map(Result::unwrap).collect();
    assert_eq!(codes[1], 8_388_607);
    assert_eq!(codes[2], -8_388_608);
    assert_eq!(codes[6], 0);
    let (bytes, clipped) = to_bytes(spec(Depth::Float32, 1, 48_000, 10.0), &x);
    assert_eq!(clipped, 4);
    let (_, y) = hound_read(&bytes);
    assert_eq!(y[1], 1.0);
    assert_eq!(y[2], -1.0);
}

const PY_READ: &str = r#"
import sys, wave
w = wave.open(sys.argv[1], 'rb')
ch, sw, fr, n = w.getnchannels(), w.getsampwidth(), w.getframerate(), w.getnframes()
data = w.readframes(n)
print(ch, sw, fr, n)
print(' '.join(str(int.from_bytes(data[i:i + sw], 'little', signed=True)) for i in range(0, len(data), sw)))
"#;

#[test]
fn python_wave_module_reads_our_pcm() {
    // Independent decoder: Python's standard-library `wave` module (PCM only).
    let dir = tempfile::tempdir().unwrap();
    for (depth, channels) in [(Depth::Pcm16, 2u16), (Depth::Pcm24, 1), (Depth::Pcm24, 2)] {
        let x = test_signal(1001 * usize::from(channels), 7.0);
        let mut out = OutputDir::open(dir.path(), false).unwrap();
        let name = format!("py_{}_{channels}.wav", depth.bits());
        out.write(&name, spec(depth, channels, 44_100, 10.0), &x)
            .unwrap();
        let path = dir.path().join(&name);
        let run = Command::new("python3")
            .arg("-c")
            .arg(PY_READ)
            .arg(&path)
            .output();
        let run = match run {
            Ok(r) => r,
            Err(e) if e.kind() == io::ErrorKind::NotFound => {
                println!("skipped: python3 is not installed ({e})");
                return;
            }
            Err(e) => panic!("python3: {e}"),
        };
        assert!(
            run.status.success(),
            "python wave failed: {}",
            String::from_utf8_lossy(&run.stderr)
        );
        let text = String::from_utf8(run.stdout).unwrap();
        let mut lines = text.lines();
        let head: Vec<u32> = lines
            .next()
            .unwrap()
            .split_whitespace()
            .map(|t| t.parse().unwrap())
            .collect();
        assert_eq!(
            head,
            vec![
                u32::from(channels),
                u32::from(depth.bits() / 8),
                44_100,
                1001
            ]
        );
        let codes: Vec<i64> = lines
            .next()
            .unwrap()
            .split_whitespace()
            .map(|t| t.parse().unwrap())
            .collect();
        let full = 2f64.powi(i32::from(depth.bits()) - 1);
        let bound = if depth == Depth::Pcm16 { 1.5 } else { 0.5 };
        assert_eq!(codes.len(), x.len());
        for (c, v) in codes.iter().zip(&x) {
            assert!((*c as f64 - v / 10.0 * full).abs() <= bound + 1e-9);
        }
        // And hound agrees code for code.
        let mut r = hound::WavReader::open(&path).unwrap();
        let h: Vec<i64> = r.samples::<i32>().map(|s| i64::from(s.unwrap())).collect();
        assert_eq!(h, codes);
    }
}

/// Write a file with hound (an independent encoder; it uses WAVE_FORMAT_EXTENSIBLE above 16
/// bits and plain PCM at 8 and 16).
fn hound_write(path: &Path, channels: u16, rate: u32, bits: u16, float: bool, frames: &[Vec<f64>]) {
    let spec = hound::WavSpec {
        channels,
        sample_rate: rate,
        bits_per_sample: bits,
        sample_format: if float {
            hound::SampleFormat::Float
        } else {
            hound::SampleFormat::Int
        },
    };
    let mut w = hound::WavWriter::create(path, spec).unwrap();
    let k = 2f64.powi(i32::from(bits) - 1);
    for f in frames {
        for &v in f {
            if float {
                w.write_sample(v as f32).unwrap();
            } else {
                let c = (v * k).round().clamp(-k, k - 1.0) as i32;
                match bits {
                    8 => w.write_sample(c as i8).unwrap(),
                    16 => w.write_sample(c as i16).unwrap(),
                    _ => w.write_sample(c).unwrap(),
                }
            }
        }
    }
    w.finalize().unwrap();
}

#[test]
fn loads_every_depth_and_picks_or_mixes_channels() {
    let dir = tempfile::tempdir().unwrap();
    // Stereo: left 0.5, right -0.25 of full scale, a few frames.
    let frames: Vec<Vec<f64>> = (0..64).map(|_| vec![0.5, -0.25]).collect();
    for (bits, float) in [
        (8, false),
        (16, false),
        (24, false),
        (32, false),
        (32, true),
    ] {
        let path = dir.path().join(format!("in_{bits}_{float}.wav"));
        hound_write(&path, 2, 48_000, bits, float, &frames);
        let fs = 4.0;
        let l = load_wav(&path, Some(0), fs, 48_000.0, 64, false).unwrap();
        let r = load_wav(&path, Some(1), fs, 48_000.0, 64, false).unwrap();
        let m = load_wav(&path, None, fs, 48_000.0, 64, false).unwrap();
        // 0.5 and -0.25 are exact codes at every depth: exact volts.
        assert!(l.iter().all(|v| *v == 2.0), "{bits} {float}: {}", l[0]);
        assert!(r.iter().all(|v| *v == -1.0));
        assert!(
            m.iter().all(|v| *v == 0.5),
            "mix is the mean of the channels"
        );
        let e = load_wav(&path, Some(2), fs, 48_000.0, 64, false).unwrap_err();
        assert!(matches!(e, SignalError::Channel { channels: 2, .. }));
        assert!(e.to_string().contains(&format!("in_{bits}_{float}.wav")));
    }
}

#[test]
fn loop_pad_and_truncate() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("short.wav");
    let frames: Vec<Vec<f64>> = (0..10).map(|i| vec![i as f64 / 16.0]).collect();
    hound_write(&path, 1, 48_000, 16, false, &frames);
    let looped = load_wav(&path, None, 16.0, 48_000.0, 25, true).unwrap();
    let padded = load_wav(&path, None, 16.0, 48_000.0, 25, false).unwrap();
    let cut = load_wav(&path, None, 16.0, 48_000.0, 5, true).unwrap();
    for i in 0..25 {
        assert_eq!(looped[i], (i % 10) as f64);
        assert_eq!(padded[i], if i < 10 { i as f64 } else { 0.0 });
    }
    assert_eq!(cut, vec![0.0, 1.0, 2.0, 3.0, 4.0]);
    // The file source plays it through the gate: switched on at 2 samples.
    let src = Source {
        name: "f".into(),
        wave: Wave::File {
            path: path.clone(),
            channel: None,
            full_scale: 16.0,
            looped: false,
        },
        offset: 0.0,
        start: 2.0 / 48_000.0,
        stop: None,
        envelope: None,
    };
    let mut g = file_source(&src, 48_000.0, 25).unwrap();
    let mut out = vec![0.0; 14];
    g.fill(&mut out);
    assert_eq!(
        out,
        vec![0.0, 0.0, 0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0, 0.0, 0.0]
    );
}

/// IEEE Std 1057 three-parameter sine fit at known frequency: least squares on
/// [cos, sin, 1]. Returns (amplitude, phase) of `A cos(w t + phase)`.
fn sine_fit(x: &[f64], f: f64, fs: f64, t0: usize) -> (f64, f64) {
    let mut m = [[0.0f64; 3]; 3];
    let mut b = [0.0f64; 3];
    for (i, &v) in x.iter().enumerate() {
        let w = 2.0 * PI * f * (t0 + i) as f64 / fs;
        let r = [w.cos(), w.sin(), 1.0];
        for j in 0..3 {
            b[j] += r[j] * v;
            for k in 0..3 {
                m[j][k] += r[j] * r[k];
            }
        }
    }
    // Cramer's rule on the 3x3 normal equations.
    let det = |m: [[f64; 3]; 3]| {
        m[0][0] * (m[1][1] * m[2][2] - m[1][2] * m[2][1])
            - m[0][1] * (m[1][0] * m[2][2] - m[1][2] * m[2][0])
            + m[0][2] * (m[1][0] * m[2][1] - m[1][1] * m[2][0])
    };
    let d = det(m);
    let mut s = [0.0; 3];
    for (j, sj) in s.iter_mut().enumerate() {
        let mut mj = m;
        for (row, bv) in mj.iter_mut().zip(b) {
            row[j] = bv;
        }
        *sj = det(mj) / d;
    }
    ((s[0] * s[0] + s[1] * s[1]).sqrt(), (-s[1]).atan2(s[0]))
}

#[test]
fn resampling_44k1_to_48k_keeps_frequency_and_level() {
    // Requirement: a 1 kHz tone keeps its frequency within 0.01 % and its level within
    // 0.05 dB. Frequency from the phase advance between two three-parameter fits (IEEE 1057)
    // 1 s apart; level from the fitted amplitude.
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("cd.wav");
    let (fin, fout) = (44_100.0, 48_000.0);
    let len = (2.5 * fin) as usize;
    let frames: Vec<Vec<f64>> = (0..len)
        .map(|i| {
            let t = i as f64 / fin;
            vec![
                0.5 * (2.0 * PI * 1000.0 * t).sin(),
                0.3 * (2.0 * PI * 3100.0 * t).sin(),
            ]
        })
        .collect();
    hound_write(&path, 2, 44_100, 32, true, &frames);
    let out_len = (2.5 * fout) as usize;
    let y = load_wav(&path, Some(0), 10.0, fout, out_len, false).unwrap();
    assert_eq!(y.len(), out_len);
    let seg = 4800;
    let (t1, t2) = (24_000, 72_000);
    let (a1, p1) = sine_fit(&y[t1..t1 + seg], 1000.0, fout, t1);
    let (a2, p2) = sine_fit(&y[t2..t2 + seg], 1000.0, fout, t2);
    let mut dp = p2 - p1;
    while dp > PI {
        dp -= 2.0 * PI;
    }
    while dp < -PI {
        dp += 2.0 * PI;
    }
    let f = 1000.0 + dp / (2.0 * PI * (t2 - t1) as f64 / fout);
    let level = 20.0 * (0.5 * (a1 + a2) / 5.0).log10();
    println!(
        "resampled: frequency error {:.3e} (relative), level change {level:.3e} dB",
        f / 1000.0 - 1.0
    );
    assert!((f / 1000.0 - 1.0).abs() < 1e-4);
    assert!(level.abs() < 0.05);
    // The other channel does not leak in when channel 0 is picked.
    let (a3, _) = sine_fit(&y[t1..t1 + seg], 3100.0, fout, t1);
    assert!(a3 < 1e-4, "3.1 kHz of the right channel: {a3}");
}

/// A RIFF/WAVE file with a 16-byte fmt chunk and the given data.
fn wav_bytes(tag: u16, channels: u16, rate: u32, bits: u16, data: &[u8]) -> Vec<u8> {
    let mut h = Vec::new();
    h.extend_from_slice(b"RIFF");
    h.extend_from_slice(&(36 + data.len() as u32).to_le_bytes());
    h.extend_from_slice(b"WAVEfmt ");
    h.extend_from_slice(&16u32.to_le_bytes());
    h.extend_from_slice(&tag.to_le_bytes());
    h.extend_from_slice(&channels.to_le_bytes());
    h.extend_from_slice(&rate.to_le_bytes());
    let block = u32::from(channels) * u32::from(bits / 8);
    h.extend_from_slice(&(rate * block).to_le_bytes());
    h.extend_from_slice(&(block as u16).to_le_bytes());
    h.extend_from_slice(&bits.to_le_bytes());
    h.extend_from_slice(b"data");
    h.extend_from_slice(&(data.len() as u32).to_le_bytes());
    h.extend_from_slice(data);
    h
}

#[test]
fn bad_inputs_give_clear_errors() {
    let dir = tempfile::tempdir().unwrap();
    let p = |n: &str| dir.path().join(n);
    let load = |path: &Path| load_wav(path, None, 1.0, 48_000.0, 100, false).unwrap_err();
    let check = |e: SignalError, name: &str, words: &str| {
        let msg = e.to_string();
        assert!(msg.contains(name), "`{msg}` names {name}");
        assert!(msg.contains(words), "`{msg}` says {words}");
    };

    check(load(&p("nope.wav")), "nope.wav", "not found");

    fs::write(p("empty.wav"), b"").unwrap();
    check(load(&p("empty.wav")), "empty.wav", "empty");

    fs::write(p("text.wav"), b"hello, this is not audio at all").unwrap();
    check(load(&p("text.wav")), "text.wav", "malformed");

    let good = wav_bytes(1, 1, 48_000, 16, &[0u8; 400]);
    fs::write(p("cut.wav"), &good[..good.len() - 101]).unwrap();
    check(load(&p("cut.wav")), "cut.wav", "truncated");
    fs::write(p("head.wav"), &good[..30]).unwrap();
    check(load(&p("head.wav")), "head.wav", "truncated");

    // Format tag 0x0055 (MPEG layer 3), a compressed format.
    fs::write(p("mp3.wav"), wav_bytes(0x55, 1, 48_000, 16, &[0u8; 64])).unwrap();
    check(load(&p("mp3.wav")), "mp3.wav", "unsupported");

    fs::write(p("nochan.wav"), wav_bytes(1, 0, 48_000, 16, &[0u8; 64])).unwrap();
    check(load(&p("nochan.wav")), "nochan.wav", "zero channels");

    fs::write(p("slow.wav"), wav_bytes(1, 1, 5, 16, &[0u8; 64])).unwrap();
    check(load(&p("slow.wav")), "slow.wav", "sample rate 5 Hz");

    fs::write(p("nodata.wav"), wav_bytes(1, 1, 48_000, 16, &[])).unwrap();
    check(load(&p("nodata.wav")), "nodata.wav", "no samples");

    let mut nan = Vec::new();
    for v in [0.0f32, 0.5, f32::NAN, 0.1] {
        nan.extend_from_slice(&v.to_le_bytes());
    }
    fs::write(p("nan.wav"), wav_bytes(3, 1, 48_000, 32, &nan)).unwrap();
    check(load(&p("nan.wav")), "nan.wav", "sample 2 is not a finite");

    let mut inf = Vec::new();
    for v in [f32::INFINITY, 0.5] {
        inf.extend_from_slice(&v.to_le_bytes());
    }
    fs::write(p("inf.wav"), wav_bytes(3, 1, 48_000, 32, &inf)).unwrap();
    check(load(&p("inf.wav")), "inf.wav", "not a finite");
}

/// A writer that fails once `budget` bytes have been written.
struct FailAfter {
    inner: Cursor<Vec<u8>>,
    budget: usize,
}

impl Write for FailAfter {
    fn write(&mut self, buf: &[u8]) -> io::Result<usize> {
        if self.budget < buf.len() {
            return Err(io::Error::other("disk full (simulated)"));
        }
        self.budget -= buf.len();
        self.inner.write(buf)
    }
    fn flush(&mut self) -> io::Result<()> {
        Ok(())
    }
}

impl Seek for FailAfter {
    fn seek(&mut self, pos: SeekFrom) -> io::Result<u64> {
        self.inner.seek(pos)
    }
}

#[test]
fn write_errors_surface() {
    let w = FailAfter {
        inner: Cursor::new(Vec::new()),
        budget: 1000,
    };
    let mut ww = WavWriter::new(w, spec(Depth::Pcm24, 1, 48_000, 1.0)).unwrap();
    let e = ww.write(&vec![0.1; 10_000]).unwrap_err();
    assert!(e.to_string().contains("disk full"), "{e}");
}

fn names_in(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    v.sort();
    v
}

#[test]
fn interrupted_write_leaves_nothing_behind() {
    let dir = tempfile::tempdir().unwrap();
    let mut out = OutputDir::open(dir.path(), false).unwrap();
    let sp = spec(Depth::Pcm24, 1, 48_000, 10.0);
    {
        // The render fails after some blocks: the file is dropped unfinished.
        let mut f = out.create("render.wav", sp).unwrap();
        f.write(&test_signal(5000, 1.0)).unwrap();
        assert!(names_in(dir.path()).iter().any(|n| n.contains(".tmp-")));
    }
    assert_eq!(
        names_in(dir.path()),
        Vec::<String>::new(),
        "no final file, no temp file"
    );

    // A previous good file survives an interrupted rewrite untouched.
    out.write("keep.wav", sp, &test_signal(100, 1.0)).unwrap();
    let before = fs::read(dir.path().join("keep.wav")).unwrap();
    {
        let mut f = out.create("keep.wav", sp).unwrap();
        f.write(&test_signal(7000, 2.0)).unwrap();
    }
    assert_eq!(fs::read(dir.path().join("keep.wav")).unwrap(), before);
    assert_eq!(
        names_in(dir.path()),
        vec![MANIFEST_NAME.to_string(), "keep.wav".into()]
    );

    // A failure in the final rename (a folder sits under the name) cleans up too.
    fs::create_dir(dir.path().join("blocked.wav")).unwrap();
    let mut forced = OutputDir::open(dir.path(), true).unwrap();
    let mut f = forced.create("blocked.wav", sp).unwrap();
    f.write(&[0.0; 10]).unwrap();
    let e = f.finish().unwrap_err();
    assert!(e.to_string().contains("blocked.wav"), "{e}");
    assert!(dir.path().join("blocked.wav").is_dir());
    assert!(!names_in(dir.path()).iter().any(|n| n.contains(".tmp-")));
}

#[test]
fn overwrite_guard_refuses_foreign_files_unless_forced() {
    let dir = tempfile::tempdir().unwrap();
    let sp = spec(Depth::Pcm16, 1, 48_000, 10.0);
    fs::write(dir.path().join("mine.wav"), b"somebody else's file").unwrap();
    let mut out = OutputDir::open(dir.path(), false).unwrap();
    let e = out.write("mine.wav", sp, &[0.0; 10]).unwrap_err();
    let msg = e.to_string();
    assert!(msg.contains("mine.wav") && msg.contains("--force"), "{msg}");
    assert_eq!(
        fs::read(dir.path().join("mine.wav")).unwrap(),
        b"somebody else's file"
    );
    // A new name is fine and gets recorded; rewriting it later needs no force.
    out.write("new.wav", sp, &[0.0; 10]).unwrap();
    let listed = |dir: &std::path::Path| -> Vec<String> {
        fs::read_to_string(dir.join(MANIFEST_NAME))
            .unwrap()
            .lines()
            .filter(|l| !l.starts_with('#'))
            .map(|l| l.split_whitespace().next().unwrap().to_string())
            .collect()
    };
    assert_eq!(listed(dir.path()), vec!["new.wav"]);
    let mut again = OutputDir::open(dir.path(), false).unwrap();
    assert!(again.wrote("new.wav"));
    again.write("new.wav", sp, &[0.5; 10]).unwrap();
    // With force the foreign file is replaced, and from then on it is ours.
    let mut forced = OutputDir::open(dir.path(), true).unwrap();
    let stats = forced.write("mine.wav", sp, &[0.0; 10]).unwrap();
    assert_eq!(stats.frames, 10);
    assert!(hound::WavReader::open(dir.path().join("mine.wav")).is_ok());
    assert!(OutputDir::open(dir.path(), false)
        .unwrap()
        .wrote("mine.wav"));
    assert_eq!(
        listed(dir.path()),
        vec!["mine.wav", "new.wav"],
        "each name listed once"
    );
}

#[test]
fn file_name_filter() {
    for bad in [
        "../x.wav",
        "/tmp/x.wav",
        "a/b.wav",
        "a\\b.wav",
        ".wav",
        ".hidden.wav",
        "x.WAV",
        "x.wav.tmp",
        "x y.wav",
        "x",
        "",
        "x.txt",
        "caf\u{e9}.wav",
    ] {
        assert!(check_file_name(bad).is_err(), "{bad:?} must be rejected");
    }
    for good in [
        "out.wav",
        "A_b-9.wav",
        "x.wav",
        "figures.json",
        "plot_1.svg",
    ] {
        assert!(check_file_name(good).is_ok(), "{good:?}");
    }
    let dir = tempfile::tempdir().unwrap();
    let inner = dir.path().join("renders");
    let mut out = OutputDir::open(&inner, true).unwrap();
    let sp = spec(Depth::Pcm16, 1, 48_000, 10.0);
    let e = out.write("../escape.wav", sp, &[0.0]).unwrap_err();
    assert!(matches!(e, SignalError::BadName { .. }));
    assert!(!dir.path().join("escape.wav").exists());
    let abs = dir.path().join("abs.wav");
    assert!(out.write(abs.to_str().unwrap(), sp, &[0.0]).is_err());
    assert!(!abs.exists());
}

#[test]
fn listening_gain_hits_target_with_peak_guard() {
    // A sine of peak A has RMS A / sqrt(2) (closed form); dBFS as the figures give it
    // (AES17: a full-scale sine is 0 dBFS, RMS in dBFS = 20 log10(sqrt 2 rms / fs)), so a
    // sine brought to -20 dBFS has its peak at -20 dBFS.
    let fs = 10.0;
    let x: Vec<f64> = (0..48_000)
        .map(|i| (2.0 * PI * 1000.0 * i as f64 / 48_000.0).sin())
        .collect();
    let g = listen_gain(&x, -20.0, fs);
    let rms_db = 20.0 * (2f64.sqrt() * g / 2f64.sqrt() / fs).log10();
    assert!((rms_db + 20.0).abs() < 1e-9, "{rms_db}");
    let peak_db = 20.0 * (g / fs).log10();
    assert!((peak_db + 20.0).abs() < 1e-9, "{peak_db}");
    // A sparse click train: crest factor 20 log10(sqrt(1000)) = 30 dB, so -20 dBFS RMS would
    // put the peak at +10 dBFS; the guard holds it at -1 dBFS.
    let mut clicks = vec![0.0; 48_000];
    for i in (0..clicks.len()).step_by(1000) {
        clicks[i] = 1.0;
    }
    let g = listen_gain(&clicks, -20.0, fs);
    let peak_db = 20.0 * (g / fs).log10();
    assert!((peak_db + 1.0).abs() < 1e-9, "{peak_db}");
    assert_eq!(listen_gain(&[0.0; 10], -20.0, fs), 1.0);
}

#[test]
fn very_short_file_resamples_without_error() {
    // Shorter than the resampler's filter: still converted, padded to the asked length.
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("blip.wav");
    let frames: Vec<Vec<f64>> = (0..10).map(|_| vec![0.25]).collect();
    hound_write(&path, 1, 44_100, 16, false, &frames);
    let y = load_wav(&path, None, 1.0, 48_000.0, 100, false).unwrap();
    assert_eq!(y.len(), 100);
    assert!(y.iter().all(|v| v.is_finite()));
    assert!(y.iter().any(|v| v.abs() > 0.05), "the blip survives");
    // A 64-bit float file is reported as unsupported, naming the file.
    let mut f64_bytes = Vec::new();
    for v in [0.0f64, 0.5] {
        f64_bytes.extend_from_slice(&v.to_le_bytes());
    }
    fs::write(
        dir.path().join("f64.wav"),
        wav_bytes(3, 1, 48_000, 64, &f64_bytes),
    )
    .unwrap();
    let e = load_wav(&dir.path().join("f64.wav"), None, 1.0, 48_000.0, 4, false).unwrap_err();
    let msg = e.to_string();
    assert!(
        msg.contains("f64.wav") && msg.contains("unsupported"),
        "{msg}"
    );
}

#[cfg(unix)]
#[test]
fn manifest_must_be_a_plain_file() {
    // A manifest that is a symbolic link could redirect appends outside the folder.
    let dir = tempfile::tempdir().unwrap();
    let elsewhere = dir.path().join("elsewhere.txt");
    fs::write(&elsewhere, b"keep me\n").unwrap();
    let out = dir.path().join("out");
    fs::create_dir(&out).unwrap();
    std::os::unix::fs::symlink(&elsewhere, out.join(MANIFEST_NAME)).unwrap();
    let e = OutputDir::open(&out, false).unwrap_err();
    assert!(e.to_string().contains(MANIFEST_NAME), "{e}");
    assert_eq!(fs::read(&elsewhere).unwrap(), b"keep me\n");
}
