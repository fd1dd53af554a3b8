//! The example network patches against closed forms (textbook formulas and nodal solutions
//! written here), a nonlinear step that cannot converge, and a tolerance study over a
//! network against its first-order sensitivity.
mod engine_support;
use engine_support::fit;
use std::f64::consts::{LN_10, PI, TAU};
use std::path::{Path, PathBuf};

use railsong::model::{NetPartKind, Patch, StageKind};

const RATE: f64 = 48_000.0;

fn example(name: &str) -> (String, PathBuf) {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("patches");
    let text = std::fs::read_to_string(dir.join(name)).unwrap();
    (text, dir)
}

fn parse(text: &str, dir: &Path, sets: &[&str]) -> Patch {
    let sets: Vec<String> = sets.iter().map(|s| s.to_string()).collect();
    railsong::patch::parse_str(text, "example.toml", dir, &sets).unwrap_or_else(|e| panic!("{e}"))
}

/// The values of a network's parts, in patch order (a pot gives its track).
fn values(p: &Patch, stage: &str) -> Vec<f64> {
    let st = p.stages.iter().find(|s| s.name == stage).unwrap();
    let StageKind::Network(net) = &st.kind else {
        panic!("{stage} is a network")
    };
    net.parts
        .iter()
        .map(|q| match &q.kind {
            NetPartKind::R(r) => *r,
            NetPartKind::C(c) => *c,
            NetPartKind::Pot { setting, .. } => setting.track,
            NetPartKind::Diode(_) => f64::NAN,
        })
        .collect()
}

/// Gain (dB) and phase (degrees) of the only output at `hz` from the response solve.
fn response_at(p: &Patch, hz: f64) -> (f64, f64) {
    let r = railsong::response::response(p, 0, &[hz]).unwrap_or_else(|e| panic!("{e}"));
    let pt = r.outputs.values().next().unwrap().points[0];
    (pt.gain_db, pt.phase_deg)
}

fn db(x: f64) -> f64 {
    20.0 * x.abs().log10()
}

// patches/net-mfb-bandpass.toml: the multiple-feedback band-pass (R1 input, R2 shunt, equal
// C, R3 feedback) against the textbook second-order section: f0 = sqrt((R1 + R2)/(R1 R2 R3))
// / (2 pi C), Q = pi f0 C R3, H(f0) = -R3/(2 R1) (CHECKS.md; Sedra and Smith, "Microelectronic
// Circuits", active filter chapter). With an ideal part, within 0.05 dB at f0/2, f0 and 2 f0;
// and the patch's comment (f0 about 1 kHz, Q about 5, about 0 dB at f0) holds within 2 %.
#[test]
fn mfb_band_pass_example_matches_the_textbook_section() {
    let (text, dir) = example("net-mfb-bandpass.toml");
    let ideal = text.replace("jfet-general", "ideal");
    let p = parse(&ideal, &dir, &[]);
    let v = values(&p, "bp");
    let (r1, r2, c, r3) = (v[0], v[1], v[2], v[4]);
    assert_eq!(v[2], v[3], "equal capacitors");
    let f0 = ((r1 + r2) / (r1 * r2 * r3)).sqrt() / (TAU * c);
    let q = PI * f0 * c * r3;
    let h0 = -r3 / (2.0 * r1);
    assert!((f0 / 1000.0 - 1.0).abs() < 0.02, "f0 {f0}");
    assert!((q / 5.0 - 1.0).abs() < 0.02, "Q {q}");
    assert!(db(h0).abs() < 0.25, "centre gain {h0}");
    for f in [f0 / 2.0, f0, 2.0 * f0] {
        let x = f / f0;
        let (re, im) = (1.0 - x * x, x / q);
        let want = db(h0 * (im / re.hypot(im)));
        let (got, phase) = response_at(&p, f);
        assert!((got - want).abs() < 0.05, "{f} Hz: {got} dB vs {want} dB");
        if f == f0 {
            // inverting at its centre
            assert!(phase.abs() > 179.5, "{phase} deg at f0");
        }
    }
}

/// Two T networks (arms `ra` from the input, `rb` from the output, `rc` to the virtual
/// ground) into one inverting node: KCL at that node, with each T's middle voltage by
/// Millman, gives `Vout/Vin = -sum 1/(ra rc S) / sum 1/(rb rc S)`, `S = 1/ra + 1/rb + 1/rc`.
fn t_networks(ts: &[(f64, f64, f64)]) -> f64 {
    let s = |&(ra, rb, rc): &(f64, f64, f64)| 1.0 / ra + 1.0 / rb + 1.0 / rc;
    let num: f64 = ts.iter().map(|t| 1.0 / (t.0 * t.2 * s(t))).sum();
    let den: f64 = ts.iter().map(|t| 1.0 / (t.1 * t.2 * s(t))).sum();
    -num / den
}

// patches/net-tone-control.toml, with an ideal part. At 0 Hz every capacitor is open: the
// bass pot and its two 10k arms form one T into the virtual ground, whose middle must sit at
// 0 V, so the gain is minus the ratio of the two arms, -(R1 + at P) / (R1 + (1 - at) P)
// (each track segment at least 1 ohm). Far above the band (100 MHz) every capacitor is a
// short: the bass side is a T of R1, R1 and its wiper resistor, the treble pot a T of its two
// segments and its wiper resistor, both into the virtual ground (`t_networks`). Boost and
// cut at each knob's ends, flat in the middle, within 0.05 dB.
#[test]
fn tone_control_example_boosts_and_cuts_as_its_t_networks_say() {
    let (text, dir) = example("net-tone-control.toml");
    let ideal = text.replace("bipolar-lownoise", "ideal");
    let nominal = parse(&ideal, &dir, &[]);
    let v = values(&nominal, "tone");
    let (r1, pb, r1b, rwb) = (v[0], v[1], v[2], v[5]);
    let (pt, rwt) = (v[7], v[9]);
    assert_eq!(r1, r1b, "equal bass arms");
    let seg = |x: f64| x.max(1.0);
    let mut highest: f64 = 0.0;
    for at in [0.0, 0.25, 0.5, 0.75, 1.0] {
        let set = format!("knobs.bass={at}");
        let p = parse(&ideal, &dir, &[&set]);
        let g = railsong::response::dc_gains(&p).unwrap()[0][0];
        let want = -(r1 + seg(at * pb)) / (r1 + seg((1.0 - at) * pb));
        assert!(
            (db(g) - db(want)).abs() < 0.05 && g < 0.0,
            "bass {at}: {g} vs {want}"
        );
        highest = highest.max(db(g));

        let set = format!("knobs.treble={at}");
        let p = parse(&ideal, &dir, &[&set]);
        let (got, _) = response_at(&p, 1e8);
        let want = t_networks(&[(r1, r1, rwb), (seg((1.0 - at) * pt), seg(at * pt), rwt)]);
        assert!(
            (got - db(want)).abs() < 0.05,
            "treble {at}: {got} dB vs {} dB",
            db(want)
        );
    }
    // the comment's +-20.8 dB of bass
    assert!((highest - 20.83).abs() < 0.01, "{highest}");
}

// The same patch as written (its real part) with both knobs at 50 %: every branch from the
// input has its mirror image to the output, so the inverting node balances only at
// Vout = -Vin, at every frequency: rendered sines at 100 Hz, 1 kHz and 10 kHz come out at
// 0 dB within 0.05 dB and inverted within 0.5 degrees.
#[test]
fn tone_control_example_is_flat_and_inverting_at_its_centre() {
    let (text, dir) = example("net-tone-control.toml");
    for f in [100.0, 1000.0, 10_000.0] {
        let freq = format!("sources.saw.freq={f} Hz");
        let p = parse(
            &text,
            &dir,
            &[
                "sources.saw.wave=sine",
                &freq,
                "sources.saw.amp=1 V",
                "knobs.bass=0.5",
                "knobs.treble=0.5",
                "patch.length=0.2 s",
                "patch.noise=false",
            ],
        );
        let r = railsong::engine::run(&p, &railsong::engine::RunOptions::default())
            .unwrap_or_else(|e| panic!("{e}"));
        let y = &r.outputs[0].samples;
        // skip 50 ms: the bass capacitors settle with time constants up to a few ms
        let skip = 2400;
        let (a, b, _, _) = fit(&y[skip..], skip, f, RATE);
        let gain = a.hypot(b);
        let phase = b.atan2(a).to_degrees();
        assert!(db(gain).abs() < 0.05, "{f} Hz: {} dB", db(gain));
        assert!(phase.abs() > 179.5, "{f} Hz: {phase} deg");
    }
}

/// A non-inverting stage of gain 2 with anti-parallel diodes from its output back to its
/// input node: once the diodes conduct, the loop through them turns positive and the stage
/// snaps over; the nonlinear step cannot settle on one state there.
const SNAP: &str = r#"[patch]
length = "0.05 s"
noise = false
[rails]
pos = "12 V"
neg = "-12 V"
[sources.a]
wave = "sine"
freq = "100 Hz"
amp = "5 V"
[stages.snap]
type = "network"
amps = [{ part = "ideal", plus = "p", minus = "m", out = "y" }]
parts = [
  { r = "10k", ends = ["a", "p"] },
  { diode = "silicon-signal", ends = ["y", "p"] },
  { diode = "silicon-signal", ends = ["p", "y"] },
  { r = "1k", ends = ["y", "m"] },
  { r = "1k", ends = ["m", "gnd"] },
]
out = "y"
[outputs.o]
from = "snap"
"#;

// A nonlinear step that does not converge ends the command with one clear line naming the
// stage and the time of the step, exit 2 (bad input: the circuit, not railsong), within its
// iteration bound (no hang), and `render` writes no file (no NaN reaches a WAV). The bound
// (`circuit::step::MAX_ITER`) and the stage name are what the line must carry.
#[test]
fn a_step_that_does_not_converge_is_a_clear_error_naming_stage_and_time() {
    let dir = std::env::temp_dir().join(format!("railsong-snap-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    let patch = dir.join("snap.toml");
    std::fs::write(&patch, SNAP).unwrap();
    let out = dir.join("out");
    for args in [
        vec!["measure".to_string(), patch.display().to_string()],
        vec![
            "render".to_string(),
            patch.display().to_string(),
            "--out".to_string(),
            out.display().to_string(),
        ],
    ] {
        let o = std::process::Command::new(env!("CARGO_BIN_EXE_railsong"))
            .args(&args)
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(2), "{args:?}: {err}");
        let lines: Vec<&str> = err.lines().filter(|l| !l.trim().is_empty()).collect();
        assert_eq!(lines.len(), 1, "{err}");
        let line = lines[0];
        assert!(
            line.starts_with("railsong: stages.snap: the nonlinear step did not converge at t = "),
            "{line}"
        );
        // the time is a number inside the render
        let t: f64 = line
            .split("t = ")
            .nth(1)
            .and_then(|s| s.split(' ').next())
            .and_then(|s| s.parse().ok())
            .unwrap_or_else(|| panic!("no time in {line}"));
        assert!((0.0..0.05).contains(&t), "{line}");
        assert!(!line.contains("NaN") && !line.contains("inf"), "{line}");
    }
    let wavs = std::fs::read_dir(&out)
        .map(|d| {
            d.filter(|e| {
                e.as_ref()
                    .map(|e| e.path().extension().is_some_and(|x| x == "wav"))
                    .unwrap_or(false)
            })
            .count()
        })
        .unwrap_or(0);
    assert_eq!(wavs, 0, "no WAV written after the failure");
    let _ = std::fs::remove_dir_all(&dir);
}

/// A level pot on a knob, its wiper loaded by RL, into a non-inverting stage (Rf, Rg).
const TOL: &str = r#"[patch]
rate = "48 kHz"
length = "0.05 s"
oversample = 1
noise = false
[rails]
pos = "12 V"
neg = "-12 V"
[knobs]
level = 0.5
[sources.a]
wave = "sine"
freq = "1 kHz"
amp = "1 V"
[stages.amp]
type = "network"
amps = [{ part = "ideal", plus = "w", minus = "m", out = "y" }]
parts = [
  { pot = "10k", ends = ["gnd", "a"], wiper = "w", at = "level" },
  { r = "1k", ends = ["w", "gnd"] },
  { r = "22k", ends = ["y", "m"], tolerance = "2 %" },
  { r = "10k", ends = ["m", "gnd"], tolerance = "2 %" },
]
out = "y"
[outputs.out]
from = "amp"
"#;

// Tolerance study over a network: the knob's pot track and the load resistor vary uniformly
// within the study's +-5 %, the stage's two resistors within their own +-2 %, and the spread of the output level matches the first-order sensitivity
// (Bode's sensitivity S_x = d ln G / d ln x; Bode, "Network Analysis and Feedback Amplifier
// Design", 1945): G = D (1 + Rf/Rg) with the loaded divider D = L / (U + L), L = aP || RL,
// U = (1 - a) P. S_Rf = -S_Rg = (G' - 1)/G' for the stage gain G', S_P = RL/(aP + RL) -
// (U + L RL/(aP + RL))/(U + L), S_RL = aP/(aP + RL) - (L aP/(aP + RL))/(U + L). Independent
// uniform errors of half-width t have variance t^2/3, so the standard deviation of the gain
// in dB is (20/ln 10) sqrt(sum S^2 t^2 / 3). 400 runs estimate a standard deviation within
// about 1/sqrt(2 * 400) = 3.5 %; within 12 % here.
#[test]
fn network_tolerance_spread_matches_first_order_sensitivity() {
    use railsong::analysis::Settings;
    use railsong::study::length::StudyLength;
    use railsong::study::tolerance::{study, Tolerances};
    let p = railsong::patch::parse_str(TOL, "tol.toml", Path::new("."), &[]).unwrap();
    let t = 0.05;
    let rep = study(
        &p,
        &Tolerances {
            resistor: t,
            capacitor: t,
        },
        400,
        7,
        &Settings::default(),
        StudyLength::default(),
        &|| {},
    )
    .unwrap();
    let (a, pot, rl, rf, rg) = (0.5, 10e3, 1e3, 22e3, 10e3);
    let t_own = 0.02;
    let ap = a * pot;
    let l = ap * rl / (ap + rl);
    let u = (1.0 - a) * pot;
    let s_p = rl / (ap + rl) - (u + l * rl / (ap + rl)) / (u + l);
    let s_rl = ap / (ap + rl) - (l * ap / (ap + rl)) / (u + l);
    let gs = 1.0 + rf / rg;
    let s_f = (gs - 1.0) / gs;
    let var = |pot_share: f64, own: f64| {
        (pot_share * s_p * s_p + s_rl * s_rl) * t * t + 2.0 * s_f * s_f * own * own
    };
    let sd_db = |v: f64| 20.0 / LN_10 * (v / 3.0).sqrt();
    let want = sd_db(var(1.0, t_own));
    let g: Vec<f64> = rep.runs.iter().map(|r| r.outputs[0].gain_db).collect();
    let n = g.len() as f64;
    let mean = g.iter().sum::<f64>() / n;
    let sd = (g.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
    assert!(
        (sd / want - 1.0).abs() < 0.12,
        "spread {sd} dB against {want} dB"
    );
    // the test can tell: a pot left alone, or the parts' own 2 % ignored, would give a
    // spread outside the band
    for other in [sd_db(var(0.0, t_own)), sd_db(var(1.0, t))] {
        assert!(
            (sd / other - 1.0).abs() > 0.15,
            "{sd} dB also fits {other} dB"
        );
    }
    assert!(mean.abs() < 0.05, "mean {mean} dB");
}

const HEAD: &str =
    "[patch]\nlength = \"0.1 s\"\nnoise = false\n[rails]\npos = \"12 V\"\nneg = \"-12 V\"\n\
[sources.v]\nwave = \"sine\"\nfreq = \"1 kHz\"\namp = \"3 V\"\n";

/// Peak amplitude of a rendered 1 kHz output (sine fit after 20 ms), signed by its phase
/// against the source (+ in phase, - inverted).
fn amplitude(y: &[f64]) -> f64 {
    let skip = 960;
    let (a, b, _, _) = fit(&y[skip..], skip, 1000.0, RATE);
    a.hypot(b).copysign(a)
}

fn run_outputs(text: &str) -> Vec<f64> {
    let p = railsong::patch::parse_str(text, "inner.toml", Path::new("."), &[])
        .unwrap_or_else(|e| panic!("{e}"));
    let r = railsong::engine::run(&p, &railsong::engine::RunOptions::default())
        .unwrap_or_else(|e| panic!("{e}"));
    r.outputs.iter().map(|o| amplitude(&o.samples)).collect()
}

// `[outputs.X] from = "stage.node"` reads a network's passive inner node, and the output's
// load hangs on that node in the solve: a 10k/10k divider reads half the source open, and
// with a 10k load on its middle R2 || RL / (R1 + R2 || RL) = 1/3 (voltage divider), within
// 1e-4 of the amplitude. The response solve of the whole patch says the same.
#[test]
fn an_output_reads_a_passive_inner_node_with_its_load_in_the_solve() {
    let text = format!(
        "{HEAD}[stages.net]\ntype = \"network\"\n\
amps = [{{ part = \"ideal\", plus = \"a\", minus = \"y\", out = \"y\" }}]\n\
parts = [{{ r = \"10k\", ends = [\"v\", \"a\"] }}, {{ r = \"10k\", ends = [\"a\", \"gnd\"] }}]\n\
out = \"y\"\n\
[outputs.open]\nfrom = \"net.a\"\n\
[outputs.buffered]\nfrom = \"net\"\n"
    );
    let g = run_outputs(&text);
    assert!(
        (g[0] - 1.5).abs() < 3e-4 && (g[1] - 1.5).abs() < 3e-4,
        "{g:?}"
    );
    let loaded = text.replace(
        "[outputs.open]\nfrom = \"net.a\"\n",
        "[outputs.open]\nfrom = \"net.a\"\nload = \"10k\"\n",
    );
    let g = run_outputs(&loaded);
    assert!((g[0] - 1.0).abs() < 3e-4, "loaded node {g:?}");
    // the follower reads the same (loaded) node
    assert!((g[1] - 1.0).abs() < 3e-4, "follower {g:?}");
    let p = railsong::patch::parse_str(&loaded, "inner.toml", Path::new("."), &[]).unwrap();
    let r = railsong::response::response(&p, 0, &[1000.0]).unwrap();
    let open = r.outputs["open"].points[0].gain_db;
    assert!((open - db(1.0 / 3.0)).abs() < 1e-3, "{open} dB");
}

// Another network reads a passive inner node (`ends = ["src.a", ...]`) through 10k into an
// inverting op-amp's virtual ground: that input loads the node by 1/10k, so the divider's
// middle sits at 1/3 of the source (10k against 10k || 10k), the inverter gives -1/3 and
// the first network's follower 1/3, within 1e-4 of the amplitude (voltage divider and
// inverting gain -Rf/Ri, textbook).
#[test]
fn a_network_reading_another_networks_passive_node_loads_it() {
    let text = format!(
        "{HEAD}[stages.src]\ntype = \"network\"\n\
amps = [{{ part = \"ideal\", plus = \"a\", minus = \"y\", out = \"y\" }}]\n\
parts = [{{ r = \"10k\", ends = [\"v\", \"a\"] }}, {{ r = \"10k\", ends = [\"a\", \"gnd\"] }}]\n\
out = \"y\"\n\
[stages.inv]\ntype = \"network\"\n\
amps = [{{ part = \"ideal\", plus = \"gnd\", minus = \"m\", out = \"y\" }}]\n\
parts = [{{ r = \"10k\", ends = [\"src.a\", \"m\"] }}, {{ r = \"10k\", ends = [\"m\", \"y\"] }}]\n\
out = \"y\"\n\
[outputs.inv]\nfrom = \"inv\"\n[outputs.follower]\nfrom = \"src\"\n"
    );
    let g = run_outputs(&text);
    assert!((g[0] + 1.0).abs() < 3e-4, "inverter {g:?}");
    assert!((g[1] - 1.0).abs() < 3e-4, "follower {g:?}");
}

// Shorthand stages read a network's inner node too (`from = "src.a"`), and load it like
// any reader. The divider's middle node `a` (10k from the 3 V source, 10k to ground) also
// carries an inverter's and a summer's 10k into their virtual grounds and a 10k attenuator
// track to ground, so a = 3 (10k / 4) / (10k + 10k / 4) = 0.6 V (voltage divider,
// textbook); a follower and a non-inverting stage (gain 2) add no load. Expected, within
// 3e-4 of the amplitude: inverter -0.6, follower 0.6, non-inverting 1.2, the attenuator at
// mid track 0.3, the summer of a (10k) and the source (30k) into 10k -(0.6 + 1) = -1.6
// (inverting summer -Rf sum(Vi / Ri), textbook).
#[test]
fn shorthand_stages_read_a_networks_inner_node_and_load_it() {
    let text = format!(
        "{HEAD}[stages.src]\ntype = \"network\"\n\
amps = [{{ part = \"ideal\", plus = \"a\", minus = \"y\", out = \"y\" }}]\n\
parts = [{{ r = \"10k\", ends = [\"v\", \"a\"] }}, {{ r = \"10k\", ends = [\"a\", \"gnd\"] }}]\n\
out = \"y\"\n\
[stages.inv]\ntype = \"inverting\"\npart = \"ideal\"\nfrom = \"src.a\"\nr_in = \"10k\"\nr_fb = \"10k\"\n\
[stages.buf]\ntype = \"follower\"\npart = \"ideal\"\nfrom = \"src.a\"\n\
[stages.gain]\ntype = \"non-inverting\"\npart = \"ideal\"\nfrom = \"src.a\"\nr_fb = \"10k\"\nr_g = \"10k\"\n\
[stages.vol]\ntype = \"attenuator\"\nfrom = \"src.a\"\npot = \"10k\"\ntaper = \"linear\"\nat = 0.5\n\
[stages.mix]\ntype = \"inverting-sum\"\npart = \"ideal\"\n\
inputs = [{{ from = \"src.a\", r = \"10k\" }}, {{ from = \"v\", r = \"30k\" }}]\nfeedback = {{ r = \"10k\" }}\n\
[outputs.inv]\nfrom = \"inv\"\n[outputs.buf]\nfrom = \"buf\"\n[outputs.gain]\nfrom = \"gain\"\n\
[outputs.vol]\nfrom = \"vol\"\n[outputs.mix]\nfrom = \"mix\"\n"
    );
    let g = run_outputs(&text);
    for (got, want) in g.iter().zip([-0.6, 0.6, 1.2, 0.3, -1.6]) {
        assert!((got - want).abs() < 3e-4, "{g:?}");
    }
    // the whole patch solved as one circuit (`response`) agrees at DC
    let p = railsong::patch::parse_str(&text, "inner.toml", Path::new("."), &[]).unwrap();
    let dc = railsong::response::dc_gains(&p).unwrap();
    let want_dc = [0.2, -0.2, 0.2, 0.4, 0.1, -(0.2 + 1.0 / 3.0)];
    for (k, w) in want_dc.iter().enumerate() {
        assert!(
            (dc[k][0] - w).abs() < 1e-4,
            "stage {k}: {} against {w}",
            dc[k][0]
        );
    }
    // a shorthand reading stage.node needs a 0 V reference (a network has no other fixed
    // node): a clear error naming the key
    let bad = text.replace(
        "r_fb = \"10k\"\nr_g = \"10k\"\n",
        "r_fb = \"10k\"\nr_g = \"10k\"\nref = \"1 V\"\n",
    );
    let e = railsong::patch::parse_str(&bad, "inner.toml", Path::new("."), &[])
        .unwrap_err()
        .to_string();
    assert!(e.contains("stages.gain.ref") && e.contains("0 V"), "{e}");
    // an unknown inner node names the stage's nodes
    let bad = text.replace("from = \"src.a\"\nr_in", "from = \"src.q\"\nr_in");
    let e = railsong::patch::parse_str(&bad, "inner.toml", Path::new("."), &[])
        .unwrap_err()
        .to_string();
    assert!(e.contains("stages.inv.from") && e.contains("'q'"), "{e}");
}

fn warnings(text: &str) -> Vec<railsong::check::Warning> {
    let p = railsong::patch::parse_str(text, "check.toml", Path::new("."), &[])
        .unwrap_or_else(|e| panic!("{e}"));
    railsong::check::check(&p).warnings
}

fn sine_src(name: &str, amp: f64, offset: f64) -> String {
    format!(
        "[sources.{name}]\nwave = \"sine\"\nfreq = \"1 kHz\"\namp = \"{amp} V\"\noffset = \"{offset} V\"\n"
    )
}

const RAILS: &str =
    "[patch]\nlength = \"0.1 s\"\nnoise = false\n[rails]\npos = \"12 V\"\nneg = \"-12 V\"\n";

// `check` on a network checks each op-amp on paper, from the whole patch solved as one
// circuit: a non-inverting stage of gain 1 + Rf/Rg = 2 (textbook) on 7 V peaks asks for
// 14 V, beyond the swing 12 - 1.8 V of its part (the profile's drop): a clipping warning on
// `amps[0]`, none at 3 V; its 90k resistor is not an E24 or E96 value (IEC 60063).
#[test]
fn check_warns_when_a_network_amp_cannot_swing_its_worst_case() {
    let net = |amp: f64| {
        format!(
            "{RAILS}{}[stages.g]\ntype = \"network\"\n\
amps = [{{ part = \"jfet-general\", plus = \"v\", minus = \"m\", out = \"y\" }}]\n\
parts = [{{ r = \"10k\", ends = [\"y\", \"m\"] }}, {{ r = \"10k\", ends = [\"m\", \"gnd\"] }}, \
{{ r = \"90k\", ends = [\"y\", \"gnd\"] }}]\n\
out = \"y\"\n[outputs.o]\nfrom = \"g\"\n",
            sine_src("v", amp, 0.0)
        )
    };
    let w = warnings(&net(7.0));
    let clip: Vec<_> = w
        .iter()
        .filter(|w| w.kind == railsong::check::WarningKind::Clipping)
        .collect();
    assert_eq!(clip.len(), 1, "{w:?}");
    assert_eq!(clip[0].key, "stages.g.amps[0]");
    assert!(
        clip[0].message.contains("-14 V .. 14 V") && clip[0].message.contains("10.2 V"),
        "{}",
        clip[0].message
    );
    let w = warnings(&net(3.0));
    assert!(
        !w.iter()
            .any(|w| w.kind == railsong::check::WarningKind::Clipping),
        "{w:?}"
    );
    assert!(
        w.iter()
            .any(|w| w.kind == railsong::check::WarningKind::NonStandard
                && w.key == "stages.g.parts[2].r"),
        "{w:?}"
    );
}

// A passive-averaging (non-inverting) summer: V+ is the mean of its inputs (Millman's
// theorem, equal resistors). Two inputs at -9 V +- 1 V put V+ at -10 .. -8 V, below the
// JFET-input part's range (4 V above the negative rail, common practice: -8 V on +-12 V): a
// common-mode warning on `amps[0]` saying the output reverses. At -5 V +- 1 V: none.
#[test]
fn check_warns_when_a_network_amp_leaves_its_input_range() {
    let net = |dc: f64| {
        format!(
            "{RAILS}{}{}[stages.avg]\ntype = \"network\"\n\
amps = [{{ part = \"jfet-general\", plus = \"p\", minus = \"y\", out = \"y\" }}]\n\
parts = [{{ r = \"10k\", ends = [\"a\", \"p\"] }}, {{ r = \"10k\", ends = [\"b\", \"p\"] }}]\n\
out = \"y\"\n[outputs.o]\nfrom = \"avg\"\n",
            sine_src("a", 1.0, dc),
            sine_src("b", 1.0, dc)
        )
    };
    let w = warnings(&net(-9.0));
    let cm: Vec<_> = w
        .iter()
        .filter(|w| w.kind == railsong::check::WarningKind::CommonMode)
        .collect();
    assert_eq!(cm.len(), 1, "{w:?}");
    assert_eq!(cm[0].key, "stages.avg.amps[0]");
    assert!(
        cm[0].message.contains("-10 V .. -8 V") && cm[0].message.contains("reverses"),
        "{}",
        cm[0].message
    );
    assert!(warnings(&net(-5.0)).is_empty());
}

// An op-amp on its own supply (+-12 V, 24 V) with a part rated for 5.5 V: a supply warning
// on `amps[0].part`. A follower of 5 V peaks into a 100 ohm output load draws 50 mA (Ohm's
// law), above the jfet-general profile's 18 mA limit: a current warning on `amps[0]`.
#[test]
fn check_warns_on_a_network_amps_supply_and_output_current() {
    let text = format!(
        "{RAILS}{}[stages.f]\ntype = \"network\"\n\
amps = [{{ part = \"rail-to-rail-cmos\", plus = \"v\", minus = \"y\", out = \"y\", pos = \"12 V\", neg = \"-12 V\" }}]\n\
parts = [{{ r = \"10k\", ends = [\"y\", \"gnd\"] }}]\n\
out = \"y\"\n[outputs.o]\nfrom = \"f\"\n",
        sine_src("v", 1.0, 0.0)
    );
    let w = warnings(&text);
    assert!(
        w.iter()
            .any(|w| w.kind == railsong::check::WarningKind::Supply
                && w.key == "stages.f.amps[0].part"
                && w.message.contains("24 V")),
        "{w:?}"
    );
    let text = format!(
        "{RAILS}{}[stages.f]\ntype = \"network\"\n\
amps = [{{ part = \"jfet-general\", plus = \"v\", minus = \"y\", out = \"y\" }}]\n\
parts = [{{ r = \"10k\", ends = [\"y\", \"gnd\"] }}]\n\
out = \"y\"\n[outputs.o]\nfrom = \"f\"\nload = \"100\"\n",
        sine_src("v", 5.0, 0.0)
    );
    let w = warnings(&text);
    let cur: Vec<_> = w
        .iter()
        .filter(|w| w.kind == railsong::check::WarningKind::Current)
        .collect();
    assert_eq!(cur.len(), 1, "{w:?}");
    assert_eq!(cur[0].key, "stages.f.amps[0]");
    // 100 ohm || 10k = 99 ohm: 5 V / 99 ohm = 50.5 mA
    assert!(
        cur[0].message.contains("99R") && cur[0].message.contains("50.5"),
        "{}",
        cur[0].message
    );
}

// Events of a network op-amp carry its peaks and its first clip, as a shorthand stage's do:
// a gain-2 stage (1 + Rf/Rg) of an ideal part (output to the rails) on 7 V at 100 Hz first
// reaches the 12 V rail at t = asin(12/14) / (2 pi 100 Hz) = 1.6395 ms (the sine's own
// closed form), within two internal samples at K = 4, as the shorthand stage says too; it
// stays there 4 (pi/2 - asin(12/14)) / (2 pi) of the time; its highest output is the rail,
// and the output's peak is the op-amp's (after its clamp).
#[test]
fn network_amp_events_carry_peaks_and_first_clip() {
    let text = format!(
        "{}{}\
[stages.net]\ntype = \"network\"\n\
amps = [{{ part = \"ideal\", plus = \"a\", minus = \"m\", out = \"y\", name = \"gain2\" }}]\n\
parts = [{{ r = \"10k\", ends = [\"y\", \"m\"] }}, {{ r = \"10k\", ends = [\"m\", \"gnd\"] }}]\n\
out = \"y\"\n\
[stages.short]\ntype = \"non-inverting\"\npart = \"ideal\"\nfrom = \"a\"\nr_fb = \"10k\"\nr_g = \"10k\"\n\
[outputs.o]\nfrom = \"net\"\n[outputs.s]\nfrom = \"short\"\n",
        RAILS,
        "[sources.a]\nwave = \"sine\"\nfreq = \"100 Hz\"\namp = \"7 V\"\n"
    );
    let p = railsong::patch::parse_str(&text, "ev.toml", Path::new("."), &[])
        .unwrap_or_else(|e| panic!("{e}"));
    let r = railsong::engine::run(&p, &railsong::engine::RunOptions::default()).unwrap();
    let m = railsong::measure::measure(
        &p,
        &r,
        None,
        &railsong::analysis::Settings::default(),
        None,
        None,
    );
    let want = (12.0f64 / 14.0).asin() / (TAU * 100.0);
    let h = 1.0 / (4.0 * RATE);
    let net = &m.outputs["o"].events["gain2"];
    let short = &m.outputs["s"].events["short"];
    let t_net = net.first_clip_s.expect("the network op-amp clips");
    let t_short = short.first_clip_s.expect("the shorthand stage clips");
    assert!((t_net - want).abs() < 2.0 * h, "{t_net} s against {want} s");
    assert!((t_short - want).abs() < 2.0 * h, "shorthand {t_short} s");
    let hi = net.peak_pos_v.unwrap();
    let lo = net.peak_neg_v.unwrap();
    assert!(
        (hi - 12.0).abs() < 1e-6 && (lo + 12.0).abs() < 1e-6,
        "{lo} .. {hi}"
    );
    assert!(net.headroom_pos_db.unwrap().abs() < 1e-3, "{net:?}");
    // at the rail while |sin| > 12/14: 4 (pi/2 - asin(12/14)) / (2 pi) of each period
    let clip = 0.1 * 4.0 * (PI / 2.0 - (12.0f64 / 14.0).asin()) / TAU;
    assert!(
        (net.clip_s / clip - 1.0).abs() < 0.02,
        "{net:?} against {clip} s"
    );
    let peak = m.outputs["o"].figures.peak_v.unwrap();
    assert!((peak - 12.0).abs() < 1e-6, "output peak {peak}");
}

// The page (and `render --plots`) shows the small-signal response of an output when the
// patch has capacitors: the Sallen-Key example gets a gain plot with its -3 dB point marked
// where `response` puts it, and a phase plot; a resistive patch gets neither.
#[test]
fn plots_show_the_response_when_the_patch_has_capacitors() {
    let (text, dir) = example("net-sallen-key.toml");
    let p = parse(&text, &dir, &["patch.length=0.2 s", "patch.noise=false"]);
    let figs = railsong::report::plots(&p, None).unwrap();
    let kinds: Vec<&str> = figs.iter().map(|f| f.kind).collect();
    assert!(
        kinds.contains(&"response-gain") && kinds.contains(&"response-phase"),
        "{kinds:?}"
    );
    let gain = figs.iter().find(|f| f.kind == "response-gain").unwrap();
    assert_eq!(gain.file_name(), "out-response-gain.svg");
    let grid = railsong::response::log_grid(10.0, 40e3, 200).unwrap();
    let r = railsong::response::response(&p, 0, &grid).unwrap();
    let f3 = railsong::response::minus_3db(&r.outputs["out"].points);
    assert_eq!(f3.len(), 1);
    let label = format!("-3 dB at {}", railsong::units::fmt_eng(f3[0], "Hz"));
    assert!(gain.svg.contains(&label), "{label} not in the plot");

    let resistive = format!(
        "{RAILS}{}[stages.g]\ntype = \"network\"\n\
amps = [{{ part = \"ideal\", plus = \"v\", minus = \"m\", out = \"y\" }}]\n\
parts = [{{ r = \"10k\", ends = [\"y\", \"m\"] }}, {{ r = \"10k\", ends = [\"m\", \"gnd\"] }}]\n\
out = \"y\"\n[outputs.o]\nfrom = \"g\"\n",
        "[sources.v]\nwave = \"saw\"\nfreq = \"100 Hz\"\namp = \"1 V\"\n"
    );
    let p = railsong::patch::parse_str(&resistive, "r.toml", Path::new("."), &[]).unwrap();
    let figs = railsong::report::plots(&p, None).unwrap();
    assert!(
        figs.iter().all(|f| !f.kind.starts_with("response")),
        "{:?}",
        figs.iter().map(|f| f.kind).collect::<Vec<_>>()
    );
    assert!(figs.iter().any(|f| f.kind == "spectrum"));
}

/// The one-sided density of a budget's output at 1 kHz, V/sqrt(Hz).
fn noise_density(text: &str, output: &str) -> (f64, Vec<String>) {
    let p = railsong::patch::parse_str(text, "noise.toml", Path::new("."), &[])
        .unwrap_or_else(|e| panic!("{e}"));
    let b = railsong::budget::budget(&p, railsong::budget::DEFAULT_BAND);
    let o = b.iter().find(|b| b.output == output).unwrap();
    (
        o.total_density_1k,
        o.items.iter().map(|i| i.label.clone()).collect(),
    )
}

const NOISY: &str = "[parts.quiet]\nbased_on = \"ideal\"\nen = \"10 nV/rtHz\"\nen_corner = \"0 Hz\"\nin = \"2 pA/rtHz\"\n";

// The noise budget reads network stages from the patch's one circuit. A non-inverting
// network (source resistor Rs into V+, Rf, Rg) with a fast part: the textbook output
// density e^2 = NG^2 (en^2 + 4kT Rs + (in Rs)^2) + (in Rf)^2 + 4kT Rf (1 + Rf/Rg),
// NG = 1 + Rf/Rg (op-amp noise analysis, e.g. Franco, "Design with Operational Amplifiers
// and Analog Integrated Circuits", 2015), within 1e-4; every part and both input currents
// are listed by their key; and the same circuit written as the shorthand stage budgets the
// same total.
#[test]
fn network_noise_budget_matches_the_textbook_non_inverting_stage() {
    let (rs, rf, rg) = (10e3, 47e3, 4.7e3);
    let text = format!(
        "{RAILS}{NOISY}{}[stages.n]\ntype = \"network\"\n\
amps = [{{ part = \"quiet\", plus = \"p\", minus = \"m\", out = \"y\" }}]\n\
parts = [{{ r = \"{rs}\", ends = [\"v\", \"p\"] }}, {{ r = \"{rf}\", ends = [\"y\", \"m\"] }}, \
{{ r = \"{rg}\", ends = [\"m\", \"gnd\"] }}]\n\
out = \"y\"\n[outputs.o]\nfrom = \"n\"\n",
        sine_src("v", 0.1, 0.0)
    );
    let (d, labels) = noise_density(&text, "o");
    let p = railsong::patch::parse_str(&text, "n.toml", Path::new("."), &[]).unwrap();
    let kt4 = 4.0 * railsong::budget::BOLTZMANN * p.temperature;
    let (en, inn) = (10e-9, 2e-12);
    let ng = 1.0 + rf / rg;
    let want = (ng * ng * (en * en + kt4 * rs + (inn * rs).powi(2))
        + (inn * rf).powi(2)
        + kt4 * rf * (1.0 + rf / rg))
        .sqrt();
    assert!((d / want - 1.0).abs() < 1e-4, "{d} against {want}");
    for l in [
        "stages.n.parts[0]",
        "stages.n.parts[1]",
        "stages.n.parts[2]",
        "stages.n.amps[0] en",
        "stages.n.amps[0] in+",
        "stages.n.amps[0] in-",
    ] {
        assert!(labels.iter().any(|x| x.starts_with(l)), "{l} in {labels:?}");
    }
    // the shorthand stage, fed through a unity follower network carrying Rs (so both see the
    // same source resistance), budgets the same noise at its output
    let short = format!(
        "{RAILS}{NOISY}{}[stages.rs]\ntype = \"network\"\namps = []\n\
parts = [{{ r = \"{rs}\", ends = [\"v\", \"p\"] }}, {{ r = \"1G\", ends = [\"p\", \"gnd\"] }}]\nout = \"p\"\n\
[stages.s]\ntype = \"non-inverting\"\npart = \"quiet\"\nfrom = \"rs\"\nr_fb = \"{rf}\"\nr_g = \"{rg}\"\n\
[outputs.o]\nfrom = \"s\"\n",
        sine_src("v", 0.1, 0.0)
    );
    let (ds, _) = noise_density(&short, "o");
    // 1G to ground adds its own 4kT 1G through Rs/(Rs + 1G): 1e-5 of Rs's power
    assert!(
        (ds / want - 1.0).abs() < 1e-4,
        "shorthand {ds} against {want}"
    );
}

// A diode's shot noise: a forward-biased junction (is, n, no series resistance) fed from the
// positive rail through R, read at its node (`from = "net.d"`). Its current I from the
// Shockley equation (solved here by Newton's method), its small-signal resistance
// rd = n Vt / (I + is); the node's density is 2 q I (R || rd)^2 (Schottky's shot noise)
// plus R's 4kT R (rd / (R + rd))^2, within 1e-3.
#[test]
fn network_noise_budget_includes_diode_shot_noise() {
    let r = 10e3;
    let text = format!(
        "{RAILS}{}[diodes.plain]\nis = \"1e-14 A\"\nn = 1\nrs = \"0\"\ncj = \"0\"\n\
[stages.net]\ntype = \"network\"\namps = []\n\
parts = [{{ r = \"{r}\", ends = [\"pos\", \"d\"] }}, {{ diode = \"plain\", ends = [\"d\", \"gnd\"] }}, \
{{ r = \"10k\", ends = [\"v\", \"x\"] }}, {{ r = \"10k\", ends = [\"x\", \"gnd\"] }}]\nout = \"x\"\n\
[outputs.o]\nfrom = \"net.d\"\n",
        sine_src("v", 0.1, 0.0)
    );
    let p = railsong::patch::parse_str(&text, "d.toml", Path::new("."), &[])
        .unwrap_or_else(|e| panic!("{e}"));
    let vt =
        railsong::budget::BOLTZMANN * p.temperature / railsong::parts::diodes::ELEMENTARY_CHARGE;
    let is = 1e-14;
    let mut v: f64 = 0.6;
    for _ in 0..100 {
        let f = is * ((v / vt).exp() - 1.0) - (12.0 - v) / r;
        let df = is / vt * (v / vt).exp() + 1.0 / r;
        v -= f / df;
    }
    let i = (12.0 - v) / r;
    let rd = vt / (i + is);
    let kt4 = 4.0 * railsong::budget::BOLTZMANN * p.temperature;
    let par = r * rd / (r + rd);
    let want = (2.0 * railsong::parts::diodes::ELEMENTARY_CHARGE * i * par * par
        + kt4 * r * (rd / (r + rd)).powi(2))
    .sqrt();
    let (d, labels) = noise_density(&text, "o");
    assert!((d / want - 1.0).abs() < 1e-3, "{d} against {want}");
    assert!(
        labels
            .iter()
            .any(|l| l.starts_with("stages.net.parts[1] (diode, shot")),
        "{labels:?}"
    );
}
