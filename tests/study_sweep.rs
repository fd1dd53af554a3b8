//! `railsong sweep`: value lists and agreement with `measure --level-sweep`.

use std::path::Path;
use std::process::Command;

use railsong::study::sweep::{list_values, parse_quantity, range_values, Spacing};

const BIN: &str = env!("CARGO_BIN_EXE_railsong");

/// An inverting amplifier with gain -2 on +/-12 V: a 1 kHz sine clips somewhere above
/// 5 Vpk in (the output swing stops short of the rails).
const PATCH: &str = r#"
[patch]
rate = "48 kHz"
length = "0.2 s"
oversample = 4

[rails]
pos = "12 V"
neg = "-12 V"

[sources.osc]
wave = "sine"
freq = "1 kHz"
amp = "1 Vpk"

[stages.amp]
type = "inverting"
part = "jfet-general"
from = "osc"
r_in = "10k"
r_fb = "20k"

[outputs.out]
from = "amp"
"#;

fn run_json(dir: &Path, args: &[&str]) -> serde_json::Value {
    let patch = dir.join("sweep.toml");
    std::fs::write(&patch, PATCH).unwrap();
    let out = Command::new(BIN)
        .arg(args[0])
        .arg(&patch)
        .args(&args[1..])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

// The project's own level sweep (`measure --level-sweep`, equal dB steps) and a log sweep of
// the same source level over the same range and points must find the same 1 % THD level
// (the same renders, the same log-log interpolation).
#[test]
fn level_sweep_crossing_matches_measure() {
    let dir = tempfile::tempdir().unwrap();
    let m = run_json(
        dir.path(),
        &[
            "measure",
            "--level-sweep",
            "osc=1Vpk..10Vpk",
            "--steps",
            "9",
            "--json",
        ],
    );
    let s = run_json(
        dir.path(),
        &[
            "sweep",
            "--set",
            "sources.osc.amp=1Vpk..10Vpk",
            "--steps",
            "9",
            "--log",
            "--json",
        ],
    );
    let want = m["out"]["level_at_1_percent"]
        .as_f64()
        .expect("measure found a crossing");
    let got = s["out"]["thd_1_percent_at"]
        .as_f64()
        .expect("sweep found a crossing");
    assert!((got / want - 1.0).abs() < 1e-9, "{got} vs {want}");
    // sanity against the closed form: the ideal output 2 * Vin reaches the 12 V rails at
    // 6 Vpk, and the part's swing stops short of them, so 1 % THD lies below 6 Vpk and well
    // above the linear region's 1 Vpk
    assert!(got > 2.0 && got < 6.0, "{got}");
    // the points' THD agree one by one too
    let mp = m["out"]["points"].as_array().unwrap();
    let sp = s["out"]["points"].as_array().unwrap();
    assert_eq!(mp.len(), sp.len());
    for (a, b) in mp.iter().zip(sp) {
        assert_eq!(a["thd_percent"], b["thd_percent"]);
    }
}

// IEC 60063 E24 table: the 25 values from 10k to 100k inclusive, read as kilo-ohms.
#[test]
fn e24_series_sweep_gives_the_25_values() {
    let dir = tempfile::tempdir().unwrap();
    let s = run_json(
        dir.path(),
        &[
            "sweep",
            "--set",
            "stages.amp.r_fb",
            "--series",
            "E24",
            "--range",
            "10k..100k",
            "--with",
            "patch.length=0.02s",
            "--figure",
            "peak_v",
            "--json",
        ],
    );
    let iec_k: [u32; 25] = [
        10, 11, 12, 13, 15, 16, 18, 20, 22, 24, 27, 30, 33, 36, 39, 43, 47, 51, 56, 62, 68, 75, 82,
        91, 100,
    ];
    let pts = s["out"]["points"].as_array().unwrap();
    let got: Vec<f64> = pts.iter().map(|p| p["x"].as_f64().unwrap()).collect();
    let want: Vec<f64> = iec_k.iter().map(|k| *k as f64 * 1000.0).collect();
    assert_eq!(got, want);
    // each point really ran with its value: the textbook inverting gain -Rf / Rin with
    // Rin = 10k and a 1 Vpk input gives about Rf / 10k volts peak while linear
    for (p, rf) in pts.iter().zip(&want).take(5) {
        let peak = p["peak_v"].as_f64().unwrap();
        assert!((peak / (rf / 10e3) - 1.0).abs() < 0.02, "{peak} at {rf}");
    }
}

// Value texts keep their units; resistor letter codes read as IEC 60062 (4k7 = 4700).
#[test]
fn values_and_ranges() {
    assert_eq!(parse_quantity("4k7").unwrap(), (4700.0, String::new()));
    assert_eq!(parse_quantity("47k").unwrap(), (47000.0, String::new()));
    assert_eq!(parse_quantity("0.5 Vpk").unwrap(), (0.5, "Vpk".to_string()));
    assert_eq!(parse_quantity("1 kHz").unwrap(), (1000.0, "Hz".to_string()));
    assert_eq!(
        parse_quantity("-10 dBu").unwrap(),
        (-10.0, "dBu".to_string())
    );
    let v = list_values("10k,22k,47k").unwrap();
    assert_eq!(
        v.iter().map(|x| x.x).collect::<Vec<_>>(),
        [10e3, 22e3, 47e3]
    );
    assert_eq!(v[1].text, "22k");
    // equal ratios: a * (b/a)^(k/(n-1))
    let r = range_values("1k", "100k", 3, Spacing::Log).unwrap();
    assert!((r[1].x - 10e3).abs() < 1e-9);
    let l = range_values("0", "1", 5, Spacing::Linear).unwrap();
    assert_eq!(
        l.iter().map(|x| x.x).collect::<Vec<_>>(),
        [0.0, 0.25, 0.5, 0.75, 1.0]
    );
    assert!(range_values("1k", "2 V", 3, Spacing::Linear).is_err());
    assert!(range_values("0", "1", 3, Spacing::Log).is_err());
}

// Points run in parallel, but the results come back in the order of the values and do not
// depend on the number of threads.
#[test]
fn sweep_order_and_numbers_independent_of_threads() {
    use railsong::analysis::Settings;
    use railsong::study::sweep::{run, PatchText};
    let src = PatchText {
        text: PATCH,
        origin: "sweep.toml",
        base_dir: Path::new("."),
        variant: None,
    };
    let values = range_values("1 Vpk", "8 Vpk", 6, Spacing::Linear).unwrap();
    let go = |threads: usize| {
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap()
            .install(|| {
                run(
                    &src,
                    &["patch.length=0.05s".to_string()],
                    "sources.osc.amp",
                    &values,
                    &Settings::default(),
                    railsong::study::length::StudyLength::default(),
                    &|| {},
                )
                .unwrap()
            })
    };
    let (one, three) = (go(1), go(3));
    for ((a, b), v) in one.iter().zip(&three).zip(&values) {
        assert_eq!(&a.value, v);
        assert_eq!(a.measurement, b.measurement);
    }
    // and the order is the order of the values: the circuit's peak rises with the input
    // level (gain 2) until it stops at the part's swing limit (the 12 V rail less the
    // profile's output drop), which it never passes
    let part = railsong::parts::profiles::builtin("jfet-general").unwrap();
    let limit = 12.0 - part.drop_pos;
    let peaks: Vec<f64> = one
        .iter()
        .map(|p| p.measurement.outputs["out"].figures.peak_v.unwrap())
        .collect();
    assert!(peaks.windows(2).all(|w| w[1] >= w[0]), "{peaks:?}");
    assert!(peaks[..3].windows(2).all(|w| w[1] > w[0]), "{peaks:?}");
    assert!(
        peaks.iter().all(|p| *p <= limit + 1e-9),
        "{peaks:?} vs {limit}"
    );
}
