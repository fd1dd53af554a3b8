//! Progress on a piped stderr (issue 13): a run longer than 2 s prints a line every few
//! seconds with done/total, elapsed time and ETA; `--quiet` prints none. Both renders run at
//! once (a 10-minute patch at 16x oversampling, many seconds of work on any machine); the
//! line is required only when the whole command took well over the 2 s threshold (6 s:
//! the signal render with progress is about half of it, the idle-channel render for the noise
//! figures the other half), so the check does not depend on the machine's speed or load.

use std::process::{Command, Stdio};
use std::time::Instant;

#[test]
fn piped_progress_lines_and_quiet() {
    let dir = tempfile::tempdir().unwrap();
    let patch = dir.path().join("long.toml");
    std::fs::write(
        &patch,
        "[patch]\ntitle = \"progress check\"\nlength = \"600 s\"\noversample = 16\n\n\
[rails]\npos = \"12 V\"\nneg = \"-12 V\"\n\n[sources.a]\nwave = \"sine\"\nfreq = \"440 Hz\"\namp = \"1 Vpk\"\n\n\
[stages.buf]\ntype = \"inverting\"\npart = \"jfet-general\"\nfrom = \"a\"\nr_in = \"10k\"\nr_fb = \"10k\"\n\n\
[outputs.out]\nfrom = \"buf\"\n",
    )
    .unwrap();
    let run = |quiet: bool, out: &str| {
        let mut c = Command::new(env!("CARGO_BIN_EXE_railsong"));
        c.arg("render")
            .arg(&patch)
            .arg("--out")
            .arg(dir.path().join(out))
            .arg("--depth")
            .arg("16")
            .stdout(Stdio::null())
            .stderr(Stdio::piped());
        if quiet {
            c.arg("--quiet");
        }
        c.spawn().unwrap()
    };
    let t = Instant::now();
    let loud = run(false, "loud");
    let quiet = run(true, "quiet");
    let loud = loud.wait_with_output().unwrap();
    let took = t.elapsed().as_secs_f64();
    let quiet = quiet.wait_with_output().unwrap();
    assert!(loud.status.success() && quiet.status.success());
    let err = String::from_utf8_lossy(&loud.stderr);
    let lines: Vec<&str> = err
        .lines()
        .filter(|l| l.starts_with("railsong: rendering "))
        .collect();
    println!("{took:.1} s\n{err}");
    if took > 6.0 {
        assert!(
            !lines.is_empty(),
            "no progress line after {took:.1} s:\n{err}"
        );
    }
    for l in &lines {
        // railsong: rendering 30/600 s of audio, 2.0 s elapsed, ETA 6.0 s
        let (done, rest) = l["railsong: rendering ".len()..].split_once('/').unwrap();
        let done: u64 = done.parse().unwrap();
        assert!(done <= 600, "{l}");
        assert!(rest.starts_with("600 s of audio, "), "{l}");
        assert!(l.contains(" elapsed, ETA "), "{l}");
    }
    let qerr = String::from_utf8_lossy(&quiet.stderr);
    assert!(
        !qerr.contains("railsong: rendering"),
        "--quiet printed:\n{qerr}"
    );
}
