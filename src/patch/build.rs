//! Validation: a parsed TOML document -> [`crate::model::Patch`].

use std::cmp::Reverse;
use std::collections::{BinaryHeap, HashMap};
use std::path::Path;

use super::error::{suggest, PatchError, Problem};
use super::read::{bounded, check, quantity, valid_name, Bounds, Ctx, Tab, R};
use super::schema;
use crate::model::{
    Envelope, Feedback, NetNode, NetPartKind, Node, Output, Patch, PotSetting, Rails, Source,
    Stage, StageKind, SumInput, Taper, Tone, Wave, POT_END_R,
};
use crate::parts::{self, taper::LOG_MID_DEFAULT, OpAmp};
use crate::units::{Level, Quantity};

/// Resistances: 1 mohm to 1 Gohm.
pub(crate) const R_RANGE: Bounds = Bounds::closed(1e-3, 1e9);
/// Capacitances: 1 fF to 10 F.
pub(crate) const C_RANGE: Bounds = Bounds::closed(1e-15, 10.0);
/// Times (start, stop, durations): up to an hour.
const MAX_TIME: f64 = 3600.0;
/// Source voltages (levels, offsets, amplitudes): within +/- 1 kV.
const MAX_V: f64 = 1000.0;
/// Rails: each within +/- 100 V.
const MAX_RAIL: f64 = 100.0;
/// Durations (`decay`, `duration`, `hold`): at least 1 us.
const MIN_DURATION: f64 = 1e-6;
/// Most tones in one multitone source (each costs a sine per sample at the internal rate).
pub const MAX_TONES: usize = 1000;
/// Longest output name and output file stem: the longest name railsong derives from one
/// (`NAME-tolerance-gain.svg`, `NAME-sweep-FIGURE.svg`, `STEM-VARIANT.wav`) must still pass
/// the 100-character file-name filter.
pub const MAX_OUTPUT_NAME: usize = 64;
/// Longest variant name (it is appended to output file stems).
pub const MAX_VARIANT_NAME: usize = 32;

/// Build and check the patch. `stem` is the default title.
pub(crate) fn build(doc: &toml::Table, ctx: &Ctx, stem: &str, base_dir: &Path) -> R<Patch> {
    let root = Tab::new(ctx, String::new(), doc);
    root.check_keys(schema::TOP, &[], "")?;

    // [rails] first: the default full scale and the reference range depend on them.
    let rails_tab = root.table_req(
        "rails",
        "a [rails] table with pos and neg, like pos = \"12 V\", neg = \"-12 V\"",
    )?;
    let rails = rails(&rails_tab)?;

    let ptab = root.table_opt("patch")?;
    let empty = toml::Table::new();
    let ptab = ptab.unwrap_or_else(|| Tab::new(ctx, "patch".into(), &empty));
    ptab.check_keys(schema::PATCH, &[], "")?;
    let title = ptab.str_opt("title")?.unwrap_or(stem).to_string();
    let rate = ptab
        .q_opt("rate", Quantity::Frequency, Bounds::closed(8e3, 768e3))?
        .unwrap_or(48e3);
    let length = ptab
        .q_opt("length", Quantity::Time, Bounds::closed(1e-3, MAX_TIME))?
        .unwrap_or(2.0);
    // No render of a length no WAV file can hold (16-bit, the smallest, at this rate) could
    // ever finish: refuse it here rather than after writing 4 GiB.
    let spec16 = crate::signal::WavSpec {
        rate: rate.round() as u32,
        channels: 1,
        depth: crate::signal::Depth::Pcm16,
        full_scale: 1.0,
        dither_seed: 0,
    };
    let frames = (length * rate).round() as u64;
    if let Err(e) = crate::signal::check_fits("every output", &spec16, frames) {
        let key = if ptab.get("length").is_some() {
            "length"
        } else {
            "rate"
        };
        return Err(ptab.err(key, Problem::Other(e.to_string())));
    }
    let oversample = match ptab.int_opt("oversample")? {
        None => 4,
        Some(k) if [1, 2, 4, 8, 16].contains(&k) => k as usize,
        Some(_) => {
            return Err(ptab.err(
                "oversample",
                Problem::OutOfRange {
                    expected: "one of 1, 2, 4, 8, 16".into(),
                    got: super::read::raw(&ptab.t["oversample"]),
                },
            ))
        }
    };
    let seed = match ptab.int_opt("seed")? {
        None => 1,
        Some(s) if s >= 0 => s as u64,
        Some(s) => {
            return Err(ptab.err(
                "seed",
                Problem::OutOfRange {
                    expected: "a seed of 0 or more".into(),
                    got: s.to_string(),
                },
            ))
        }
    };
    // Default on for renders (`check` never runs the engine, so it is unaffected).
    let noise = ptab.bool_opt("noise")?.unwrap_or(true);
    let temperature = ptab
        .q_opt(
            "temperature",
            Quantity::Temperature,
            Bounds::closed(1.0, 1000.0),
        )?
        .unwrap_or(25.0 + crate::units::ZERO_CELSIUS);
    let full_scale = match ptab.get("full_scale") {
        None => DEFAULT_FULL_SCALE_MARGIN * rails.pos.abs().max(rails.neg.abs()),
        Some(v) => full_scale(ctx, &ptab.key_path("full_scale"), v)?,
    };

    let tol_bounds = Bounds::closed(0.0, 0.5);
    let mut tolerances = crate::model::Tolerances {
        resistor: ptab.q_opt("tolerance", Quantity::Percent, tol_bounds)?,
        capacitor: ptab.q_opt("cap_tolerance", Quantity::Percent, tol_bounds)?,
        stages: Vec::new(),
    };

    let parts = build_parts(&root)?;
    let diodes = super::network::build_diodes(&root)?;
    let knobs = super::network::build_knobs(&root)?;

    // Names of sources and stages share one namespace (`from` refers to either).
    let src_tab = root.table_opt("sources")?;
    let stg_tab = root.table_opt("stages")?;
    let mut nodes: HashMap<String, Node> = HashMap::new();
    let mut src_list: Vec<(&String, &toml::Table)> = Vec::new();
    let mut stg_list: Vec<(&String, &toml::Table)> = Vec::new();
    if let Some(st) = &src_tab {
        for (name, v) in st.t {
            let t = entity(st, name, v, "a [sources.NAME] table like wave = \"sine\"")?;
            nodes.insert(name.clone(), Node::Source(src_list.len()));
            src_list.push((name, t));
        }
    }
    if let Some(st) = &stg_tab {
        for (name, v) in st.t {
            let t = entity(
                st,
                name,
                v,
                "a [stages.NAME] table like type = \"follower\"",
            )?;
            if nodes.contains_key(name) {
                return Err(st.err(
                    name,
                    Problem::Other(format!(
                        "the name '{name}' is already used by sources.{name} (sources and \
                         stages share one set of names)"
                    )),
                ));
            }
            nodes.insert(name.clone(), Node::Stage(stg_list.len()));
            stg_list.push((name, t));
        }
    }
    let names = Names {
        nodes,
        sources: src_list.iter().map(|(n, _)| n.as_str()).collect(),
        stages: stg_list.iter().map(|(n, _)| n.as_str()).collect(),
    };

    let mut sources = Vec::with_capacity(src_list.len());
    for (name, t) in &src_list {
        let tab = Tab::new(ctx, format!("sources.{name}"), t);
        sources.push(source(&tab, name, rate, base_dir)?);
        // A retrigger period under one sample cannot be rendered (the generator refuses it).
        if let Some(every) = sources.last().and_then(|s| s.envelope.as_ref()?.every) {
            if every * rate < 1.0 {
                return Err(tab.err(
                    "every",
                    Problem::OutOfRange {
                        expected: format!(
                            "a retrigger period of at least one sample ({} at patch.rate)",
                            crate::units::fmt_eng(1.0 / rate, "s")
                        ),
                        got: super::read::raw(&tab.t["every"]),
                    },
                ));
            }
        }
    }

    let env = StageEnv {
        names: &names,
        parts: &parts,
        rails,
    };
    let net_env = super::network::NetEnv {
        nodes: &names.nodes,
        stage_names: &names.stages,
        parts: &parts,
        diodes: &diodes,
        knobs: &knobs,
        rails,
    };
    let mut knobs_used = vec![false; knobs.len()];
    let mut pending = Vec::new();
    let mut stages = Vec::with_capacity(stg_list.len());
    for (name, t) in &stg_list {
        let tab = Tab::new(ctx, format!("stages.{name}"), t);
        if matches!(t.get("type"), Some(toml::Value::String(s)) if s == "network") {
            tab.check_keys(
                schema::stage_keys("network"),
                &schema::all_stage_keys(),
                "to type = \"network\"",
            )?;
            let net = super::network::network(&tab, name, &net_env, &mut knobs_used, &mut pending)?;
            stages.push(Stage {
                name: name.to_string(),
                part: None,
                kind: StageKind::Network(net),
            });
        } else {
            stages.push(stage(&tab, name, &env, &net_env, &mut pending)?);
        }
        let r = tab.q_opt("tolerance", Quantity::Percent, tol_bounds)?;
        let c = tab.q_opt("cap_tolerance", Quantity::Percent, tol_bounds)?;
        if r.is_some() || c.is_some() {
            tolerances.stages.push((name.to_string(), r, c));
        }
    }
    resolve_inner(ctx, &mut stages, &pending)?;
    if let Some(k) = knobs_used.iter().position(|u| !u) {
        return Err(ctx.err(
            &format!("knobs.{}", knobs[k].0),
            Problem::Other(format!(
                "no pot uses the knob '{}': set a pot's at = \"{}\", or remove the knob",
                knobs[k].0, knobs[k].0
            )),
        ));
    }
    let stages = topo_order(ctx, stages)?;
    let stage_pos: HashMap<&str, usize> = stages
        .iter()
        .enumerate()
        .map(|(i, s)| (s.name.as_str(), i))
        .collect();

    let outputs = build_outputs(&root, &names, &stages, &stage_pos)?;

    Ok(Patch {
        title,
        rate,
        length,
        oversample,
        seed,
        noise,
        temperature,
        rails,
        full_scale,
        sources,
        stages,
        outputs,
        tolerances,
    })
}

/// One `[sources.NAME]` / `[stages.NAME]` / ... entry: a valid name and a table.
fn entity<'a>(
    parent: &Tab<'a>,
    name: &str,
    v: &'a toml::Value,
    expected: &str,
) -> R<&'a toml::Table> {
    if !valid_name(name) {
        return Err(parent.err(
            name,
            Problem::BadName {
                name: name.to_string(),
            },
        ));
    }
    match v {
        toml::Value::Table(t) => Ok(t),
        other => Err(parent.err(
            name,
            Problem::WrongType {
                expected: expected.to_string(),
                found: super::read::type_name(other),
            },
        )),
    }
}

fn rails(t: &Tab) -> R<Rails> {
    t.check_keys(schema::RAILS, &[], "")?;
    let b = Bounds::closed(-MAX_RAIL, MAX_RAIL);
    let pos = t.q_req("pos", Quantity::Voltage, b)?;
    let neg = t.q_req("neg", Quantity::Voltage, b)?;
    if pos <= neg {
        return Err(t.err(
            "pos",
            Problem::Other(format!(
                "the positive rail ({}) must be above the negative rail ({})",
                crate::units::fmt_eng(pos, "V"),
                crate::units::fmt_eng(neg, "V")
            )),
        ));
    }
    Ok(Rails { pos, neg })
}

/// A full-scale voltage: peak (or peak-to-peak, halved); RMS makes no sense for a file scale.
/// Default calibration: full scale is this many times the larger rail. A rail-to-rail step
/// (a clipping edge, a phase reversal) band-limited to the file's rate overshoots by up to
/// about 9 % of the step (Gibbs), i.e. about 18 % of one rail: 1.25 keeps it inside the file.
pub const DEFAULT_FULL_SCALE_MARGIN: f64 = 1.25;

fn full_scale(ctx: &Ctx, path: &str, v: &toml::Value) -> R<f64> {
    let l = super::read::level(ctx, path, v)?;
    let x = match l {
        Level::Peak(x) => x,
        Level::PeakToPeak(x) => x / 2.0,
        Level::Rms(_) => {
            return Err(ctx.err(
                path,
                Problem::Other(
                    "a full scale is a peak voltage, like \"12 V\" or \"24 Vpp\", not an RMS \
                     level"
                        .into(),
                ),
            ))
        }
    };
    check(
        ctx,
        path,
        v,
        Quantity::Voltage,
        x,
        Bounds::closed(1e-3, MAX_V),
    )
}

// ----- parts ---------------------------------------------------------------------------------

fn build_parts(root: &Tab) -> R<HashMap<String, OpAmp>> {
    let mut done: HashMap<String, OpAmp> = HashMap::new();
    let Some(pt) = root.table_opt("parts")? else {
        return Ok(done);
    };
    let mut tables: HashMap<&str, &toml::Table> = HashMap::new();
    for (name, v) in pt.t {
        let t = entity(
            &pt,
            name,
            v,
            "a [parts.NAME] table like based_on = \"ideal\"",
        )?;
        if parts::builtin(name).is_some() {
            return Err(pt.err(
                name,
                Problem::Other(format!(
                    "'{name}' is a built-in part; give your part another name and \
                     based_on = \"{name}\""
                )),
            ));
        }
        tables.insert(name.as_str(), t);
    }
    let base_of = |name: &str| -> R<String> {
        let tab = Tab::new(pt.ctx, format!("parts.{name}"), tables[name]);
        Ok(tab.str_opt("based_on")?.unwrap_or("ideal").to_string())
    };
    for (name, _) in pt.t {
        if done.contains_key(name) {
            continue;
        }
        // Follow based_on down to a built-in or an already resolved part (no recursion: a
        // long chain cannot overflow the stack).
        let mut chain: Vec<String> = vec![name.clone()];
        let start: OpAmp = loop {
            let cur = chain.last().cloned().unwrap_or_default();
            let base = base_of(&cur)?;
            if let Some(p) = done.get(&base) {
                break p.clone();
            }
            if let Some(p) = parts::builtin(&base) {
                break p;
            }
            if let Some(k) = chain.iter().position(|c| *c == base) {
                let mut cycle: Vec<String> = chain[k..].to_vec();
                cycle.push(base.clone());
                return Err(pt.ctx.err(
                    &format!("parts.{}.based_on", chain[k]),
                    Problem::PartCycle { cycle },
                ));
            }
            if !tables.contains_key(base.as_str()) {
                let mut valid: Vec<&str> = parts::builtin_names().to_vec();
                valid.extend(pt.t.keys().map(String::as_str));
                return Err(pt.ctx.err(
                    &format!("parts.{cur}.based_on"),
                    Problem::UnknownName {
                        what: "part".into(),
                        suggestion: suggest(&base, valid.iter().copied()),
                        name: base,
                        valid_list: format!("valid parts are {}", valid.join(", ")),
                    },
                ));
            }
            chain.push(base);
        };
        let mut p = start;
        for n in chain.iter().rev() {
            let tab = Tab::new(pt.ctx, format!("parts.{n}"), tables[n.as_str()]);
            p = part_fields(&tab, n, p)?;
            done.insert(n.clone(), p.clone());
        }
    }
    Ok(done)
}

/// Gain-bandwidth products: 100 Hz to 1 THz.
const GBW_RANGE: Bounds = Bounds::closed(100.0, 1e12);
/// Slew rates: 1 kV/s (0.001 V/us) to 10^12 V/s.
const SLEW_RANGE: Bounds = Bounds::closed(1e3, 1e12);

/// Apply a part table's fields over its base.
fn part_fields(t: &Tab, name: &str, base: OpAmp) -> R<OpAmp> {
    t.check_keys(schema::PART, &[], "")?;
    let mut p = base;
    let based_on = p.name.clone();
    p.name = name.to_string();
    p.about = match t.str_opt("about")? {
        Some(a) => a.to_string(),
        None => format!("based on {based_on}"),
    };
    if let Some(x) = t.q_opt("gbw", Quantity::Frequency, GBW_RANGE)? {
        p.gbw = x;
    }
    if let Some(x) = t.q_opt("slew", Quantity::SlewRate, SLEW_RANGE)? {
        p.slew = x;
    }
    if let Some(x) = t.q_or_none("a0", Quantity::Ratio, Bounds::closed(1.0, 1e12))? {
        p.a0 = x;
    }
    let drop = Bounds::closed(0.0, MAX_RAIL);
    if let Some(x) = t.q_opt("drop_pos", Quantity::Voltage, drop)? {
        p.drop_pos = x;
    }
    if let Some(x) = t.q_opt("drop_neg", Quantity::Voltage, drop)? {
        p.drop_neg = x;
    }
    if let Some(x) = t.q_opt("knee", Quantity::Voltage, Bounds::closed(0.0, 10.0))? {
        p.knee = x;
    }
    let cm = Bounds::closed(-MAX_RAIL, MAX_RAIL);
    if let Some(x) = t.q_or_none("cm_low", Quantity::Voltage, cm)? {
        p.cm_low = x;
    }
    if let Some(x) = t.q_or_none("cm_high", Quantity::Voltage, cm)? {
        p.cm_high = x;
    }
    if let Some(x) = t.bool_opt("reversal")? {
        p.reversal = x;
    }
    if let Some(x) = t.q_opt("vos", Quantity::Voltage, Bounds::closed(-1.0, 1.0))? {
        p.vos = x;
    }
    if let Some(x) = t.q_opt("ib", Quantity::Current, Bounds::closed(-1e-3, 1e-3))? {
        p.ib = x;
    }
    if let Some(x) = t.q_opt("en", Quantity::VoltageNoise, Bounds::closed(0.0, 1e-6))? {
        p.en = x;
    }
    if let Some(x) = t.q_opt("en_corner", Quantity::Frequency, Bounds::closed(0.0, 1e6))? {
        p.en_corner = x;
    }
    if let Some(x) = t.q_opt("in", Quantity::CurrentNoise, Bounds::closed(0.0, 1e-9))? {
        p.inoise = x;
    }
    if let Some(x) = t.q_or_none("isc", Quantity::Current, Bounds::closed(1e-6, 100.0))? {
        p.isc = x;
    }
    if let Some(x) = t.q_or_none("supply_max", Quantity::Voltage, Bounds::closed(1.0, 1000.0))? {
        p.supply_max = x.unwrap_or(f64::INFINITY);
    }
    Ok(p)
}

// ----- sources -------------------------------------------------------------------------------

/// Crest factor (peak / RMS) of each periodic wave, for converting an RMS level to peak:
/// sine sqrt 2, square and pulse (swinging +/- amp) 1, triangle and sawtooth sqrt 3
/// (textbook closed forms).
fn crest(wave: &str) -> f64 {
    match wave {
        "square" | "pulse" => 1.0,
        "triangle" | "saw" => 3f64.sqrt(),
        _ => std::f64::consts::SQRT_2,
    }
}

fn to_peak(l: Level, crest: f64) -> f64 {
    match l {
        Level::Peak(v) => v,
        Level::PeakToPeak(v) => v / 2.0,
        Level::Rms(v) => v * crest,
    }
}

/// A peak amplitude from a level key (required).
fn amp(t: &Tab, key: &str, crest: f64) -> R<f64> {
    let l = t.level_req(key)?;
    let v = &t.t[key];
    check(
        t.ctx,
        &t.key_path(key),
        v,
        Quantity::Level,
        to_peak(l, crest),
        Bounds::closed(0.0, MAX_V),
    )
}

fn freq(t: &Tab, key: &str, rate: f64) -> R<f64> {
    t.q_req(key, Quantity::Frequency, Bounds::open(0.0, rate / 2.0))
}

fn phase(t: &Tab) -> R<f64> {
    Ok(
        t.q_opt("phase", Quantity::Angle, Bounds::closed(-1e6, 1e6))?
            .unwrap_or(0.0),
    )
}

fn volts(t: &Tab, key: &str) -> R<Option<f64>> {
    t.q_opt(key, Quantity::Voltage, Bounds::closed(-MAX_V, MAX_V))
}

fn duration(t: &Tab, key: &str) -> R<f64> {
    t.q_req(key, Quantity::Time, Bounds::closed(MIN_DURATION, MAX_TIME))
}

fn source(t: &Tab, name: &str, rate: f64, base_dir: &Path) -> R<Source> {
    if !t.has("wave") {
        // a misspelt key may be the missing one: report it first
        t.check_keys(&schema::all_source_keys(), &[], "to a source")?;
    }
    let wave = t.word("wave", schema::WAVES)?.ok_or_else(|| {
        t.err_here(Problem::Missing {
            key: "wave".into(),
            expected: format!("one of {}", schema::WAVES.join(", ")),
        })
    })?;
    let mut allowed: Vec<&str> = schema::SOURCE_COMMON.to_vec();
    allowed.extend_from_slice(schema::wave_keys(wave));
    t.check_keys(
        &allowed,
        &schema::all_source_keys(),
        &format!("to wave = \"{wave}\""),
    )?;
    let raw = || -> R<bool> { Ok(t.bool_opt("raw")?.unwrap_or(false)) };
    let w = match wave {
        "sine" => Wave::Sine {
            freq: freq(t, "freq", rate)?,
            amp: amp(t, "amp", crest(wave))?,
            phase: phase(t)?,
        },
        "square" => Wave::Square {
            freq: freq(t, "freq", rate)?,
            amp: amp(t, "amp", crest(wave))?,
            phase: phase(t)?,
            raw: raw()?,
        },
        "triangle" => Wave::Triangle {
            freq: freq(t, "freq", rate)?,
            amp: amp(t, "amp", crest(wave))?,
            phase: phase(t)?,
            raw: raw()?,
        },
        "saw" => Wave::Saw {
            freq: freq(t, "freq", rate)?,
            amp: amp(t, "amp", crest(wave))?,
            phase: phase(t)?,
            raw: raw()?,
        },
        "pulse" => Wave::Pulse {
            freq: freq(t, "freq", rate)?,
            amp: amp(t, "amp", crest(wave))?,
            phase: phase(t)?,
            width: t
                .q_opt("width", Quantity::Percent, Bounds::open(0.0, 1.0))?
                .unwrap_or(0.5),
            raw: raw()?,
        },
        "multitone" => {
            let a = t.array_req(
                "tones",
                "an array like [{ freq = \"1 kHz\", amp = \"1 Vpk\" }, ...]",
            )?;
            if a.is_empty() {
                return Err(t.err("tones", Problem::Other("needs at least one tone".into())));
            }
            if a.len() > MAX_TONES {
                return Err(t.err(
                    "tones",
                    Problem::Other(format!(
                        "{} tones: expected at most {MAX_TONES} (each tone costs a sine per \
                         sample); use a noise source for a dense spectrum",
                        a.len()
                    )),
                ));
            }
            let mut tones = Vec::with_capacity(a.len());
            for tt in t.tables_in("tones", a, "{ freq = \"1 kHz\", amp = \"1 Vpk\" }")? {
                tt.check_keys(schema::TONE, &[], "")?;
                tones.push(Tone {
                    freq: freq(&tt, "freq", rate)?,
                    amp: amp(&tt, "amp", crest("sine"))?,
                    phase: phase(&tt)?,
                });
            }
            Wave::Multitone { tones }
        }
        "sweep" => Wave::Sweep {
            from: freq(t, "freq", rate)?,
            to: freq(t, "freq_end", rate)?,
            amp: amp(t, "amp", crest("sweep"))?,
            duration: duration(t, "duration")?,
        },
        "noise" => {
            let l = t.level_req("amp")?;
            let rms = match (l, &t.t["amp"]) {
                (Level::Rms(v), _) => v,
                (Level::Peak(v), toml::Value::Integer(_) | toml::Value::Float(_)) => v,
                _ => {
                    return Err(t.err(
                        "amp",
                        Problem::Other(format!(
                            "a noise level is RMS: write it like \"1 Vrms\", \"-10 dBV\" or \
                             \"+4 dBu\", got {}",
                            super::read::raw(&t.t["amp"])
                        )),
                    ))
                }
            };
            let rms = check(
                t.ctx,
                &t.key_path("amp"),
                &t.t["amp"],
                Quantity::Level,
                rms,
                Bounds::closed(0.0, MAX_V),
            )?;
            let pink = t.word("color", &["white", "pink"])? == Some("pink");
            Wave::Noise { pink, rms }
        }
        "dc" => Wave::Dc {
            level: volts(t, "level")?.ok_or_else(|| missing(t, "level", Quantity::Voltage))?,
        },
        "steps" => {
            let a = t.array_req("levels", "an array of voltages like [\"0 V\", \"1 V\"]")?;
            if a.is_empty() {
                return Err(t.err("levels", Problem::Other("needs at least one level".into())));
            }
            let mut levels = Vec::with_capacity(a.len());
            for (i, v) in a.iter().enumerate() {
                let p = format!("{}[{i}]", t.key_path("levels"));
                levels.push(bounded(
                    t.ctx,
                    &p,
                    v,
                    Quantity::Voltage,
                    Bounds::closed(-MAX_V, MAX_V),
                )?);
            }
            Wave::Steps {
                levels,
                hold: duration(t, "hold")?,
            }
        }
        "ramp" => Wave::Ramp {
            from: volts(t, "level")?.ok_or_else(|| missing(t, "level", Quantity::Voltage))?,
            to: volts(t, "level_end")?.ok_or_else(|| missing(t, "level_end", Quantity::Voltage))?,
            duration: duration(t, "duration")?,
        },
        "file" => {
            let p = t.str_req("path", "the WAV file to play, like \"drums.wav\"")?;
            if p.trim().is_empty() {
                return Err(t.err("path", Problem::Other("the path is empty".into())));
            }
            let joined = base_dir.join(p);
            let path = std::path::absolute(&joined).unwrap_or(joined);
            let channel = match t.int_opt("channel")? {
                None => None,
                Some(c) if (0..=255).contains(&c) => Some(c as usize),
                Some(c) => {
                    return Err(t.err(
                        "channel",
                        Problem::OutOfRange {
                            expected: "a channel number from 0 to 255 (0 is the first)".into(),
                            got: c.to_string(),
                        },
                    ))
                }
            };
            let full_scale = match t.get("full_scale") {
                None => FILE_FULL_SCALE,
                Some(v) => full_scale(t.ctx, &t.key_path("full_scale"), v)?,
            };
            Wave::File {
                path,
                channel,
                full_scale,
                looped: t.bool_opt("loop")?.unwrap_or(true),
            }
        }
        // `word` only returns listed waves.
        other => {
            return Err(t.err(
                "wave",
                Problem::Other(format!("wave '{other}' is not supported")),
            ))
        }
    };
    let offset = volts(t, "offset")?.unwrap_or(0.0);
    let time = Bounds::closed(0.0, MAX_TIME);
    let start = t.q_opt("start", Quantity::Time, time)?.unwrap_or(0.0);
    let stop = t.q_opt("stop", Quantity::Time, time)?;
    if let Some(s) = stop {
        if s <= start {
            return Err(t.err(
                "stop",
                Problem::Other(format!(
                    "stop ({}) must come after start ({})",
                    crate::units::fmt_eng(s, "s"),
                    crate::units::fmt_eng(start, "s")
                )),
            ));
        }
    }
    let attack = t.q_opt("attack", Quantity::Time, time)?;
    let dur = Bounds::closed(MIN_DURATION, MAX_TIME);
    let decay = t.q_opt("decay", Quantity::Time, dur)?;
    let every = t.q_opt("every", Quantity::Time, dur)?;
    let envelope = match (attack, decay, every) {
        (None, None, None) => None,
        (a, Some(d), e) => Some(Envelope {
            attack: a.unwrap_or(0.0),
            decay: d,
            every: e,
        }),
        (_, None, _) => {
            return Err(t.err_here(Problem::Missing {
                key: "decay".into(),
                expected: "the envelope's decay time constant, like \"200 ms\"".into(),
            }))
        }
    };
    let r = match t.get("r") {
        None => 0.0,
        Some(v) => {
            let p = t.key_path("r");
            let x = quantity(t.ctx, &p, v, Quantity::Resistance)?;
            if x == 0.0 {
                0.0
            } else {
                check(t.ctx, &p, v, Quantity::Resistance, x, R_RANGE)?
            }
        }
    };
    Ok(Source {
        name: name.to_string(),
        wave: w,
        offset,
        start,
        stop,
        envelope,
        r,
    })
}

/// Volts at digital full scale for a `wave = "file"` source when the patch does not say:
/// 1 V peak (a full-scale file plays at +/- 1 V).
pub const FILE_FULL_SCALE: f64 = 1.0;

fn missing(t: &Tab, key: &str, q: Quantity) -> PatchError {
    t.err_here(Problem::Missing {
        key: key.to_string(),
        expected: format!("{} like {}", q.name(), q.example()),
    })
}

// ----- stages --------------------------------------------------------------------------------

struct Names<'a> {
    nodes: HashMap<String, Node>,
    sources: Vec<&'a str>,
    stages: Vec<&'a str>,
}

impl Names<'_> {
    /// Resolve `from`-like key `key` of `t` to a node (stage indices in file order).
    fn node(&self, t: &Tab, key: &str) -> R<Node> {
        let name = t.str_req(key, "the name of a source or a stage")?;
        if let Some(n) = self.nodes.get(name) {
            return Ok(*n);
        }
        let all = self.sources.iter().chain(self.stages.iter()).copied();
        let list = |v: &[&str]| {
            if v.is_empty() {
                "none".to_string()
            } else {
                v.join(", ")
            }
        };
        Err(t.err(
            key,
            Problem::UnknownName {
                what: "source or stage".into(),
                name: name.to_string(),
                suggestion: suggest(name, all),
                valid_list: format!(
                    "sources: {}; stages: {}",
                    list(&self.sources),
                    list(&self.stages)
                ),
            },
        ))
    }
}

struct StageEnv<'a> {
    names: &'a Names<'a>,
    parts: &'a HashMap<String, OpAmp>,
    rails: Rails,
}

/// The op-amp named by a table's `part` key.
pub(crate) fn part_of(t: &Tab, parts: &HashMap<String, OpAmp>) -> R<OpAmp> {
    part(t, parts)
}

fn part(t: &Tab, parts: &HashMap<String, OpAmp>) -> R<OpAmp> {
    // The list of valid names is only built for a message.
    let valid = || {
        let mut v: Vec<String> = parts::builtin_names()
            .iter()
            .map(|s| s.to_string())
            .collect();
        let mut user: Vec<&String> = parts.keys().collect();
        user.sort();
        v.extend(user.into_iter().cloned());
        v
    };
    let Some(name) = t.str_opt("part")? else {
        return Err(t.err_here(Problem::Missing {
            key: "part".into(),
            expected: format!("an op-amp: {} or a [parts.NAME]", valid().join(", ")),
        }));
    };
    if let Some(p) = parts.get(name) {
        return Ok(p.clone());
    }
    if let Some(p) = parts::builtin(name) {
        return Ok(p);
    }
    let valid = valid();
    Err(t.err(
        "part",
        Problem::UnknownName {
            what: "part".into(),
            name: name.to_string(),
            suggestion: suggest(name, valid.iter().map(String::as_str)),
            valid_list: format!("valid parts are {}", valid.join(", ")),
        },
    ))
}

/// A part whose swing drops leave no room between the rails (the low limit `neg + drop_neg`
/// at or above the high limit `pos - drop_pos`) has no output at all: refuse it.
fn swing_room(t: &Tab, p: &OpAmp, rails: Rails) -> R<()> {
    let (lo, hi) = (rails.neg + p.drop_neg, rails.pos - p.drop_pos);
    if lo < hi {
        return Ok(());
    }
    let fmt = |v: f64| crate::units::fmt_eng(v, "V");
    Err(t.err(
        "part",
        Problem::Other(format!(
            "part '{}' leaves no output swing on these rails: drop_pos {} and drop_neg {} add \
             up to {}, not less than the {} between the rails; expected drops that leave the \
             output room to move",
            p.name,
            fmt(p.drop_pos),
            fmt(p.drop_neg),
            fmt(p.drop_pos + p.drop_neg),
            fmt(rails.pos - rails.neg)
        )),
    ))
}

fn res(t: &Tab, key: &str) -> R<f64> {
    t.q_req(key, Quantity::Resistance, R_RANGE)
}

fn cap(t: &Tab, key: &str) -> R<Option<f64>> {
    t.q_opt(key, Quantity::Capacitance, C_RANGE)
}

fn reference(t: &Tab, rails: Rails) -> R<f64> {
    Ok(t.q_opt(
        "ref",
        Quantity::Voltage,
        Bounds::closed(rails.neg, rails.pos),
    )?
    .unwrap_or(0.0))
}

/// A pot: track resistance at `key`, `taper`, `at`, `mid`.
fn pot_setting(t: &Tab, key: &str) -> R<PotSetting> {
    let track = res(t, key)?;
    let taper = t.word("taper", schema::TAPERS)?.unwrap_or("linear");
    let at = t
        .q_req("at", Quantity::Percent, Bounds::closed(0.0, 1.0))
        .map_err(|e| match (e.problem(), t.get("at")) {
            (Some(Problem::OutOfRange { .. }), Some(v)) => t.err(
                "at",
                Problem::OutOfRange {
                    expected: "a wiper position from 0 to 1 (or 0% to 100%)".into(),
                    got: super::read::raw(v),
                },
            ),
            _ => e,
        })?;
    let taper = match taper {
        "log" => Taper::Log {
            mid: t
                .q_opt("mid", Quantity::Percent, Bounds::open(0.0, 0.5))?
                .unwrap_or(LOG_MID_DEFAULT),
        },
        "antilog" => Taper::AntiLog {
            mid: t
                .q_opt("mid", Quantity::Percent, Bounds::open(0.5, 1.0))?
                .unwrap_or(1.0 - LOG_MID_DEFAULT),
        },
        _ => {
            if t.has("mid") {
                return Err(t.err(
                    "mid",
                    Problem::NotApplicable {
                        key: "mid".into(),
                        context: "to a linear taper (it sets the mid-rotation fraction of a \
                                  log or antilog taper)"
                            .into(),
                    },
                ));
            }
            Taper::Linear
        }
    };
    Ok(PotSetting { track, taper, at })
}

fn feedback(t: &Tab) -> R<Feedback> {
    t.check_keys(schema::FEEDBACK, &[], "")?;
    match (t.has("r"), t.has("pot")) {
        (true, true) => Err(t.err_here(Problem::Other(
            "give either 'r' (a fixed resistor) or 'pot' (a pot wired as a variable \
             resistor), not both"
                .into(),
        ))),
        (true, false) => {
            for k in ["taper", "at", "mid"] {
                if t.has(k) {
                    return Err(t.err(
                        k,
                        Problem::NotApplicable {
                            key: k.into(),
                            context: "to a fixed feedback resistor (it is for 'pot')".into(),
                        },
                    ));
                }
            }
            Ok(Feedback {
                r: res(t, "r")?,
                c: cap(t, "c")?,
                pot: None,
            })
        }
        (false, true) => {
            let pot = pot_setting(t, "pot")?;
            let r = (pot.track * parts::taper::fraction(pot.taper, pot.at)).max(POT_END_R);
            Ok(Feedback {
                r,
                c: cap(t, "c")?,
                pot: Some(pot),
            })
        }
        (false, false) => Err(t.err_here(Problem::Missing {
            key: "r".into(),
            expected: "a resistance like 100k, or 'pot' for a variable resistor".into(),
        })),
    }
}

const FEEDBACK_EXAMPLE: &str =
    "a table like { r = \"100k\" } or { pot = \"100k\", taper = \"log\", at = 0.5 }";

fn stage(
    t: &Tab,
    name: &str,
    env: &StageEnv,
    net_env: &super::network::NetEnv,
    pending: &mut Vec<super::network::Pending>,
) -> R<Stage> {
    if !t.has("type") {
        // a misspelt key may be the missing one ('tpye'): report it first
        t.check_keys(&schema::all_stage_keys(), &[], "to a stage")?;
    }
    let kind = t.word("type", schema::STAGE_TYPES)?.ok_or_else(|| {
        t.err_here(Problem::Missing {
            key: "type".into(),
            expected: format!("one of {}", schema::STAGE_TYPES.join(", ")),
        })
    })?;
    t.check_keys(
        schema::stage_keys(kind),
        &schema::all_stage_keys(),
        &format!("to type = \"{kind}\""),
    )?;
    let part = if kind == "attenuator" {
        None
    } else {
        let p = part(t, env.parts)?;
        swing_room(t, &p, env.rails)?;
        Some(p)
    };
    let names = env.names;
    // What each `from` reads, in key order: a source or stage (`Ext`), or another
    // network's inner node (`stage.node`), which makes this stage run as its network form.
    let mut froms: Vec<NetNode> = Vec::new();
    let mut from = |t: &Tab, key: &str| -> R<Node> {
        let s = t.str_req(key, "the name of a source or a stage")?;
        if !names.nodes.contains_key(s) && s.contains('.') {
            let mut locals = Vec::new();
            let n = super::network::node_ref(t, key, s, name, net_env, &mut locals, pending)?;
            froms.push(n);
            // a stand-in until the stage is rewritten as its network below
            return Ok(Node::Source(0));
        }
        let n = names.node(t, key)?;
        froms.push(NetNode::Ext(n));
        Ok(n)
    };
    let k = match kind {
        "inverting-sum" => {
            let a = t.array_req(
                "inputs",
                "an array like [{ from = \"osc\", r = \"100k\" }, ...]",
            )?;
            if a.is_empty() {
                return Err(t.err(
                    "inputs",
                    Problem::Other("an inverting summer needs at least one input".into()),
                ));
            }
            let mut inputs = Vec::with_capacity(a.len());
            for it in t.tables_in("inputs", a, "{ from = \"osc\", r = \"100k\" }")? {
                it.check_keys(schema::INPUT, &[], "")?;
                inputs.push(SumInput {
                    from: from(&it, "from")?,
                    r: res(&it, "r")?,
                    c: cap(&it, "c")?,
                });
            }
            StageKind::InvertingSum {
                inputs,
                feedback: feedback(&t.table_req("feedback", FEEDBACK_EXAMPLE)?)?,
                reference: reference(t, env.rails)?,
                single: false,
            }
        }
        "inverting" => {
            let input = SumInput {
                from: from(t, "from")?,
                r: res(t, "r_in")?,
                c: cap(t, "c_in")?,
            };
            let fb = match (t.has("r_fb"), t.has("feedback")) {
                (true, true) => {
                    return Err(t.err_here(Problem::Other(
                        "give either 'r_fb' or a 'feedback' table, not both".into(),
                    )))
                }
                (false, true) => {
                    if t.has("c_fb") {
                        return Err(t.err(
                            "c_fb",
                            Problem::NotApplicable {
                                key: "c_fb".into(),
                                context: "beside a 'feedback' table (put it there as c)".into(),
                            },
                        ));
                    }
                    feedback(&t.table_req("feedback", FEEDBACK_EXAMPLE)?)?
                }
                (true, false) => Feedback {
                    r: res(t, "r_fb")?,
                    c: cap(t, "c_fb")?,
                    pot: None,
                },
                (false, false) => {
                    return Err(t.err_here(Problem::Missing {
                        key: "r_fb".into(),
                        expected: format!(
                            "a resistance like 100k, or 'feedback' = {FEEDBACK_EXAMPLE}"
                        ),
                    }))
                }
            };
            StageKind::InvertingSum {
                inputs: vec![input],
                feedback: fb,
                reference: reference(t, env.rails)?,
                single: true,
            }
        }
        "non-inverting" => StageKind::NonInverting {
            from: from(t, "from")?,
            r_fb: res(t, "r_fb")?,
            c_fb: cap(t, "c_fb")?,
            r_g: res(t, "r_g")?,
            reference: reference(t, env.rails)?,
        },
        "follower" => StageKind::Follower {
            from: from(t, "from")?,
        },
        _ => {
            let pot = pot_setting(t, "pot")?;
            StageKind::Attenuator {
                from: from(t, "from")?,
                pot: pot.track,
                taper: pot.taper,
                at: pot.at,
            }
        }
    };
    if froms.iter().any(|n| matches!(n, NetNode::Inner(..))) {
        let net = super::network::shorthand_network(t, name, &k, part.as_ref(), env.rails, &froms)?;
        return Ok(Stage {
            name: name.to_string(),
            part: None,
            kind: StageKind::Network(net),
        });
    }
    Ok(Stage {
        name: name.to_string(),
        part,
        kind: k,
    })
}

/// Every node a stage reads.
fn inputs_of(kind: &StageKind) -> Vec<Node> {
    kind.reads()
}

/// Resolve `stage.node` references once every network is built: the stage must be a
/// network and the node one of its nodes (a passive node is loaded by whatever reads it:
/// the engine hangs that load on it).
fn resolve_inner(ctx: &Ctx, stages: &mut [Stage], pending: &[super::network::Pending]) -> R<()> {
    let mut resolved: Vec<usize> = Vec::with_capacity(pending.len());
    for p in pending {
        let other = &stages[p.stage];
        let StageKind::Network(net) = &other.kind else {
            return Err(ctx.err(
                &p.path,
                Problem::Other(format!(
                    "'{}.{}': stages.{} is not a network stage (stage.node reads a network's \
                     inner node)",
                    other.name, p.node, other.name
                )),
            ));
        };
        let Some(k) = net.nodes.iter().position(|n| *n == p.node) else {
            return Err(ctx.err(
                &p.path,
                Problem::UnknownName {
                    what: format!("node of stages.{}", other.name),
                    name: p.node.clone(),
                    suggestion: suggest(&p.node, net.nodes.iter().map(String::as_str)),
                    valid_list: format!("its nodes are {}", net.nodes.join(", ")),
                },
            ));
        };
        resolved.push(k);
    }
    let fix = |n: &mut NetNode| {
        if let NetNode::Inner(_, idx) = n {
            *idx = resolved[*idx];
        }
    };
    for st in stages.iter_mut() {
        if let StageKind::Network(net) = &mut st.kind {
            for a in &mut net.amps {
                fix(&mut a.plus);
                fix(&mut a.minus);
            }
            for p in &mut net.parts {
                fix(&mut p.ends[0]);
                fix(&mut p.ends[1]);
                if let NetPartKind::Pot { wiper, .. } = &mut p.kind {
                    fix(wiper);
                }
            }
        }
    }
    Ok(())
}

/// Remap a network node's stage indices after ordering.
fn net_node_remap(n: &mut NetNode, pos: &[usize]) {
    match n {
        NetNode::Ext(x) => remap_node(x, pos),
        NetNode::Inner(s, _) => *s = pos[*s],
        _ => {}
    }
}

fn remap_node(n: &mut Node, pos: &[usize]) {
    if let Node::Stage(i) = n {
        *i = pos[*i];
    }
}

fn remap(kind: &mut StageKind, pos: &[usize]) {
    match kind {
        StageKind::InvertingSum { inputs, .. } => {
            for i in inputs {
                remap_node(&mut i.from, pos);
            }
        }
        StageKind::NonInverting { from, .. }
        | StageKind::Follower { from }
        | StageKind::Attenuator { from, .. } => remap_node(from, pos),
        StageKind::Network(net) => {
            for a in &mut net.amps {
                net_node_remap(&mut a.plus, pos);
                net_node_remap(&mut a.minus, pos);
            }
            for p in &mut net.parts {
                net_node_remap(&mut p.ends[0], pos);
                net_node_remap(&mut p.ends[1], pos);
                if let NetPartKind::Pot { wiper, .. } = &mut p.kind {
                    net_node_remap(wiper, pos);
                }
            }
        }
    }
}

/// Order stages so each comes after every stage it reads (file order among the free ones);
/// report a cycle in signal-flow order.
fn topo_order(ctx: &Ctx, stages: Vec<Stage>) -> R<Vec<Stage>> {
    let n = stages.len();
    let deps: Vec<Vec<usize>> = stages
        .iter()
        .map(|s| {
            inputs_of(&s.kind)
                .into_iter()
                .filter_map(|x| match x {
                    Node::Stage(i) => Some(i),
                    Node::Source(_) => None,
                })
                .collect()
        })
        .collect();

    // Cycle search: iterative depth-first walk along "reads from" edges.
    let mut color = vec![0u8; n]; // 0 new, 1 on the path, 2 done
    for root in 0..n {
        if color[root] != 0 {
            continue;
        }
        let mut stack: Vec<(usize, usize)> = vec![(root, 0)];
        color[root] = 1;
        while let Some(top) = stack.last_mut() {
            let v = top.0;
            if top.1 < deps[v].len() {
                let w = deps[v][top.1];
                top.1 += 1;
                match color[w] {
                    0 => {
                        color[w] = 1;
                        stack.push((w, 0));
                    }
                    1 => {
                        let k = stack.iter().position(|&(x, _)| x == w).unwrap_or(0);
                        // The path reads backwards along the signal; reverse it, start at
                        // the stage that comes first in the file.
                        let mut cyc: Vec<usize> =
                            stack[k..].iter().map(|&(x, _)| x).rev().collect();
                        let first = (0..cyc.len()).min_by_key(|&i| cyc[i]).unwrap_or(0);
                        cyc.rotate_left(first);
                        let mut names: Vec<String> =
                            cyc.iter().map(|&i| stages[i].name.clone()).collect();
                        names.push(stages[cyc[0]].name.clone());
                        return Err(ctx.err(
                            &format!("stages.{}", stages[cyc[0]].name),
                            Problem::Cycle { cycle: names },
                        ));
                    }
                    _ => {}
                }
            } else {
                color[v] = 2;
                stack.pop();
            }
        }
    }

    // Kahn's algorithm, always taking the earliest stage in file order that is ready.
    let mut waiting: Vec<usize> = deps.iter().map(|d| d.len()).collect();
    let mut readers: Vec<Vec<usize>> = vec![Vec::new(); n];
    for (i, d) in deps.iter().enumerate() {
        for &j in d {
            readers[j].push(i);
        }
    }
    let mut ready: BinaryHeap<Reverse<usize>> =
        (0..n).filter(|&i| waiting[i] == 0).map(Reverse).collect();
    let mut order = Vec::with_capacity(n);
    while let Some(Reverse(i)) = ready.pop() {
        order.push(i);
        for &r in &readers[i] {
            waiting[r] -= 1;
            if waiting[r] == 0 {
                ready.push(Reverse(r));
            }
        }
    }
    let mut pos = vec![0usize; n];
    for (p, &i) in order.iter().enumerate() {
        pos[i] = p;
    }
    let mut slots: Vec<Option<Stage>> = stages.into_iter().map(Some).collect();
    let mut out = Vec::with_capacity(n);
    for &i in &order {
        if let Some(mut s) = slots[i].take() {
            remap(&mut s.kind, &pos);
            out.push(s);
        }
    }
    Ok(out)
}

// ----- outputs -------------------------------------------------------------------------------

/// The file an output is rendered to: its `file` (".wav" appended unless present) or
/// `NAME.wav`, as the renderer names it.
fn render_file_name(name: &str, file: Option<&str>) -> String {
    let stem = file.map_or(name, |f| f.strip_suffix(".wav").unwrap_or(f));
    format!("{stem}.wav")
}

/// `from = "stage.node"`: an inner node of a network stage, as (the stage, its local node).
/// `None` when `from` has no dot (a source or a stage, resolved by the caller).
fn output_inner(
    t: &Tab,
    names: &Names,
    stages: &[Stage],
    stage_pos: &HashMap<&str, usize>,
) -> R<Option<(Node, Option<usize>)>> {
    let Some(toml::Value::String(name)) = t.get("from") else {
        return Ok(None);
    };
    let Some((stage, node)) = name.split_once('.') else {
        return Ok(None);
    };
    let Some(&si) = stage_pos.get(stage) else {
        return Err(t.err(
            "from",
            Problem::UnknownName {
                what: "stage".into(),
                name: stage.to_string(),
                suggestion: suggest(stage, names.stages.iter().copied()),
                valid_list: "stage.node reads a network stage's node".into(),
            },
        ));
    };
    let StageKind::Network(net) = &stages[si].kind else {
        return Err(t.err(
            "from",
            Problem::Other(format!(
                "'{name}': stages.{stage} is not a network stage (stage.node reads a network's \
                 inner node; name the stage alone to read its output)"
            )),
        ));
    };
    let Some(k) = net.nodes.iter().position(|n| n == node) else {
        return Err(t.err(
            "from",
            Problem::UnknownName {
                what: format!("node of stages.{stage}"),
                name: node.to_string(),
                suggestion: suggest(node, net.nodes.iter().map(String::as_str)),
                valid_list: format!("its nodes are {}", net.nodes.join(", ")),
            },
        ));
    };
    // the stage's own output node is the stage's output
    Ok(Some((Node::Stage(si), (k != net.out).then_some(k))))
}

fn build_outputs(
    root: &Tab,
    names: &Names,
    stages: &[Stage],
    stage_pos: &HashMap<&str, usize>,
) -> R<Vec<Output>> {
    let none = || {
        root.ctx.err(
            "outputs",
            Problem::Other(
                "a patch needs at least one output, like [outputs.out] from = \"amp\"".into(),
            ),
        )
    };
    let Some(ot) = root.table_opt("outputs")? else {
        return Err(none());
    };
    if ot.t.is_empty() {
        return Err(none());
    }
    let mut outs: Vec<Output> = Vec::with_capacity(ot.t.len());
    for (name, v) in ot.t {
        let t = entity(&ot, name, v, "an [outputs.NAME] table like from = \"amp\"")?;
        if name.len() > MAX_OUTPUT_NAME {
            return Err(ot.err(
                name,
                Problem::Other(format!(
                    "an output name is at most {MAX_OUTPUT_NAME} characters (files are named \
                     after it), got {}",
                    name.len()
                )),
            ));
        }
        let tab = Tab::new(root.ctx, format!("outputs.{name}"), t);
        tab.check_keys(schema::OUTPUT, &[], "")?;
        let (from, inner) = match output_inner(&tab, names, stages, stage_pos)? {
            Some(x) => x,
            None => match names.node(&tab, "from")? {
                Node::Stage(file_idx) => (
                    Node::Stage(
                        stage_pos
                            .get(names.stages[file_idx])
                            .copied()
                            .unwrap_or(file_idx),
                    ),
                    None,
                ),
                n => (n, None),
            },
        };
        let series = match tab.get("series") {
            None => 0.0,
            Some(v) => {
                let p = tab.key_path("series");
                let x = quantity(root.ctx, &p, v, Quantity::Resistance)?;
                if x == 0.0 {
                    0.0
                } else {
                    check(root.ctx, &p, v, Quantity::Resistance, x, R_RANGE).map_err(|_| {
                        root.ctx.err(
                            &p,
                            Problem::OutOfRange {
                                expected: "0 or a resistance from 1 mohm to 1 Gohm".into(),
                                got: super::read::raw(v),
                            },
                        )
                    })?
                }
            }
        };
        let load = match tab.get("load") {
            None => None,
            Some(toml::Value::String(s))
                if s.trim().eq_ignore_ascii_case("open")
                    || s.trim().eq_ignore_ascii_case("none") =>
            {
                None
            }
            Some(v) => Some(bounded(
                root.ctx,
                &tab.key_path("load"),
                v,
                Quantity::Resistance,
                R_RANGE,
            )?),
        };
        let file = match tab.str_opt("file")? {
            None => None,
            Some(f) => {
                let bad = f.is_empty()
                    || f == "."
                    || f == ".."
                    || f.len() > 255
                    || f.chars()
                        .any(|c| c == '/' || c == '\\' || c == ':' || c.is_control());
                if bad {
                    return Err(tab.err(
                        "file",
                        Problem::Other(format!(
                            "expected a bare file name like \"{name}.wav\" (no folders), got '{f}'"
                        )),
                    ));
                }
                // The renderer appends ".wav" unless the name ends with it; the stem goes
                // through the same strict filter as names ([A-Za-z0-9_-], at most 100).
                let stem = f.strip_suffix(".wav").unwrap_or(f);
                if !valid_name(stem) || stem.len() > MAX_OUTPUT_NAME {
                    return Err(tab.err(
                        "file",
                        Problem::Other(format!(
                            "expected a file name of letters, digits, '_' and '-' (at most {MAX_OUTPUT_NAME}), optionally ending in .wav, like \"{}.wav\", got '{f}'", &name[..name.len().min(MAX_OUTPUT_NAME)]
                        )),
                    ));
                }
                Some(f.to_string())
            }
        };
        let wav_name = render_file_name(name, file.as_deref());
        if let Some(other) = outs
            .iter()
            .find(|o| render_file_name(&o.name, o.file.as_deref()) == wav_name)
        {
            return Err(tab.err(
                if file.is_some() { "file" } else { "from" },
                Problem::Other(format!(
                    "outputs.{} is already rendered to {wav_name}: give each output its own file name",
                    other.name
                )),
            ));
        }
        outs.push(Output {
            name: name.clone(),
            from,
            inner,
            series,
            load,
            file,
        });
    }
    Ok(outs)
}
