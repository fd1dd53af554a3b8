//! Studies render only the settle time plus one capture for a stationary patch (issue 13):
//! every figure a sweep point or a tolerance run reports equals the full-length render's
//! within 0.01 dB (the bound). Reference: the same study at the patch's whole length
//! (`StudyLength::Full`, the behaviour before), on the demo's mixer with circuit noise on.

use std::path::Path;

use railsong::analysis::Settings;
use railsong::study::length::{is_stationary, study_frames, StudyLength};
use railsong::study::sweep::{self, PatchText, Spacing};
use railsong::study::tolerance::{self, Tolerances};

/// The demo's mixer: a sine into the unity summer with the master pot (and its 33 pF), then
/// the restoring inverter; 4 s long.
fn mixer() -> String {
    let demo = include_str!("../patches/demo.toml");
    let head = demo.split("[sources.bass]").next().unwrap_or_default();
    format!(
        "{}\n[sources.bar]\nwave = \"sine\"\nfreq = \"659.26 Hz\"\namp = \"3 Vpk\"\n\n\
[stages.mix]\ntype = \"inverting-sum\"\npart = \"jfet-general\"\n\
inputs = [{{ from = \"bar\", r = \"100k\" }}, {{ from = \"bar\", r = \"100k\" }}]\n\
feedback = {{ pot = \"100k\", taper = \"log\", at = 1.0, c = \"33p\" }}\n\n\
[stages.restore]\ntype = \"inverting\"\npart = \"jfet-general\"\nfrom = \"mix\"\nr_in = \"100k\"\nr_fb = \"100k\"\n\n\
[outputs.clean]\nfrom = \"restore\"\nseries = \"1k\"\nload = \"100k\"\n",
        head.replace("length = \"6 s\"", "length = \"4 s\"\nnoise = false")
    )
}

fn db(a: f64, b: f64) -> f64 {
    20.0 * (a / b).abs().log10()
}

#[test]
fn a_stationary_patch_renders_settle_time_plus_one_capture() {
    let text = mixer();
    let p = railsong::patch::parse_str(&text, "mixer.toml", Path::new("."), &[]).unwrap();
    assert!(is_stationary(&p));
    let n = study_frames(&p, StudyLength::Short).expect("shorter than the patch");
    assert!(n < p.frames() / 2, "{n} of {}", p.frames());
    assert_eq!(study_frames(&p, StudyLength::Full), None);
    // the demo itself has an envelope, a sweep and a saw: not stationary, rendered in full
    let demo = railsong::patch::parse_str(
        include_str!("../patches/demo.toml"),
        "demo.toml",
        Path::new("."),
        &[],
    )
    .unwrap();
    assert!(!is_stationary(&demo));
    assert_eq!(study_frames(&demo, StudyLength::Short), None);
}

#[test]
fn sweep_figures_equal_the_full_renders_within_a_hundredth_of_a_db() {
    let text = mixer();
    let src = PatchText {
        text: &text,
        origin: "mixer.toml",
        base_dir: Path::new("."),
        variant: None,
    };
    // from a clean level to well past the rails: THD from the numerical floor (about -190 dB
    // here, where it means nothing and is skipped) up to tens of percent
    let values = sweep::range_values("0.5 Vpk", "14 Vpk", 7, Spacing::Log).unwrap();
    let s = Settings::default();
    let short = sweep::run(
        &src,
        &[],
        "sources.bar.amp",
        &values,
        &s,
        StudyLength::Short,
        &|| {},
    )
    .unwrap();
    let full = sweep::run(
        &src,
        &[],
        "sources.bar.amp",
        &values,
        &s,
        StudyLength::Full,
        &|| {},
    )
    .unwrap();
    let mut worst: f64 = 0.0;
    let mut compared = 0;
    for (a, b) in short.iter().zip(&full) {
        let fa = &a.measurement.outputs["clean"].figures;
        let fb = &b.measurement.outputs["clean"].figures;
        for (name, x, y) in [
            ("thd_percent", fa.thd_percent, fb.thd_percent),
            ("thdn_percent", fa.thdn_percent, fb.thdn_percent),
            ("rms_v", fa.rms_v, fb.rms_v),
            ("peak_v", fa.peak_v, fb.peak_v),
        ] {
            let (x, y) = (x.expect(name), y.expect(name));
            if name.starts_with("thd") && x.max(y) < 1e-4 {
                // below -120 dB: the arithmetic's floor, not a figure of the circuit
                continue;
            }
            compared += 1;
            let d = db(x, y);
            println!("{} {name}: {x:.6e} vs {y:.6e}: {d:+.5} dB", a.value.text);
            worst = worst.max(d.abs());
        }
    }
    assert!(compared >= 7 * 2 + 4, "{compared} figures compared");
    assert!(worst < 0.01, "worst {worst} dB");
}

#[test]
fn tolerance_gains_equal_the_full_renders_within_a_hundredth_of_a_db() {
    let text = mixer();
    // driven past the rails so THD is a figure of the circuit in every run
    let sets = ["sources.bar.amp=11 Vpk".to_string()];
    let p = railsong::patch::parse_str(&text, "mixer.toml", Path::new("."), &sets).unwrap();
    let tol = Tolerances {
        resistor: 0.05,
        capacitor: 0.1,
    };
    let s = Settings::default();
    let a = tolerance::study(&p, &tol, 6, 3, &s, StudyLength::Short, &|| {}).unwrap();
    let b = tolerance::study(&p, &tol, 6, 3, &s, StudyLength::Full, &|| {}).unwrap();
    for (ra, rb) in a.runs.iter().zip(&b.runs) {
        let (ga, gb) = (ra.outputs[0].gain_db, rb.outputs[0].gain_db);
        println!("run {}: {ga:+.5} vs {gb:+.5} dB", ra.run);
        assert!((ga - gb).abs() < 0.01, "run {}: {ga} vs {gb} dB", ra.run);
        let (ta, tb) = (
            ra.outputs[0].thd_percent.unwrap(),
            rb.outputs[0].thd_percent.unwrap(),
        );
        assert!(
            db(ta, tb).abs() < 0.01,
            "run {}: THD {ta} vs {tb} %",
            ra.run
        );
    }
}
