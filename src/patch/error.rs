//! Errors of the patch layer.

use crate::units::UnitError;

/// Why a patch could not be loaded. Every message starts with the file, then the TOML line
/// when it is known (or `--set` when the value came from the command line), then the key path:
/// `"mix.toml: line 12: stages.sum.inputs[1].r: expected a resistance like 47k, got '47q'"`.
#[derive(Debug, thiserror::Error)]
pub enum PatchError {
    /// The patch file could not be read.
    #[error("{file}: cannot read the patch: {source}")]
    Read {
        /// The file.
        file: String,
        /// The I/O error.
        #[source]
        source: std::io::Error,
    },
    /// The text is not valid TOML.
    #[error("{}invalid TOML: {message}", located(file, *line, false, ""))]
    Syntax {
        /// The file.
        file: String,
        /// 1-based line of the error, when the TOML parser gave a position.
        line: Option<usize>,
        /// The TOML parser's message.
        message: String,
    },
    /// A key, a value or a name is wrong.
    #[error("{}{problem}", located(file, *line, *from_set, path))]
    Invalid {
        /// The file (empty when the error came from [`crate::patch::apply_set`] alone).
        file: String,
        /// 1-based line of the key, when known.
        line: Option<usize>,
        /// Whether the offending value was given with `--set` rather than in the file.
        from_set: bool,
        /// Key path, e.g. `stages.sum.inputs[1].r` (empty for the document itself).
        path: String,
        /// What is wrong.
        problem: Box<Problem>,
    },
    /// A `--set` argument could not be applied.
    #[error("{}--set '{arg}': {source}", file_prefix(file))]
    Set {
        /// The file.
        file: String,
        /// The argument as given (`PATH=VALUE`).
        arg: String,
        /// What went wrong (an error without file or line).
        source: Box<PatchError>,
    },
    /// A `[variants.NAME]` section does not apply cleanly or makes the patch invalid.
    #[error("{}variants.{name}: {source}", located(file, *line, false, ""))]
    Variant {
        /// The file.
        file: String,
        /// 1-based line of the variant's header, when known.
        line: Option<usize>,
        /// The variant's name.
        name: String,
        /// What went wrong when the variant was applied and the result checked (an error
        /// without file or line).
        source: Box<PatchError>,
    },
}

/// What is wrong with a key or value (the part of a [`PatchError::Invalid`] after the key
/// path).
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum Problem {
    /// A key that no table of this kind has.
    #[error("unknown key '{key}'{}", did_you_mean(suggestion))]
    UnknownKey {
        /// The key as written.
        key: String,
        /// The nearest valid key, if one is close.
        suggestion: Option<String>,
    },
    /// A valid key that does not belong in this kind of table.
    #[error("key '{key}' does not apply {context}")]
    NotApplicable {
        /// The key.
        key: String,
        /// Why, e.g. `to wave = "sine"`.
        context: String,
    },
    /// A required key is absent.
    #[error("missing required key '{key}' ({expected})")]
    Missing {
        /// The key.
        key: String,
        /// What it should hold.
        expected: String,
    },
    /// The TOML value has the wrong type.
    #[error("expected {expected}, got {found}")]
    WrongType {
        /// What was expected, e.g. "a string".
        expected: String,
        /// The TOML type found, with its article ("an integer").
        found: String,
    },
    /// The text is not a value of the expected quantity.
    #[error(transparent)]
    Unit(#[from] UnitError),
    /// The value is readable but outside its allowed range.
    #[error("expected {expected}, got {got}")]
    OutOfRange {
        /// The allowed range in words, e.g. "a resistance from 1 mohm to 1 Gohm".
        expected: String,
        /// The value as written.
        got: String,
    },
    /// A string that must be one of a fixed set of words.
    #[error("expected one of {}, got '{got}'{}", .valid.join(", "), did_you_mean(suggestion))]
    NotOneOf {
        /// The accepted words.
        valid: Vec<String>,
        /// The word found.
        got: String,
        /// The nearest accepted word, if one is close.
        suggestion: Option<String>,
    },
    /// A reference to something (a node, a part) that does not exist.
    #[error("no {what} named '{name}'{}; {valid_list}", did_you_mean(suggestion))]
    UnknownName {
        /// What was looked for, e.g. "source or stage".
        what: String,
        /// The name written.
        name: String,
        /// The nearest existing name, if one is close.
        suggestion: Option<String>,
        /// The names that exist, in words.
        valid_list: String,
    },
    /// A name with characters that cannot appear in a file name.
    #[error("the name '{name}' may only use letters, digits, '_' and '-'")]
    BadName {
        /// The name.
        name: String,
    },
    /// Stages feeding each other in a loop.
    #[error("cycle through stages {} (a feedback loop must sit inside one network stage: put the loop in a type = \"network\" stage)", .cycle.join(" -> "))]
    Cycle {
        /// The names around the loop, the first repeated at the end.
        cycle: Vec<String>,
    },
    /// Parts derived from each other in a loop.
    #[error("cycle through parts {}", .cycle.join(" -> "))]
    PartCycle {
        /// The names around the loop, the first repeated at the end.
        cycle: Vec<String>,
    },
    /// A path (from `--set` or a variant) that names nothing in the patch.
    #[error("'{missing}' does not exist{}", did_you_mean(suggestion))]
    NoSuchPath {
        /// The part of the path that was not found.
        missing: String,
        /// The nearest existing key at that place, if one is close.
        suggestion: Option<String>,
    },
    /// Any other inconsistency, in words.
    #[error("{0}")]
    Other(String),
}

fn did_you_mean(s: &Option<String>) -> String {
    match s {
        Some(s) => format!(" (did you mean '{s}'?)"),
        None => String::new(),
    }
}

fn file_prefix(file: &str) -> String {
    if file.is_empty() {
        String::new()
    } else {
        format!("{file}: ")
    }
}

/// `"<file>: "` + `"line N: "` or `"--set "` + `"<path>: "`, each part only when present.
fn located(file: &str, line: Option<usize>, from_set: bool, path: &str) -> String {
    let mut s = file_prefix(file);
    if from_set {
        s.push_str("--set ");
    } else if let Some(n) = line {
        s.push_str(&format!("line {n}: "));
    }
    if !path.is_empty() {
        s.push_str(path);
        s.push_str(": ");
    }
    s
}

impl PatchError {
    /// Process exit code for this error: every patch error is a usage error of the input,
    /// code 2 (a failed read included: the named file is the input).
    pub fn exit_code(&self) -> i32 {
        2
    }

    /// The file the error is about.
    pub fn file(&self) -> &str {
        match self {
            PatchError::Read { file, .. }
            | PatchError::Syntax { file, .. }
            | PatchError::Invalid { file, .. }
            | PatchError::Set { file, .. }
            | PatchError::Variant { file, .. } => file,
        }
    }

    /// The 1-based TOML line, when known.
    pub fn line(&self) -> Option<usize> {
        match self {
            PatchError::Syntax { line, .. }
            | PatchError::Invalid { line, .. }
            | PatchError::Variant { line, .. } => *line,
            PatchError::Set { source, .. } => source.line(),
            PatchError::Read { .. } => None,
        }
    }

    /// The key path the error is about (empty when there is none). For `--set` and variant
    /// errors, the path inside the override.
    pub fn path(&self) -> &str {
        match self {
            PatchError::Invalid { path, .. } => path,
            PatchError::Set { source, .. } | PatchError::Variant { source, .. } => source.path(),
            PatchError::Read { .. } | PatchError::Syntax { .. } => "",
        }
    }

    /// The problem, for an error about a key or value.
    pub fn problem(&self) -> Option<&Problem> {
        match self {
            PatchError::Invalid { problem, .. } => Some(problem),
            PatchError::Set { source, .. } | PatchError::Variant { source, .. } => source.problem(),
            PatchError::Read { .. } | PatchError::Syntax { .. } => None,
        }
    }
}

/// The nearest of `candidates` to `word`, if it is close enough to be a likely typo
/// (Damerau-Levenshtein distance at most 3 and smaller than the word's length).
pub fn suggest<'a, I>(word: &str, candidates: I) -> Option<String>
where
    I: IntoIterator<Item = &'a str>,
{
    let mut best: Option<(usize, &str)> = None;
    for c in candidates {
        let d = strsim::damerau_levenshtein(&word.to_ascii_lowercase(), &c.to_ascii_lowercase());
        if best.is_none_or(|(bd, _)| d < bd) {
            best = Some((d, c));
        }
    }
    match best {
        Some((d, c)) if d <= 3 && d < word.chars().count() && d < c.chars().count() => {
            Some(c.to_string())
        }
        _ => None,
    }
}
