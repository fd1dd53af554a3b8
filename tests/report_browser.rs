//! The listening page in a real browser: `railsong report` writes one self-contained HTML
//! file; headless Chromium opens it from a file:// URL (no network), runs its one inline
//! script, and the DOM must hold every plot and player with every audio source loaded. A
//! screenshot is saved beside the page. Every plot written with --plots is parsed as XML and
//! must carry its expected series.
//!
//! `.ci/run` installs Debian's chromium. Outside CI, a machine without chromium skips the
//! browser half with a printed reason (the SVG half always runs).

#[path = "plot_xml.rs"]
mod plot_xml;

use std::path::Path;
use std::process::Command;

fn railsong(args: &[&str]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_railsong"))
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .expect("binary runs")
}

fn chromium() -> Option<&'static str> {
    ["chromium", "chromium-browser"].into_iter().find(|c| {
        Command::new(c)
            .arg("--version")
            .output()
            .is_ok_and(|o| o.status.success())
    })
}

fn headless(browser: &str, profile: &Path) -> Command {
    let mut c = Command::new(browser);
    c.args([
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--no-first-run",
        "--mute-audio",
    ])
    .arg(format!("--user-data-dir={}", profile.display()));
    c
}

#[test]
fn report_page_loads_every_plot_and_player_in_a_browser() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path().to_str().unwrap();
    let out = railsong(&["report", "patches/demo.toml", "--out", d, "--plots"]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let page = dir.path().join("report.html");
    let html = std::fs::read_to_string(&page).unwrap();
    // Self-contained: nothing is fetched from anywhere.
    assert!(
        !html.contains("http://") && !html.contains("https://") || !html.contains("src=\"http")
    );
    assert!(!html.contains("<link"));
    let outputs = ["clean", "rails", "reversal"];

    // Every plot file is well-formed SVG with its series (XML 1.0 well-formedness).
    for o in outputs {
        for kind in ["spectrum", "waveform", "transfer"] {
            let p = dir.path().join(format!("{o}-{kind}.svg"));
            let svg =
                std::fs::read_to_string(&p).unwrap_or_else(|_| panic!("{} missing", p.display()));
            let root = plot_xml::parse(&svg).unwrap_or_else(|e| panic!("{}: {e}", p.display()));
            assert_eq!(root.name, "svg");
            let want = match kind {
                "spectrum" => "spectrum",
                "waveform" => "output",
                _ => "transfer",
            };
            assert!(
                root.descendants()
                    .iter()
                    .any(|e| e.attr("data-series") == Some(want)),
                "{}: no series {want}",
                p.display()
            );
        }
    }
    // The reversal output's waveform shades the reversed spans (common practice: a
    // JFET-input follower reverses below about V- + 4 V).
    let svg = std::fs::read_to_string(dir.path().join("reversal-waveform.svg")).unwrap();
    assert!(svg.contains("reversed"), "no reversal span drawn");

    let Some(browser) = chromium() else {
        assert!(
            std::env::var_os("CI").is_none(),
            "chromium is missing on CI: .ci/run must install it"
        );
        eprintln!("skipping the browser half: chromium is not installed (CI installs it)");
        return;
    };
    let url = format!("file://{}", page.display());
    let profile = tempfile::tempdir().unwrap();
    let dom = headless(browser, profile.path())
        .args(["--virtual-time-budget=20000", "--dump-dom", &url])
        .output()
        .expect("chromium runs");
    let dom = String::from_utf8_lossy(&dom.stdout);
    let body = dom
        .split("<body")
        .nth(1)
        .and_then(|b| b.split('>').next())
        .unwrap_or_else(|| panic!("no body in the DOM: {}", &dom[..dom.len().min(500)]));
    let attr = |k: &str| {
        body.split(&format!("{k}=\""))
            .nth(1)
            .and_then(|r| r.split('"').next())
            .and_then(|v| v.parse::<usize>().ok())
            .unwrap_or_else(|| panic!("body has no {k}: {body}"))
    };
    assert_eq!(attr("data-players"), outputs.len());
    assert_eq!(attr("data-audio-loaded"), outputs.len(), "{body}");
    assert_eq!(attr("data-audio-failed"), 0, "{body}");
    assert_eq!(dom.matches("<audio").count(), outputs.len());
    for o in outputs {
        for kind in ["spectrum", "waveform", "transfer"] {
            let tag = format!("data-output=\"{o}\" data-kind=\"{kind}\"");
            assert!(dom.contains(&tag), "DOM lacks plot {o} {kind}");
        }
    }
    assert!(dom.matches("<svg").count() >= 9);

    let shot = dir.path().join("report.png");
    let profile2 = tempfile::tempdir().unwrap();
    let st = headless(browser, profile2.path())
        .args([
            "--window-size=1200,2400",
            &format!("--screenshot={}", shot.display()),
            &url,
        ])
        .output()
        .expect("chromium runs");
    assert!(st.status.success());
    let png = std::fs::read(&shot).unwrap();
    assert_eq!(&png[..8], b"\x89PNG\r\n\x1a\n");
    // keep a copy for people to look at
    let keep = Path::new(env!("CARGO_TARGET_TMPDIR")).join("report.png");
    let _ = std::fs::copy(&shot, keep);
}

// A light page (issue 13): above 5 MB of embedded audio (here three outputs of 20 s: about
// 7.7 MB of base64 16-bit WAV) the page links WAV files written beside it, stays small, and
// every player still loads in the browser from the file:// page.
#[test]
fn a_long_report_links_its_audio_and_the_players_load() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path().to_str().unwrap();
    let out = railsong(&[
        "report",
        "patches/demo.toml",
        "--out",
        d,
        "--set",
        "patch.length=20 s",
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let page = dir.path().join("report.html");
    let html = std::fs::read_to_string(&page).unwrap();
    assert!(!html.contains("data:audio"), "audio still embedded");
    assert!(html.len() < 1_000_000, "page of {} bytes", html.len());
    let outputs = ["clean", "rails", "reversal"];
    for (i, o) in outputs.iter().enumerate() {
        let name = format!("listen-{}-{o}.wav", i + 1);
        assert!(
            html.contains(&format!("src=\"{name}\"")),
            "no link to {name}"
        );
        // a complete 16-bit WAV of the whole 20 s (read back with hound, a general library)
        let r = hound::WavReader::open(dir.path().join(&name)).unwrap();
        assert_eq!(r.spec().bits_per_sample, 16);
        assert_eq!(r.duration(), 20 * 48_000);
    }
    let Some(browser) = chromium() else {
        assert!(
            std::env::var_os("CI").is_none(),
            "chromium is missing on CI: .ci/run must install it"
        );
        eprintln!("skipping the browser half: chromium is not installed (CI installs it)");
        return;
    };
    let url = format!("file://{}", page.display());
    let profile = tempfile::tempdir().unwrap();
    let dom = headless(browser, profile.path())
        .args(["--virtual-time-budget=20000", "--dump-dom", &url])
        .output()
        .expect("chromium runs");
    let dom = String::from_utf8_lossy(&dom.stdout);
    let body = dom
        .split("<body")
        .nth(1)
        .and_then(|b| b.split('>').next())
        .unwrap_or_else(|| panic!("no body in the DOM: {}", &dom[..dom.len().min(500)]));
    let attr = |k: &str| {
        body.split(&format!("{k}=\""))
            .nth(1)
            .and_then(|r| r.split('"').next())
            .and_then(|v| v.parse::<usize>().ok())
            .unwrap_or_else(|| panic!("body has no {k}: {body}"))
    };
    assert_eq!(attr("data-audio-loaded"), outputs.len(), "{body}");
    assert_eq!(attr("data-audio-failed"), 0, "{body}");
}

// Inverting gain -Rf/Rin (textbook): the "hot" variant has 3.3 times the feedback resistor,
// so before clipping it would be 10.4 dB louder; matched by RMS, B comes back down by about
// that much (a little less, since it clips on the rails).
#[test]
fn comparison_page_has_the_four_players_and_the_differences() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path().to_str().unwrap();
    let out = railsong(&[
        "report",
        "patches/ab-feedback.toml",
        "--a",
        "base",
        "--b",
        "hot",
        "--out",
        d,
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let html = std::fs::read_to_string(dir.path().join("report.html")).unwrap();
    assert_eq!(html.matches("<audio").count(), 4);
    for label in ["main A", "main B", "main A/B", "main difference"] {
        assert!(html.contains(&format!("data-name=\"{label}\"")), "{label}");
    }
    assert!(html.contains("class=\"comparison\""));
    assert!(html.contains("B clips for"));
    // both sides' figures and plots, labelled A and B (issue 12)
    assert!(html.contains("<h2>Figures: A (base)</h2>"), "A's figures");
    assert!(html.contains("<h2>Figures: B (hot)</h2>"), "B's figures");
    assert!(html.contains("id=\"figures-b\" data-side=\"B\""));
    for side in ["A", "B"] {
        let plots = html.matches(&format!("data-side=\"{side}\"><svg")).count();
        assert!(plots >= 3, "{plots} plots of side {side}");
    }
    assert!(html.contains("A (base): main: spectrum") && html.contains("B (hot): main: spectrum"));
    let gain: f64 = html
        .split("gain <b>")
        .nth(1)
        .and_then(|r| r.split(" dB").next())
        .and_then(|g| g.trim().parse().ok())
        .expect("matching gain on the page");
    let ideal = -20.0 * 3.3f64.log10();
    assert!(
        gain < 0.0 && gain > ideal - 0.5 && gain < ideal + 3.0,
        "{gain} vs {ideal}"
    );
}

// The follower's swing limit is 12 V - 1.3 V = 10.7 V (bipolar-lownoise, from memory): THD
// crosses 0.1 % and 1 % just below it, and the sweep plot marks both crossings. The tolerance histogram
// holds every run (Freedman-Diaconis bins).
#[test]
fn sweep_and_tolerance_plots_are_valid_svg_with_their_marks() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path().to_str().unwrap();
    let out = railsong(&[
        "sweep",
        "patches/reversal-buffer.toml",
        "--set",
        "sources.osc.amp=2Vpk..11Vpk",
        "--steps",
        "6",
        "--log",
        "--with",
        "stages.buffer.part=bipolar-lownoise",
        "--plots",
        "--out",
        d,
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let svg = std::fs::read_to_string(dir.path().join("folded-sweep-thd_percent.svg")).unwrap();
    let root = plot_xml::parse(&svg).unwrap();
    let crossing = root.by_class("crossing");
    // both THD levels are crossed inside the sweep: each found crossing is marked
    assert_eq!(crossing.len(), 2, "the 0.1 % and the 1 % crossing");
    let out = railsong(&[
        "tolerance",
        "patches/clean-mix.toml",
        "--runs",
        "40",
        "--plots",
        "--out",
        d,
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let svg = std::fs::read_to_string(dir.path().join("main-tolerance-gain.svg")).unwrap();
    let root = plot_xml::parse(&svg).unwrap();
    let counted: f64 = root
        .descendants()
        .iter()
        .filter(|e| e.has_class("bin"))
        .map(|e| e.num("data-count"))
        .sum();
    assert_eq!(counted, 40.0);
}

// Sweep plots name their axes by figure and key, with units, and tick resistor values in
// engineering notation ("100k", not "100000"; common practice of engineering notation).
#[test]
fn sweep_plot_axes_are_named_with_units_and_engineering_ticks() {
    let dir = tempfile::tempdir().unwrap();
    let patch = dir.path().join("gain.toml");
    std::fs::write(
        &patch,
        r#"
[patch]
length = "0.3 s"
noise = false

[rails]
pos = "12 V"
neg = "-12 V"

[sources.osc]
wave = "sine"
freq = "1 kHz"
amp = "0.1 Vpk"

[stages.amp]
type = "inverting"
part = "bipolar-lownoise"
from = "osc"
r_in = "10k"
r_fb = "10k"

[outputs.out]
from = "amp"
"#,
    )
    .unwrap();
    let d = dir.path().join("plots");
    let out = railsong(&[
        "sweep",
        patch.to_str().unwrap(),
        "--set",
        "stages.amp.r_fb=10k..1M",
        "--steps",
        "3",
        "--log",
        "--figure",
        "thd_percent,peak_v",
        "--plots",
        "--out",
        d.to_str().unwrap(),
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let svg = std::fs::read_to_string(d.join("out-sweep-peak_v.svg")).unwrap();
    plot_xml::parse(&svg).unwrap();
    assert!(svg.contains(">peak (V)<"), "y axis named with its unit");
    assert!(
        svg.contains(">stages.amp.r_fb (ohm)<"),
        "x axis named with its unit"
    );
    assert!(svg.contains(">100k<"), "engineering ticks");
    assert!(!svg.contains(">100000<"));
}
