//! Wall times of the design studies (not a test): a 200-point input-level sweep of the demo
//! mixer (1 s per point, THD at each point) and a 1000-run tolerance study of the same mixer.
//!
//! `cargo bench --bench study`

#[macro_use]
#[path = "common/out.rs"]
mod out;

use std::path::Path;
use std::time::Instant;

use railsong::analysis::Settings;
use railsong::study::length::StudyLength;
use railsong::study::sweep::{self, PatchText, Spacing};
use railsong::study::tolerance::{self, Tolerances};

/// The demo's mixer alone: the bar voice (a sine, so THD has a fundamental) into the
/// unity summer with the master pot, then the restoring inverter; 1 s long.
fn mixer_patch() -> String {
    let demo = include_str!("../patches/demo.toml");
    // Keep [patch], [rails], the bar source and the two mixer stages, one output.
    let head = demo.split("[sources.bass]").next().unwrap_or_default();
    format!(
        "{}\n[sources.bar]\nwave = \"sine\"\nfreq = \"659.26 Hz\"\namp = \"3 Vpk\"\n\n\
[stages.mix]\ntype = \"inverting-sum\"\npart = \"jfet-general\"\n\
inputs = [{{ from = \"bar\", r = \"100k\" }}, {{ from = \"bar\", r = \"100k\" }}]\n\
feedback = {{ pot = \"100k\", taper = \"log\", at = 1.0, c = \"33p\" }}\n\n\
[stages.restore]\ntype = \"inverting\"\npart = \"jfet-general\"\nfrom = \"mix\"\nr_in = \"100k\"\nr_fb = \"100k\"\n\n\
[outputs.clean]\nfrom = \"restore\"\nseries = \"1k\"\nload = \"100k\"\n",
        head.replace("length = \"6 s\"", "length = \"1 s\"")
    )
}

fn main() {
    let text = mixer_patch();
    let src = PatchText {
        text: &text,
        origin: "demo-mixer.toml",
        base_dir: Path::new("."),
        variant: None,
    };
    let threads = rayon::current_num_threads();
    let values = sweep::range_values("0.1 Vpk", "6 Vpk", 200, Spacing::Log).expect("range");
    let t = Instant::now();
    let pts = sweep::run(
        &src,
        &[],
        "sources.bar.amp",
        &values,
        &Settings::default(),
        StudyLength::default(),
        &|| {},
    )
    .expect("sweep");
    let dt = t.elapsed().as_secs_f64();
    let with_thd = pts
        .iter()
        .filter(|p| p.measurement.outputs["clean"].figures.thd_percent.is_some())
        .count();
    out!(
        "sweep: 200 points x 1 s at 48 kHz x4, {threads} thread(s): {dt:.2} s wall ({:.1} ms per point), THD at {with_thd} points",
        1e3 * dt / 200.0
    );

    let patch =
        railsong::patch::parse_str(&text, "demo-mixer.toml", Path::new("."), &[]).expect("patch");
    let tol = Tolerances {
        resistor: 0.01,
        capacitor: 0.05,
    };
    let t = Instant::now();
    let rep = tolerance::study(
        &patch,
        &tol,
        1000,
        1,
        &Settings::default(),
        StudyLength::default(),
        &|| {},
    )
    .expect("tolerance");
    let dt = t.elapsed().as_secs_f64();
    out!(
        "tolerance: 1000 runs x 1 s, {threads} thread(s): {dt:.2} s wall ({:.1} ms per run); gain spread {:?}",
        1e3 * dt / 1000.0,
        rep.outputs[0].gain_db
    );
}
