//! Output paths and input files: names become file names only through the strict filter
//! (`[A-Za-z0-9_-]`), nothing is written outside the chosen folder, WAV inputs are only read,
//! and two renders into one folder at once both finish with complete files.
//!
//! WAV header fields checked below: *Multimedia Programming Interface and Data
//! Specifications* 1.0 (1991), RIFF WAVE chunk layout.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::time::SystemTime;

fn railsong(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_railsong"))
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .expect("binary runs")
}

/// Every path under `dir` with its length and modification time.
fn snapshot(dir: &Path) -> BTreeMap<PathBuf, (u64, SystemTime)> {
    let mut out = BTreeMap::new();
    let mut todo = vec![dir.to_path_buf()];
    while let Some(d) = todo.pop() {
        for e in std::fs::read_dir(&d).unwrap() {
            let p = e.unwrap().path();
            let m = std::fs::symlink_metadata(&p).unwrap();
            if m.is_dir() {
                todo.push(p.clone());
            }
            out.insert(p, (m.len(), m.modified().unwrap()));
        }
    }
    out
}

const HEAD: &str = r#"[patch]
length = "0.1 s"

[rails]
pos = "12 V"
neg = "-12 V"

[sources.osc]
wave = "sine"
freq = "1 kHz"
amp = "1 Vpk"
"#;

/// Render `body` (appended to a small valid patch) from `<tmp>/work/p.toml` into
/// `<tmp>/work/out`; check it is refused with exit code 2 and one line containing `expect`,
/// and that neither the temporary folder (the parent of the work folder) nor the work folder
/// gained or changed a file.
fn refused(body: &str, sets: &[&str], expect: &str) {
    let tmp = tempfile::tempdir().unwrap();
    let work = tmp.path().join("work");
    std::fs::create_dir(&work).unwrap();
    let patch = work.join("p.toml");
    std::fs::write(&patch, format!("{HEAD}\n{body}")).unwrap();
    let before = snapshot(tmp.path());
    let out_dir = work.join("out");
    let mut args = vec![
        "render",
        patch.to_str().unwrap(),
        "--out",
        out_dir.to_str().unwrap(),
    ];
    for s in sets {
        args.push("--set");
        args.push(s);
    }
    let out = railsong(&args);
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{body} {sets:?}: {err}");
    assert_eq!(err.trim_end().lines().count(), 1, "{err}");
    assert!(err.contains(expect), "{body} {sets:?}: {err}");
    assert!(err.contains("p.toml"), "names the patch: {err}");
    assert!(!err.contains("panicked"), "{err}");
    let after = snapshot(tmp.path());
    assert_eq!(before, after, "{body} {sets:?}: files changed");
    // and nothing landed next to the temporary folder either
    let parent = tmp.path().parent().unwrap();
    for name in ["x", "x.wav", "out.wav"] {
        let p = parent.join(name);
        assert!(
            std::fs::symlink_metadata(&p).map_or(true, |m| m
                .modified()
                .unwrap()
                .elapsed()
                .map_or(true, |age| age.as_secs() > 60)),
            "{} was written just now",
            p.display()
        );
    }
}

#[test]
fn output_names_that_would_leave_the_folder_are_refused() {
    for name in [
        "\"../x\"",
        "\"a/b\"",
        "\"/tmp/x\"",
        "\"..\"",
        "\".hidden\"",
        "\"a b\"",
        "\"a\\\\b\"",
        "\"C:x\"",
        "\"\"",
    ] {
        refused(
            &format!("[outputs.{name}]\nfrom = \"osc\"\n"),
            &[],
            "letters, digits",
        );
    }
}

#[test]
fn output_file_names_outside_the_strict_filter_are_refused() {
    for (file, expect) in [
        ("/tmp/x", "no folders"),
        ("../x", "no folders"),
        ("../../x.wav", "no folders"),
        ("sub/x.wav", "no folders"),
        ("C:x.wav", "no folders"),
        ("..", "no folders"),
        (".hidden.wav", "letters, digits"),
        ("two.dots.wav", "letters, digits"),
        ("space name.wav", "letters, digits"),
        ("x.json", "letters, digits"),
        ("ünïcode.wav", "letters, digits"),
    ] {
        refused(
            &format!("[outputs.out]\nfrom = \"osc\"\nfile = \"{file}\"\n"),
            &[],
            expect,
        );
    }
    // The same through --set.
    let ok = "[outputs.out]\nfrom = \"osc\"\n";
    refused(ok, &["outputs.out.file=../x"], "no folders");
    refused(ok, &["outputs.out.file=/tmp/x"], "no folders");
    refused(ok, &["outputs.out.file=a.b"], "letters, digits");
}

#[test]
fn two_outputs_with_one_file_name_are_refused() {
    refused(
        "[outputs.a]\nfrom = \"osc\"\nfile = \"take\"\n\n[outputs.b]\nfrom = \"osc\"\nfile = \"take.wav\"\n",
        &[],
        "take.wav",
    );
    refused(
        "[outputs.a]\nfrom = \"osc\"\n\n[outputs.b]\nfrom = \"osc\"\nfile = \"a\"\n",
        &[],
        "a.wav",
    );
}

#[test]
fn accepted_file_names_land_inside_the_folder() {
    let tmp = tempfile::tempdir().unwrap();
    let patch = tmp.path().join("p.toml");
    std::fs::write(
        &patch,
        format!("{HEAD}\n[outputs.out]\nfrom = \"osc\"\nfile = \"Take_2-b\"\n"),
    )
    .unwrap();
    let out_dir = tmp.path().join("out");
    let out = railsong(&[
        "render",
        patch.to_str().unwrap(),
        "--out",
        out_dir.to_str().unwrap(),
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let mut names: Vec<String> = std::fs::read_dir(&out_dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().into_string().unwrap())
        .collect();
    names.sort();
    assert_eq!(names, [".railsong-written", "Take_2-b.wav", "figures.json"]);
}

/// A 16-bit mono PCM file, 48 kHz, with a 440 Hz sine at half scale.
fn write_input(path: &Path) {
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: 48_000,
        bits_per_sample: 16,
        sample_format: hound::SampleFormat::Int,
    };
    let mut w = hound::WavWriter::create(path, spec).unwrap();
    for i in 0..4800 {
        let x = (2.0 * std::f64::consts::PI * 440.0 * i as f64 / 48_000.0).sin();
        w.write_sample((x * 16_000.0) as i16).unwrap();
    }
    w.finalize().unwrap();
}

#[test]
fn wav_inputs_are_only_read() {
    let tmp = tempfile::tempdir().unwrap();
    let input = tmp.path().join("in.wav");
    write_input(&input);
    // Push the modification time into the past so a rewrite within the same second shows.
    let old = SystemTime::now() - std::time::Duration::from_secs(3600);
    std::fs::File::options()
        .write(true)
        .open(&input)
        .unwrap()
        .set_modified(old)
        .unwrap();
    let bytes = std::fs::read(&input).unwrap();
    let mtime = std::fs::metadata(&input).unwrap().modified().unwrap();
    let patch = tmp.path().join("p.toml");
    std::fs::write(
        &patch,
        "[patch]\nlength = \"0.2 s\"\n[rails]\npos = \"12 V\"\nneg = \"-12 V\"\n\
         [sources.clip]\nwave = \"file\"\npath = \"in.wav\"\nloop = true\n\
         [stages.buf]\ntype = \"follower\"\npart = \"ideal\"\nfrom = \"clip\"\n\
         [outputs.out]\nfrom = \"buf\"\n",
    )
    .unwrap();
    // Render into the input's own folder, the worst case for an accidental overwrite.
    let out = railsong(&[
        "render",
        patch.to_str().unwrap(),
        "--out",
        tmp.path().to_str().unwrap(),
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(std::fs::read(&input).unwrap(), bytes);
    assert_eq!(
        std::fs::metadata(&input).unwrap().modified().unwrap(),
        mtime
    );
    assert!(tmp.path().join("out.wav").exists());
}

/// Read a WAV file with hound and check the header agrees with the file length.
fn complete_wav(path: &Path, frames: usize) {
    let len = std::fs::metadata(path).unwrap().len();
    let mut r = hound::WavReader::open(path).unwrap();
    let spec = r.spec();
    assert_eq!(spec.channels, 1);
    assert_eq!(spec.sample_rate, 48_000);
    assert_eq!(r.len() as usize, frames, "{}", path.display());
    let bytes_per = u64::from(spec.bits_per_sample / 8);
    // 44-byte canonical header or a longer one: the data must fill the file to its end.
    assert!(len >= frames as u64 * bytes_per + 44, "{} bytes", len);
    let samples: Vec<i32> = r.samples::<i32>().map(|s| s.unwrap()).collect();
    assert_eq!(samples.len(), frames);
    // a render of a 3 V sine is not silence all the way to the end of the file
    assert!(samples[frames / 2..].iter().any(|&s| s != 0));
}

#[test]
fn two_renders_into_one_folder_at_once_both_finish() {
    let tmp = tempfile::tempdir().unwrap();
    let patch = tmp.path().join("p.toml");
    // Two outputs and 1 s: long enough that the two processes overlap.
    std::fs::write(
        &patch,
        "[patch]\nlength = \"1 s\"\n[rails]\npos = \"12 V\"\nneg = \"-12 V\"\n\
         [sources.osc]\nwave = \"sine\"\nfreq = \"1 kHz\"\namp = \"3 Vpk\"\n\
         [stages.amp]\ntype = \"inverting\"\npart = \"jfet-general\"\nfrom = \"osc\"\n\
         r_in = \"10k\"\nr_fb = \"22k\"\n\
         [outputs.a]\nfrom = \"amp\"\n[outputs.b]\nfrom = \"osc\"\n",
    )
    .unwrap();
    let out_dir = tmp.path().join("out");
    let spawn = || {
        Command::new(env!("CARGO_BIN_EXE_railsong"))
            .args([
                "render",
                patch.to_str().unwrap(),
                "--out",
                out_dir.to_str().unwrap(),
            ])
            .stdout(std::process::Stdio::piped())
            .stderr(std::process::Stdio::piped())
            .spawn()
            .unwrap()
    };
    for _round in 0..2 {
        let (a, b) = (spawn(), spawn());
        for child in [a, b] {
            let out = child.wait_with_output().unwrap();
            assert!(
                out.status.success(),
                "{}",
                String::from_utf8_lossy(&out.stderr)
            );
        }
        for name in ["a.wav", "b.wav"] {
            complete_wav(&out_dir.join(name), 48_000);
        }
        let fig: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(out_dir.join("figures.json")).unwrap())
                .unwrap();
        assert!(fig["outputs"]["a"].is_object());
        // no temporary file left behind by either process
        for e in std::fs::read_dir(&out_dir).unwrap() {
            let n = e.unwrap().file_name().into_string().unwrap();
            assert!(!n.contains(".tmp"), "left over {n}");
        }
    }
}

/// The interleaving that made the second of two concurrent renders fail: both open the folder
/// (empty manifest), the first writes `x.wav`, then the second must still be allowed to
/// replace it, since the manifest on disk now says railsong wrote it.
#[test]
fn a_folder_opened_before_another_render_wrote_may_replace_its_files() {
    use railsong::signal::{Depth, OutputDir, WavSpec};
    let tmp = tempfile::tempdir().unwrap();
    let spec = WavSpec {
        rate: 48_000,
        channels: 1,
        depth: Depth::Pcm24,
        full_scale: 1.0,
        dither_seed: 1,
    };
    let mut first = OutputDir::open(tmp.path(), false).unwrap();
    let mut second = OutputDir::open(tmp.path(), false).unwrap();
    first.write("x.wav", spec, &[0.25; 100]).unwrap();
    first.write_text("figures.json", "{}").unwrap();
    second.check_writable("x.wav").unwrap();
    second.write("x.wav", spec, &[0.5; 200]).unwrap();
    second.write_text("figures.json", "{\"a\": 1}").unwrap();
    complete_wav(&tmp.path().join("x.wav"), 200);
    // A file no railsong process listed is still refused.
    std::fs::write(tmp.path().join("mine.wav"), b"not railsong's").unwrap();
    let third = OutputDir::open(tmp.path(), false).unwrap();
    assert!(third.check_writable("mine.wav").is_err());
}
