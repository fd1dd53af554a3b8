//! The valid keys of each kind of patch table (one list per table kind; the format reference
//! is `patches/README.md`).

/// Top-level sections.
pub(crate) const TOP: &[&str] = &[
    "patch", "rails", "sources", "stages", "outputs", "parts", "variants", "diodes", "knobs",
];

/// `[patch]`.
pub(crate) const PATCH: &[&str] = &[
    "title",
    "rate",
    "length",
    "oversample",
    "seed",
    "noise",
    "temperature",
    "full_scale",
    "tolerance",
    "cap_tolerance",
];

/// `[rails]`.
pub(crate) const RAILS: &[&str] = &["pos", "neg"];

/// Wave names, in documentation order.
pub(crate) const WAVES: &[&str] = &[
    "sine",
    "square",
    "triangle",
    "saw",
    "pulse",
    "multitone",
    "sweep",
    "noise",
    "dc",
    "steps",
    "ramp",
    "file",
];

/// Keys every source may have.
pub(crate) const SOURCE_COMMON: &[&str] = &[
    "wave", "offset", "start", "stop", "attack", "decay", "every", "r",
];

/// Keys of one wave kind, beside [`SOURCE_COMMON`].
pub(crate) fn wave_keys(wave: &str) -> &'static [&'static str] {
    match wave {
        "sine" => &["freq", "amp", "phase"],
        "square" | "triangle" | "saw" => &["freq", "amp", "phase", "raw"],
        "pulse" => &["freq", "amp", "phase", "raw", "width"],
        "multitone" => &["tones"],
        "sweep" => &["freq", "freq_end", "duration", "amp"],
        "noise" => &["amp", "color"],
        "dc" => &["level"],
        "steps" => &["levels", "hold"],
        "ramp" => &["level", "level_end", "duration"],
        "file" => &["path", "channel", "full_scale", "loop"],
        _ => &[],
    }
}

/// Every key any source may have.
pub(crate) fn all_source_keys() -> Vec<&'static str> {
    let mut v: Vec<&'static str> = SOURCE_COMMON.to_vec();
    for w in WAVES {
        for k in wave_keys(w) {
            if !v.contains(k) {
                v.push(k);
            }
        }
    }
    v
}

/// `tones = [{ ... }]` entries.
pub(crate) const TONE: &[&str] = &["freq", "amp", "phase"];

/// Stage types, in documentation order.
pub(crate) const STAGE_TYPES: &[&str] = &[
    "inverting-sum",
    "inverting",
    "non-inverting",
    "follower",
    "attenuator",
    "network",
];

/// Keys of one stage type (including `type`).
pub(crate) fn stage_keys(kind: &str) -> &'static [&'static str] {
    match kind {
        "inverting-sum" => &[
            "type",
            "part",
            "inputs",
            "feedback",
            "ref",
            "tolerance",
            "cap_tolerance",
        ],
        "inverting" => &[
            "type",
            "part",
            "from",
            "r_in",
            "c_in",
            "r_fb",
            "c_fb",
            "feedback",
            "ref",
            "tolerance",
            "cap_tolerance",
        ],
        "non-inverting" => &[
            "type",
            "part",
            "from",
            "r_fb",
            "r_g",
            "c_fb",
            "ref",
            "tolerance",
            "cap_tolerance",
        ],
        "follower" => &["type", "part", "from"],
        "attenuator" => &["type", "from", "pot", "taper", "at", "mid", "tolerance"],
        "network" => &["type", "amps", "parts", "out", "tolerance", "cap_tolerance"],
        _ => &[],
    }
}

/// Every key any stage may have.
pub(crate) fn all_stage_keys() -> Vec<&'static str> {
    let mut v: Vec<&'static str> = Vec::new();
    for t in STAGE_TYPES {
        for k in stage_keys(t) {
            if !v.contains(k) {
                v.push(k);
            }
        }
    }
    v
}

/// `inputs = [{ ... }]` entries of an inverting summer.
pub(crate) const INPUT: &[&str] = &["from", "r", "c"];

/// `feedback = { ... }`.
pub(crate) const FEEDBACK: &[&str] = &["r", "c", "pot", "taper", "at", "mid"];

/// Taper names.
pub(crate) const TAPERS: &[&str] = &["linear", "log", "antilog"];

/// `amps = [{ ... }]` entries of a network.
pub(crate) const NET_AMP: &[&str] = &["part", "plus", "minus", "out", "name", "pos", "neg"];

/// `parts = [{ ... }]` entries of a network.
pub(crate) const NET_PART: &[&str] = &[
    "r",
    "c",
    "pot",
    "diode",
    "ends",
    "taper",
    "at",
    "mid",
    "wiper",
    "reverse",
    "tolerance",
];

/// `[diodes.NAME]`.
pub(crate) const DIODE: &[&str] = &["based_on", "is", "n", "rs", "cj"];

/// `[outputs.NAME]`.
pub(crate) const OUTPUT: &[&str] = &["from", "series", "load", "file"];

/// `[parts.NAME]`.
pub(crate) const PART: &[&str] = &[
    "based_on",
    "about",
    "gbw",
    "slew",
    "a0",
    "drop_pos",
    "drop_neg",
    "knee",
    "cm_low",
    "cm_high",
    "reversal",
    "vos",
    "ib",
    "en",
    "en_corner",
    "in",
    "isc",
    "supply_max",
];

/// What keys a table at a given place may hold, for deciding whether `--set` may add a new
/// key there.
pub(crate) enum Keys {
    /// Exactly these.
    Listed(Vec<&'static str>),
    /// Anything (variant tables, whose keys are paths).
    Any,
    /// No new keys at all (tables of names: a new key would be a new source, stage...).
    None,
}

/// The keys allowed in the table at `segments` (table names and array indices as text).
pub(crate) fn keys_at(segments: &[String]) -> Keys {
    let s: Vec<&str> = segments.iter().map(String::as_str).collect();
    match s.as_slice() {
        [] => Keys::Listed(TOP.to_vec()),
        ["patch"] => Keys::Listed(PATCH.to_vec()),
        ["rails"] => Keys::Listed(RAILS.to_vec()),
        ["sources", _] => Keys::Listed(all_source_keys()),
        ["sources", _, "tones", _] => Keys::Listed(TONE.to_vec()),
        ["stages", _] => Keys::Listed(all_stage_keys()),
        ["stages", _, "inputs", _] => Keys::Listed(INPUT.to_vec()),
        ["stages", _, "feedback"] => Keys::Listed(FEEDBACK.to_vec()),
        ["stages", _, "amps", _] => Keys::Listed(NET_AMP.to_vec()),
        ["stages", _, "parts", _] => Keys::Listed(NET_PART.to_vec()),
        ["diodes", _] => Keys::Listed(DIODE.to_vec()),
        ["outputs", _] => Keys::Listed(OUTPUT.to_vec()),
        ["parts", _] => Keys::Listed(PART.to_vec()),
        ["variants", _, ..] => Keys::Any,
        _ => Keys::None,
    }
}
