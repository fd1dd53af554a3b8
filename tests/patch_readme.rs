//! The examples in patches/README.md are valid patches (the reference must not drift from the
//! parser).

use std::path::Path;

use railsong::model::{StageKind, Wave};

fn toml_blocks() -> Vec<String> {
    let text =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("patches/README.md"))
            .unwrap();
    let mut blocks = Vec::new();
    let mut cur: Option<String> = None;
    for line in text.lines() {
        match (&mut cur, line.trim_end()) {
            (None, "```toml") => cur = Some(String::new()),
            (Some(b), "```") => {
                blocks.push(std::mem::take(b));
                cur = None;
            }
            (Some(b), l) => {
                b.push_str(l);
                b.push('\n');
            }
            _ => {}
        }
    }
    blocks
}

#[test]
fn the_opening_example_is_a_complete_patch() {
    let blocks = toml_blocks();
    assert!(blocks.len() >= 8);
    let p = railsong::patch::parse_str(&blocks[0], "voice.toml", Path::new("."), &[])
        .unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(p.title, "voice into mixer");
    let names: Vec<&str> = p.stages.iter().map(|s| s.name.as_str()).collect();
    assert_eq!(names, ["mix", "flip"]);
    // The --set examples of the reference apply to it.
    for set in [
        "stages.mix.feedback.at=0.4",
        "stages.mix.inputs[1].r=47k",
        "stages.mix.inputs.1.r=47k",
        "sources.osc.amp=3 Vrms",
        "patch.oversample=16",
        "stages.flip.c_fb=100p",
    ] {
        railsong::patch::parse_str(&blocks[0], "voice.toml", Path::new("."), &[set.into()])
            .unwrap_or_else(|e| panic!("{set}: {e}"));
    }
    let e = railsong::patch::parse_str(
        &blocks[0],
        "voice.toml",
        Path::new("."),
        &["stages.flip.colour=red".into()],
    )
    .unwrap_err();
    assert!(e.to_string().contains("unknown key 'colour'"), "{e}");
}

#[test]
fn the_section_examples_together_form_a_patch() {
    let blocks = toml_blocks();
    // Every block after the first, plus the one source the stage examples read.
    let mut text = blocks[1..].join("\n");
    text.push_str("\n[sources.mic]\nwave = \"sine\"\nfreq = \"1 kHz\"\namp = \"-40 dBu\"\n");
    let p = railsong::patch::parse_str(&text, "sections.toml", Path::new("."), &[])
        .unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(p.rate, 96e3);
    assert!(p
        .sources
        .iter()
        .any(|s| matches!(s.wave, Wave::Multitone { .. })));
    // The reference's claim: "+4 dBu is 1.228 V RMS" [S: 0 dBu = sqrt(0.6) V rms].
    assert!((0.6f64.sqrt() * 10f64.powf(4.0 / 20.0) - 1.228).abs() < 5e-4);
    let level = p.stages.iter().find(|s| s.name == "level").unwrap();
    assert!(matches!(
        level.kind,
        StageKind::InvertingSum { single: true, .. }
    ));
    for v in ["more-gain", "cheap-part"] {
        railsong::patch::parse_str_variant(&text, "sections.toml", Path::new("."), Some(v), &[])
            .unwrap_or_else(|e| panic!("{v}: {e}"));
    }
}
