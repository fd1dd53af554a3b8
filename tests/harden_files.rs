//! Hardening II, files and processes, through the binary: closed pipes, killed renders,
//! tampered and hard-linked manifests, a busy folder, every target checked before the first
//! write, size limits found before work starts, patch and input files that are not regular
//! files, inputs changed during a render, low-rate and long WAV inputs.
//!
//! WAV layout used to build inputs: Microsoft/IBM Multimedia Programming Interface and Data
//! Specifications 1.0 (1991), RIFF WAVE chunk layout. Signal numbers and their default
//! actions: POSIX.1-2017, <signal.h>.

use std::collections::BTreeSet;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::time::{Duration, Instant};

fn bin() -> Command {
    let mut c = Command::new(env!("CARGO_BIN_EXE_railsong"));
    c.current_dir(env!("CARGO_MANIFEST_DIR"));
    c
}

fn railsong(args: &[&str]) -> Output {
    bin().args(args).output().expect("binary runs")
}

fn names_in(dir: &Path) -> BTreeSet<String> {
    std::fs::read_dir(dir)
        .map(|rd| {
            rd.map(|e| e.unwrap().file_name().into_string().unwrap())
                .collect()
        })
        .unwrap_or_default()
}

fn temps_in(dir: &Path) -> Vec<String> {
    names_in(dir)
        .into_iter()
        .filter(|n| n.contains(".tmp-"))
        .collect()
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

/// Exit 2 with one line naming each of `names`, never a panic.
fn bad(o: &Output, names: &[&str]) -> String {
    let e = stderr(o);
    assert_eq!(o.status.code(), Some(2), "{e}");
    assert!(!e.contains("panicked"), "{e}");
    assert_eq!(e.trim_end().lines().count(), 1, "{e}");
    for n in names {
        assert!(e.contains(n), "lacks `{n}`: {e}");
    }
    e
}

fn ok(o: &Output) {
    assert!(o.status.success(), "{}", stderr(o));
    assert!(!stderr(o).contains("panicked"));
}

const SMALL: &str = "[patch]\nlength = \"0.1 s\"\n[rails]\npos = \"12 V\"\nneg = \"-12 V\"\n\
    [sources.osc]\nwave = \"sine\"\nfreq = \"1 kHz\"\namp = \"AMP\"\n\
    [stages.amp]\ntype = \"inverting\"\npart = \"jfet-general\"\nfrom = \"osc\"\n\
    r_in = \"10k\"\nr_fb = \"22k\"\n[outputs.out]\nfrom = \"amp\"\n";

fn small(dir: &Path, amp: &str) -> PathBuf {
    let p = dir.join("p.toml");
    std::fs::write(&p, SMALL.replace("AMP", amp)).unwrap();
    p
}

fn render(patch: &Path, out: &Path, extra: &[&str]) -> Output {
    let mut args = vec![
        "render",
        patch.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ];
    args.extend_from_slice(extra);
    railsong(&args)
}

/// A command whose stdout is a real pipe whose reading end is already closed: every write
/// fails with EPIPE (SIGPIPE is ignored by Rust programs, so the write returns an error).
fn with_closed_stdout(args: &[&str]) -> Output {
    let (reader, writer) = std::io::pipe().unwrap();
    drop(reader);
    bin()
        .args(args)
        .stdout(writer)
        .stderr(Stdio::piped())
        .output()
        .unwrap()
}

#[test]
fn a_closed_pipe_is_a_quiet_exit_after_every_file_is_written() {
    for args in [
        vec!["parts"],
        vec!["check", "tests/good/mixer.toml"],
        vec!["noise", "tests/good/mixer.toml"],
        vec!["--help"],
    ] {
        let o = with_closed_stdout(&args);
        assert_eq!(o.status.code(), Some(0), "{args:?}: {}", stderr(&o));
        assert!(stderr(&o).is_empty(), "{args:?}: {}", stderr(&o));
    }
    // render: the figures file belongs to the new render, not the old one.
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("out");
    let p = small(tmp.path(), "1 Vpk");
    ok(&render(&p, &out, &[]));
    let peak = |out: &Path| -> f64 {
        let v: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(out.join("figures.json")).unwrap())
                .unwrap();
        v["outputs"]["out"]["peak_v"].as_f64().unwrap()
    };
    // Inverting gain 22k / 10k = 2.2 (textbook closed form): 1 V in, 2.2 V out.
    assert!((peak(&out) - 2.2).abs() < 0.05, "{}", peak(&out));
    let p = small(tmp.path(), "2 Vpk");
    let o = with_closed_stdout(&[
        "render",
        p.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert!((peak(&out) - 4.4).abs() < 0.1, "{}", peak(&out));
    assert!(temps_in(&out).is_empty());
}

/// A render long enough to be stopped while it writes: 8 outputs of 20 s.
fn slow_patch(dir: &Path) -> PathBuf {
    let mut t = String::from(
        "[patch]\nlength = \"20 s\"\noversample = 16\n[rails]\npos = \"12 V\"\nneg = \"-12 V\"\n\
         [sources.osc]\nwave = \"sine\"\nfreq = \"1 kHz\"\namp = \"3 Vpk\"\n\
         [stages.amp]\ntype = \"inverting\"\npart = \"jfet-general\"\nfrom = \"osc\"\n\
         r_in = \"10k\"\nr_fb = \"22k\"\n",
    );
    for k in 0..8 {
        t.push_str(&format!("[outputs.o{k}]\nfrom = \"amp\"\n"));
    }
    let p = dir.join("slow.toml");
    std::fs::write(&p, t).unwrap();
    p
}

fn spawn_render(patch: &Path, out: &Path) -> Child {
    bin()
        // --quiet: a slow machine may print a progress line before the error this checks
        .args([
            "--quiet",
            "render",
            patch.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ])
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap()
}

/// Wait until `dir` holds a temporary file (the render is writing), at most 60 s.
fn wait_for_temp(dir: &Path, child: &mut Child) {
    let t0 = Instant::now();
    while temps_in(dir).is_empty() {
        assert!(
            child.try_wait().unwrap().is_none(),
            "the render ended before it was stopped"
        );
        assert!(
            t0.elapsed() < Duration::from_secs(60),
            "no temporary appeared"
        );
        std::thread::sleep(Duration::from_millis(20));
    }
}

#[test]
fn a_stopped_render_leaves_no_temporary_and_the_next_render_succeeds() {
    let tmp = tempfile::tempdir().unwrap();
    let patch = slow_patch(tmp.path());
    let small_patch = small(tmp.path(), "1 Vpk");
    for sig in [libc::SIGINT, libc::SIGTERM, libc::SIGHUP, libc::SIGKILL] {
        let out = tmp.path().join(format!("out{sig}"));
        let mut child = spawn_render(&patch, &out);
        wait_for_temp(&out, &mut child);
        // SAFETY: kill(2) on the pid of a child this test spawned and has not reaped.
        assert_eq!(unsafe { libc::kill(child.id() as libc::pid_t, sig) }, 0);
        let status = child.wait().unwrap();
        use std::os::unix::process::ExitStatusExt;
        // The default action of each of these signals ends the process (POSIX).
        assert_eq!(status.signal(), Some(sig), "{status:?}");
        if sig == libc::SIGKILL {
            // Nothing can run on SIGKILL: the temporaries stay until the next run.
            assert!(!temps_in(&out).is_empty());
        } else {
            assert!(temps_in(&out).is_empty(), "{sig}: {:?}", temps_in(&out));
        }
        // The next render into the folder removes what is left and succeeds.
        ok(&render(&small_patch, &out, &[]));
        assert!(temps_in(&out).is_empty(), "{:?}", temps_in(&out));
        let r = hound::WavReader::open(out.join("out.wav")).unwrap();
        assert_eq!(r.len(), 4800);
    }
}

#[test]
fn stale_temporaries_with_repeated_pids_are_removed_not_collided_with() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("out");
    std::fs::create_dir(&out).unwrap();
    // What an earlier, killed run in another container (same PIDs) might have left.
    for pid in 1..50 {
        for n in 0..3 {
            std::fs::write(out.join(format!(".out.wav.tmp-{pid}-{n}")), b"partial").unwrap();
            std::fs::write(out.join(format!(".figures.json.tmp-{pid}-{n}")), b"{").unwrap();
        }
    }
    let p = small(tmp.path(), "1 Vpk");
    ok(&render(&p, &out, &[]));
    assert!(temps_in(&out).is_empty());
    assert_eq!(
        names_in(&out),
        [".railsong-written", "figures.json", "out.wav"]
            .into_iter()
            .map(String::from)
            .collect()
    );
}

#[test]
fn a_replaced_or_edited_file_is_not_overwritten_without_force() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("out");
    let p = small(tmp.path(), "1 Vpk");
    ok(&render(&p, &out, &[]));
    ok(&render(&p, &out, &[])); // railsong's own files: replaced freely
    let wav = out.join("out.wav");
    // 1. Replaced by another file (a new inode).
    std::fs::remove_file(&wav).unwrap();
    std::fs::write(&wav, b"my own take").unwrap();
    let o = render(&p, &out, &[]);
    bad(&o, &["out.wav", "--force"]);
    assert_eq!(std::fs::read(&wav).unwrap(), b"my own take");
    ok(&render(&p, &out, &["--force"]));
    assert!(hound::WavReader::open(&wav).is_ok());
    // 2. Edited in place: same inode, same size, new contents and modification time.
    let mut bytes = std::fs::read(&wav).unwrap();
    let n = bytes.len();
    bytes[n - 10..].copy_from_slice(b"0123456789");
    std::thread::sleep(Duration::from_millis(20));
    let mut f = std::fs::OpenOptions::new().write(true).open(&wav).unwrap();
    f.write_all(&bytes).unwrap();
    drop(f);
    let o = render(&p, &out, &[]);
    bad(&o, &["out.wav", "--force"]);
    assert_eq!(std::fs::read(&wav).unwrap(), bytes);
    // 3. The figures file is guarded the same way, and refused before any WAV is written.
    ok(&render(&p, &out, &["--force"]));
    let wav_before = std::fs::read(&wav).unwrap();
    std::fs::write(out.join("figures.json"), b"{\"mine\": true}").unwrap();
    let p2 = small(tmp.path(), "2 Vpk");
    bad(&render(&p2, &out, &[]), &["figures.json"]);
    assert_eq!(std::fs::read(&wav).unwrap(), wav_before);
}

#[test]
fn a_hard_linked_manifest_is_refused_and_the_file_elsewhere_untouched() {
    let tmp = tempfile::tempdir().unwrap();
    let elsewhere = tmp.path().join("elsewhere.txt");
    std::fs::write(&elsewhere, b"keep me\n").unwrap();
    let out = tmp.path().join("out");
    std::fs::create_dir(&out).unwrap();
    std::fs::hard_link(&elsewhere, out.join(".railsong-written")).unwrap();
    let p = small(tmp.path(), "1 Vpk");
    let o = render(&p, &out, &[]);
    let e = stderr(&o);
    assert_ne!(o.status.code(), Some(0), "{e}");
    assert!(!e.contains("panicked"), "{e}");
    assert!(
        e.contains(".railsong-written") && e.contains("hard link"),
        "{e}"
    );
    assert_eq!(std::fs::read(&elsewhere).unwrap(), b"keep me\n");
    assert_eq!(
        names_in(&out),
        [".railsong-written".to_string()].into_iter().collect()
    );
}

#[test]
fn a_busy_folder_is_announced_and_waited_for() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("out");
    let p = small(tmp.path(), "1 Vpk");
    let held = railsong::signal::OutputDir::open(&out, false).unwrap();
    let mut child = spawn_render(&p, &out);
    std::thread::sleep(Duration::from_millis(1500));
    assert!(
        child.try_wait().unwrap().is_none(),
        "the render must wait for the lock"
    );
    assert!(names_in(&out).is_empty(), "{:?}", names_in(&out));
    drop(held);
    let o = child.wait_with_output().unwrap();
    ok(&o);
    assert!(stderr(&o).contains("busy"), "{}", stderr(&o));
    assert!(out.join("out.wav").exists());
}

#[test]
fn every_target_is_checked_before_the_first_file_is_written() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("out");
    std::fs::create_dir(&out).unwrap();
    // A plot file of someone else's under the name render --plots would write last.
    std::fs::write(out.join("out-waveform.svg"), b"<svg/>").unwrap();
    let p = small(tmp.path(), "1 Vpk");
    bad(&render(&p, &out, &["--plots"]), &["out-waveform.svg"]);
    assert_eq!(
        names_in(&out),
        ["out-waveform.svg".to_string()].into_iter().collect()
    );
}

#[test]
fn a_render_no_wav_file_can_hold_is_refused_before_anything_is_written() {
    let tmp = tempfile::tempdir().unwrap();
    // 2000 s at 768 kHz: 16-bit holds it (2 bytes x 1.536e9 frames = 2.9 GiB), 24-bit
    // (4.3 GiB) does not; a WAV file's sizes are 32-bit (RIFF layout).
    let p = tmp.path().join("long.toml");
    std::fs::write(
        &p,
        "[patch]\nrate = \"768 kHz\"\nlength = \"2000 s\"\n[rails]\npos = \"12 V\"\n\
         neg = \"-12 V\"\n[sources.osc]\nwave = \"sine\"\nfreq = \"1 kHz\"\namp = \"1 V\"\n\
         [outputs.out]\nfrom = \"osc\"\n",
    )
    .unwrap();
    let out = tmp.path().join("out");
    let t0 = Instant::now();
    let o = render(&p, &out, &["--long"]);
    bad(
        &o,
        &["long.toml", "outputs.out", "out.wav", "4 GiB", "--depth 16"],
    );
    assert!(!out.exists(), "{:?}", names_in(&out));
    // Refused up front: far from the minutes a 2000 s render takes (a loose bound, not a
    // speed target).
    assert!(t0.elapsed() < Duration::from_secs(30));
    // check says so too, as a warning (the depth is a render flag).
    let o = railsong(&["check", p.to_str().unwrap()]);
    ok(&o);
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(text.contains("[file size] patch.length"), "{text}");
}

#[test]
fn patch_files_are_bounded_and_must_be_regular_files() {
    let tmp = tempfile::tempdir().unwrap();
    // A 17 MiB patch (sparse): refused from its size, not read.
    let big = tmp.path().join("big.toml");
    let f = std::fs::File::create(&big).unwrap();
    f.set_len(17 << 20).unwrap();
    drop(f);
    bad(
        &railsong(&["check", big.to_str().unwrap()]),
        &["big.toml", "16 MiB"],
    );
    // A device that never ends.
    bad(
        &railsong(&["check", "/dev/zero"]),
        &["/dev/zero", "a device"],
    );
    // A FIFO (nobody writes to it: opening it would block forever).
    let fifo = tmp.path().join("fifo.toml");
    let c = std::ffi::CString::new(fifo.to_str().unwrap()).unwrap();
    // SAFETY: mkfifo(3) with a valid NUL-terminated path.
    assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o600) }, 0);
    bad(
        &railsong(&["check", fifo.to_str().unwrap()]),
        &["fifo.toml", "FIFO"],
    );
    bad(
        &railsong(&["check", tmp.path().to_str().unwrap()]),
        &["a folder"],
    );
}

/// A patch playing `input` through a follower for `length`.
fn file_patch(dir: &Path, input: &str, length: &str, extra: &str) -> PathBuf {
    let p = dir.join("f.toml");
    std::fs::write(
        &p,
        format!(
            "[patch]\nlength = \"{length}\"\n{extra}[rails]\npos = \"12 V\"\nneg = \"-12 V\"\n\
             [sources.clip]\nwave = \"file\"\npath = \"{input}\"\n\
             [stages.buf]\ntype = \"follower\"\npart = \"ideal\"\nfrom = \"clip\"\n\
             [outputs.out]\nfrom = \"buf\"\n"
        ),
    )
    .unwrap();
    p
}

#[test]
fn a_fifo_or_a_device_as_wav_input_is_named_as_such() {
    let tmp = tempfile::tempdir().unwrap();
    let fifo = tmp.path().join("in.wav");
    let c = std::ffi::CString::new(fifo.to_str().unwrap()).unwrap();
    // SAFETY: mkfifo(3) with a valid NUL-terminated path.
    assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o600) }, 0);
    let out = tmp.path().join("out");
    let p = file_patch(tmp.path(), "in.wav", "0.1 s", "");
    let e = bad(
        &render(&p, &out, &[]),
        &["in.wav", "FIFO", "sources.clip.path"],
    );
    assert!(!e.contains("empty"), "{e}");
    let p = file_patch(tmp.path(), "/dev/null", "0.1 s", "");
    let e = bad(&render(&p, &out, &[]), &["/dev/null", "character device"]);
    assert!(!e.contains("empty"), "{e}");
    assert!(names_in(&out).is_empty());
}

/// A mono 32-bit float WAV of `frames` frames at `rate`, a 0.5 full-scale 100 Hz sine... or
/// whatever `sample` gives.
fn float_wav(path: &Path, rate: u32, frames: usize, sample: impl Fn(usize) -> f32) {
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: rate,
        bits_per_sample: 32,
        sample_format: hound::SampleFormat::Float,
    };
    let mut w = hound::WavWriter::create(path, spec).unwrap();
    for i in 0..frames {
        w.write_sample(sample(i)).unwrap();
    }
    w.finalize().unwrap();
}

#[test]
fn only_the_part_of_an_input_a_render_plays_is_read() {
    let tmp = tempfile::tempdir().unwrap();
    // 60 s at 48 kHz, a NaN in its last second: a render that plays 0.1 s never reaches it,
    // a render that plays all of it is refused naming the sample.
    let n = 48_000 * 60;
    float_wav(&tmp.path().join("long.wav"), 48_000, n, |i| {
        if i == n - 100 {
            f32::NAN
        } else {
            0.25
        }
    });
    let out = tmp.path().join("out");
    let p = file_patch(tmp.path(), "long.wav", "0.1 s", "");
    ok(&render(&p, &out, &[]));
    let out2 = tmp.path().join("out2");
    let p = file_patch(tmp.path(), "long.wav", "61 s", "oversample = 1\n");
    bad(
        &render(&p, &out2, &[]),
        &["long.wav", "not a finite number"],
    );
}

/// Peak resident memory of the children this process has waited for, bytes (Linux reports
/// ru_maxrss in KiB: getrusage(2)).
fn children_max_rss() -> u64 {
    // SAFETY: getrusage(2) fills the zeroed struct it is given.
    let mut ru: libc::rusage = unsafe { std::mem::zeroed() };
    assert_eq!(
        unsafe { libc::getrusage(libc::RUSAGE_CHILDREN, &mut ru) },
        0
    );
    ru.ru_maxrss as u64 * 1024
}

#[test]
fn a_low_rate_input_in_a_high_rate_patch_keeps_memory_bounded() {
    let tmp = tempfile::tempdir().unwrap();
    // 100 Hz (the lowest rate accepted) into 768 kHz x 16: a resampling ratio of 122 880.
    // One 4096-frame read used to make 4096 x 122 880 samples (3.8 GB with the resampler's
    // buffers).
    float_wav(&tmp.path().join("slow.wav"), 100, 400, |i| {
        (i as f32 * 0.3).sin() * 0.5
    });
    let p = file_patch(
        tmp.path(),
        "slow.wav",
        "0.05 s",
        "rate = \"768 kHz\"\noversample = 16\n",
    );
    let out = tmp.path().join("out");
    let o = bin()
        .args([
            "render",
            p.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ])
        .output()
        .unwrap();
    ok(&o);
    let rss = children_max_rss();
    // A bound far above what the render needs (about 100 MB) and far below 3.8 GB.
    assert!(rss < 600 << 20, "peak RSS {} MiB", rss >> 20);
}

#[test]
fn an_input_changed_during_a_render_fails_clearly() {
    let tmp = tempfile::tempdir().unwrap();
    let input = tmp.path().join("in.wav");
    float_wav(&input, 48_000, 48_000, |i| ((i as f32) * 0.05).sin() * 0.5);
    let mut t = std::fs::read_to_string(file_patch(
        tmp.path(),
        "in.wav",
        "20 s",
        "oversample = 16\n",
    ))
    .unwrap();
    for k in 1..8 {
        t.push_str(&format!("[outputs.o{k}]\nfrom = \"buf\"\n"));
    }
    let p = tmp.path().join("f.toml");
    std::fs::write(&p, t).unwrap();
    let out = tmp.path().join("out");
    let mut child = spawn_render(&p, &out);
    wait_for_temp(&out, &mut child);
    // Wait until samples reach a temporary: the render is past its start and reading.
    let t0 = Instant::now();
    while !std::fs::read_dir(&out).unwrap().any(|e| {
        let e = e.unwrap();
        e.file_name().to_string_lossy().contains(".tmp-")
            && e.metadata().is_ok_and(|m| m.len() > 64 << 10)
    }) {
        assert!(
            child.try_wait().unwrap().is_none(),
            "the render ended first"
        );
        assert!(t0.elapsed() < Duration::from_secs(60), "no samples written");
        std::thread::sleep(Duration::from_millis(20));
    }
    // Another program rewrites the input while it plays.
    float_wav(&input, 48_000, 24_000, |_| 0.0);
    let o = child.wait_with_output().unwrap();
    let e = bad(&o, &["in.wav", "changed", "sources.clip.path"]);
    assert!(!e.contains("panicked"));
    assert!(temps_in(&out).is_empty());
    assert!(!out.join("out.wav").exists());
}

#[test]
fn messages_escape_control_characters_and_print_numbers_readably() {
    let tmp = tempfile::tempdir().unwrap();
    let p = tmp.path().join("p.toml");
    std::fs::write(
        &p,
        SMALL
            .replace("AMP", "1 V")
            .replace("r_in = \"10k\"", "r_in = \"47\\u001b[31m\\nq\""),
    )
    .unwrap();
    let e = bad(
        &railsong(&["check", p.to_str().unwrap()]),
        &["stages.amp.r_in", "\\u{1b}", "\\n"],
    );
    assert!(!e.contains('\u{1b}'), "{e:?}");
    // A figure too small for an SI prefix is written in scientific notation.
    let t = railsong::units::fmt_eng(1e-300, "Hz");
    assert!(t.len() < 16 && t.contains("e-300"), "{t}");
    assert_eq!(railsong::units::fmt_eng(4.7e3, "ohm"), "4.7 kohm");
    // --set on the variants is refused, as the same in the file is.
    let o = railsong(&["check", "tests/good/mixer.toml", "--set", "variants=1"]);
    bad(&o, &["--set 'variants=1'", "variants cannot be changed"]);
    let o = railsong(&["check", "tests/good/mixer.toml", "--set", "variants.x.a=1"]);
    bad(&o, &["variants"]);
}

#[test]
fn a_part_that_cannot_swing_into_a_tiny_load_renders_inside_its_window() {
    // A single-supply part whose output cannot come within 1 V of the 0 V rail, current
    // limited to 20 mA into 1 ohm (20 mV): the limits cross; check panicked on the reversed
    // clamp and render printed NaN. The window closes at the swing limit (1 V).
    let tmp = tempfile::tempdir().unwrap();
    let p = tmp.path().join("p.toml");
    std::fs::write(
        &p,
        "[patch]\nlength = \"0.05 s\"\n[rails]\npos = \"5 V\"\nneg = \"0 V\"\n\
         [parts.low]\nbased_on = \"single-supply\"\ndrop_neg = \"1 V\"\nisc = \"20 mA\"\n\
         [sources.s]\nwave = \"sine\"\nfreq = \"1 kHz\"\namp = \"1 V\"\noffset = \"2.5 V\"\n\
         [stages.a]\ntype = \"follower\"\npart = \"low\"\nfrom = \"s\"\n\
         [outputs.out]\nfrom = \"a\"\nload = \"1R\"\n",
    )
    .unwrap();
    let o = railsong(&["check", p.to_str().unwrap()]);
    ok(&o);
    let text = String::from_utf8_lossy(&o.stdout).to_string();
    assert!(text.contains("1 V .. 1 V"), "{text}");
    let out = tmp.path().join("out");
    // No edge fade, so every sample of the file is the stage's output.
    let o = render(&p, &out, &["--fade", "0"]);
    ok(&o);
    let text = String::from_utf8_lossy(&o.stdout).to_string();
    assert!(!text.contains("NaN") && !text.contains("inf"), "{text}");
    let r = hound::WavReader::open(out.join("out.wav")).unwrap();
    let fs = 1.25 * 5.0; // default full scale: 1.25 x the larger rail
    for s in r.into_samples::<i32>() {
        let v = f64::from(s.unwrap()) / 8_388_608.0 * fs;
        assert!((v - 1.0).abs() < 0.01, "{v}");
    }
}

#[test]
fn check_refuses_what_render_would_refuse_in_wav_inputs() {
    let tmp = tempfile::tempdir().unwrap();
    let p = file_patch(tmp.path(), "missing.wav", "0.1 s", "");
    let c = bad(
        &railsong(&["check", p.to_str().unwrap()]),
        &["sources.clip.path", "missing.wav"],
    );
    let out = tmp.path().join("out");
    let r = bad(&render(&p, &out, &[]), &["sources.clip.path"]);
    assert_eq!(c, r, "check and render give the same message");
}

#[test]
fn a_foreign_variant_file_is_refused_before_the_base_render_writes() {
    let tmp = tempfile::tempdir().unwrap();
    let p = tmp.path().join("v.toml");
    std::fs::write(
        &p,
        format!(
            "{}\n[variants.hot]\n\"sources.osc.amp\" = \"2 V\"\n",
            SMALL.replace("AMP", "1 V")
        ),
    )
    .unwrap();
    let out = tmp.path().join("out");
    std::fs::create_dir(&out).unwrap();
    std::fs::write(out.join("out-hot.wav"), b"not railsong's").unwrap();
    bad(&render(&p, &out, &[]), &["out-hot.wav", "--force"]);
    assert_eq!(
        names_in(&out),
        ["out-hot.wav".to_string()].into_iter().collect()
    );
    ok(&render(&p, &out, &["--force"]));
    assert!(out.join("out.wav").exists() && out.join("figures-hot.json").exists());
}

#[test]
fn two_renders_at_once_never_leave_a_mix_of_both_runs() {
    // Two patches that differ in level (1 V and 2 V in, gain 22k / 10k = 2.2: textbook
    // inverting gain) render into one folder at the same time, again and again. The lock
    // runs them one after the other: every file in the folder comes from one run, the last.
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("out");
    let two = |amp: &str, name: &str| {
        let p = tmp.path().join(name);
        std::fs::write(
            &p,
            SMALL.replace("AMP", amp).replace("0.1 s", "0.3 s")
                + "[outputs.direct]\nfrom = \"osc\"\n",
        )
        .unwrap();
        p
    };
    let (pa, pb) = (two("1 V", "a.toml"), two("2 V", "b.toml"));
    // Default full scale: 1.25 x the larger rail (12 V).
    let wav_peak = |name: &str| -> f64 {
        let r = hound::WavReader::open(out.join(name)).unwrap();
        r.into_samples::<i32>()
            .map(|s| f64::from(s.unwrap()).abs() / 8_388_608.0 * 15.0)
            .fold(0.0, f64::max)
    };
    for _ in 0..6 {
        let (a, b) = (spawn_render(&pa, &out), spawn_render(&pb, &out));
        for c in [a, b] {
            ok(&c.wait_with_output().unwrap());
        }
        let fig: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(out.join("figures.json")).unwrap())
                .unwrap();
        let level = fig["outputs"]["direct"]["peak_v"].as_f64().unwrap();
        assert!(
            (level - 1.0).abs() < 0.05 || (level - 2.0).abs() < 0.05,
            "{level}"
        );
        assert!((wav_peak("direct.wav") - level).abs() < 0.05, "direct.wav");
        assert!((wav_peak("out.wav") - 2.2 * level).abs() < 0.1, "out.wav");
        assert!(temps_in(&out).is_empty());
    }
}

#[test]
fn long_patches_cost_no_more_work_than_the_command_needs() {
    let tmp = tempfile::tempdir().unwrap();
    let p = tmp.path().join("hour.toml");
    std::fs::write(&p, SMALL.replace("AMP", "1 V").replace("0.1 s", "3600 s")).unwrap();
    // noise: the simulated figure comes from an idle render capped at 10 s (the figure is
    // taken from the kept tail), not from an hour of audio.
    let o = railsong(&["noise", p.to_str().unwrap()]);
    ok(&o);
    let text = String::from_utf8_lossy(&o.stdout).to_string();
    assert!(text.contains("from a 10 s idle render"), "{text}");
    // tolerance renders the whole patch for every run: the 10-minute limit holds there too.
    bad(
        &railsong(&["tolerance", p.to_str().unwrap(), "--runs", "2"]),
        &["patch.length", "--long"],
    );
}
