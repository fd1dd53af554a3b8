//! `--set PATH=VALUE` overrides on real patch files.
//! Expected values: IEC 60062 codes (47k, 2k2) [S]; taper law from parts::taper docs [D].

use std::path::{Path, PathBuf};

use railsong::model::{Node, Patch, StageKind, Taper, Wave};
use railsong::patch::{load, load_variant, PatchError};

fn file(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/good")
        .join(name)
}

fn with(name: &str, sets: &[&str]) -> Result<Patch, PatchError> {
    let sets: Vec<String> = sets.iter().map(|s| s.to_string()).collect();
    load(&file(name), &sets)
}

fn sum_kind(p: &Patch, name: &str) -> StageKind {
    p.stages
        .iter()
        .find(|s| s.name == name)
        .unwrap()
        .kind
        .clone()
}

#[test]
fn numeric_values() {
    let p = with(
        "mixer.toml",
        &["patch.oversample=16", "patch.seed=7", "patch.rate=48000"],
    )
    .unwrap();
    assert_eq!((p.oversample, p.seed, p.rate), (16, 7, 48e3));
    // A float pot position: r = track * law(mid, at) [D].
    let p = with("mixer.toml", &["stages.sum.feedback.at=0.25"]).unwrap();
    let b: f64 = (1.0f64 / 0.1 - 1.0).powi(2);
    let want = 100e3 * (b.powf(0.25) - 1.0) / (b - 1.0);
    match sum_kind(&p, "sum") {
        StageKind::InvertingSum { feedback, .. } => {
            assert!((feedback.r - want).abs() < 1e-9 * want);
            assert_eq!(feedback.pot.unwrap().taper, Taper::Log { mid: 0.1 });
        }
        k => panic!("{k:?}"),
    }
}

#[test]
fn array_index_in_both_spellings() {
    let p = with(
        "mixer.toml",
        &["stages.sum.inputs[1].r=47k", "stages.sum.inputs.2.r=2k2"],
    )
    .unwrap();
    match sum_kind(&p, "sum") {
        StageKind::InvertingSum { inputs, .. } => {
            let rs: Vec<f64> = inputs.iter().map(|i| i.r).collect();
            assert_eq!(rs, [100e3, 47e3, 2.2e3]);
        }
        k => panic!("{k:?}"),
    }
}

#[test]
fn string_values() {
    // The amplitude stays "10 Vpp"; as a square (crest factor 1) that is still 5 V peak.
    let p = with(
        "mixer.toml",
        &[
            "sources.bass.wave=square",
            "patch.title=Late-night mix",
            "stages.restore.from=bass",
        ],
    )
    .unwrap();
    assert!(matches!(p.sources[0].wave, Wave::Square { amp, .. } if amp == 5.0));
    assert_eq!(p.title, "Late-night mix");
    match sum_kind(&p, "restore") {
        StageKind::InvertingSum { inputs, .. } => assert_eq!(inputs[0].from, Node::Source(0)),
        k => panic!("{k:?}"),
    }
    // A quoted number stays a string.
    let p = with("mixer.toml", &["patch.title=\"2024\""]).unwrap();
    assert_eq!(p.title, "2024");
}

#[test]
fn a_new_leaf_is_allowed_where_the_table_has_that_key() {
    let p = with("mixer.toml", &["stages.restore.c_in=1u"]).unwrap();
    match sum_kind(&p, "restore") {
        StageKind::InvertingSum { inputs, .. } => assert_eq!(inputs[0].c, Some(1e-6)),
        k => panic!("{k:?}"),
    }
}

#[test]
fn unknown_paths_are_errors_that_name_the_path() {
    let e = with("mixer.toml", &["stages.sum.feedbak.r=1k"]).unwrap_err();
    let m = e.to_string();
    assert!(m.contains("--set 'stages.sum.feedbak.r=1k'"), "{m}");
    assert!(
        m.contains("'stages.sum.feedbak' does not exist (did you mean 'feedback'?)"),
        "{m}"
    );
    assert_eq!(e.exit_code(), 2);

    let e = with("mixer.toml", &["stages.nosuch.r_in=1k"]).unwrap_err();
    assert!(
        e.to_string().contains("'stages.nosuch' does not exist"),
        "{e}"
    );

    let e = with("mixer.toml", &["stages.sum.inputs[3].r=1k"]).unwrap_err();
    assert!(e.to_string().contains("has 3 elements"), "{e}");

    let e = with("mixer.toml", &["stages.restore.bogus=1"]).unwrap_err();
    assert!(
        e.to_string()
            .contains("stages.restore: unknown key 'bogus'"),
        "{e}"
    );

    let e = with("mixer.toml", &["patch.oversample"]).unwrap_err();
    assert!(e.to_string().contains("expected PATH=VALUE"), "{e}");
}

#[test]
fn a_bad_value_given_with_set_is_marked_as_such() {
    let e = with("mixer.toml", &["stages.sum.inputs[1].r=47q"]).unwrap_err();
    let m = e.to_string();
    assert!(
        m.ends_with(
            "mixer.toml: --set stages.sum.inputs[1].r: expected a resistance like 47k, got '47q'"
        ),
        "{m}"
    );
    assert_eq!(e.line(), None);
    // A type change that the key cannot take.
    let e = with("mixer.toml", &["patch.noise=3"]).unwrap_err();
    assert!(
        e.to_string()
            .contains("patch.noise: expected true or false, got the integer 3"),
        "{e}"
    );
}

#[test]
fn set_values_apply_after_a_variant() {
    let p = load_variant(
        &file("chain.toml"),
        Some("hot"),
        &["stages.first.at=0.5".to_string()],
    )
    .unwrap();
    let first = p.stages.iter().find(|s| s.name == "first").unwrap();
    assert!(matches!(first.kind, StageKind::Attenuator { at, .. } if at == 0.5));
}
