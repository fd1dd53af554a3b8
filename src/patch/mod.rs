//! The patch format: TOML text -> validated [`crate::model::Patch`].
//!
//! A patch has the sections `[patch]`, `[rails]`, `[sources.NAME]`, `[stages.NAME]`,
//! `[outputs.NAME]`, `[parts.NAME]` and `[variants.NAME]`; `patches/README.md` is the full
//! reference. Loading goes:
//!
//! 1. parse the TOML ([`PatchError::Syntax`] with the line on failure);
//! 2. take out `[variants.*]` (see [`variants`]);
//! 3. apply each `--set PATH=VALUE` with [`apply_set`];
//! 4. check every key and value and build the model: unknown keys, missing keys, wrong types,
//!    malformed or out-of-range values, unknown names and cycles are all errors that name the
//!    file, the line and the key path;
//! 5. check every variant the same way (applied over the base, then the `--set` values).
//!
//! Nothing here touches the terminal or the audio; a `wave = "file"` path is resolved against
//! the patch's folder but not opened (the WAV reader checks it).
//!
//! ```
//! let text = r#"
//! [rails]
//! pos = "12 V"
//! neg = "-12 V"
//!
//! [sources.osc]
//! wave = "sine"
//! freq = "1 kHz"
//! amp = "10 Vpp"
//!
//! [stages.amp]
//! type = "inverting"
//! part = "jfet-general"
//! from = "osc"
//! r_in = "10k"
//! r_fb = "4k7"
//!
//! [outputs.out]
//! from = "amp"
//! "#;
//! let p = railsong::patch::parse_str(text, "demo.toml", std::path::Path::new("."), &[]).unwrap();
//! assert_eq!(p.title, "demo");
//! assert_eq!(p.stages[0].name, "amp");
//! ```

mod build;
mod error;
mod lines;
mod read;
mod schema;
mod set;

use std::path::Path;

pub use build::FILE_FULL_SCALE;
pub use error::{suggest, PatchError, Problem};
pub use set::{apply_set, apply_value, parse_set_value};

use crate::model::Patch;
use lines::{LineIndex, LineStarts};
use read::Ctx;

/// Load a patch file, apply `--set` overrides (`"PATH=VALUE"` strings) and validate it.
/// Relative `wave = "file"` paths are resolved against the patch file's folder.
pub fn load(path: &Path, sets: &[String]) -> Result<Patch, PatchError> {
    load_variant(path, None, sets)
}

/// [`load`], with the overrides of `[variants.NAME]` applied first when `variant` is given
/// (`--set` values are applied after the variant, so the command line wins).
pub fn load_variant(
    path: &Path,
    variant: Option<&str>,
    sets: &[String],
) -> Result<Patch, PatchError> {
    let file = path.display().to_string();
    let text = read_text_as(path, &file)?;
    let base_dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    parse_str_variant(&text, &file, base_dir, variant, sets)
}

/// Largest patch file read, bytes (16 MiB: far beyond any hand-written patch).
pub const MAX_PATCH_BYTES: u64 = 16 << 20;

/// Read a patch file: a regular file of at most [`MAX_PATCH_BYTES`], UTF-8.
pub fn read_text(path: &Path) -> Result<String, PatchError> {
    read_text_as(path, &path.display().to_string())
}

fn read_text_as(path: &Path, file: &str) -> Result<String, PatchError> {
    use std::io::Read;
    use std::os::unix::fs::FileTypeExt;
    let err = |source| PatchError::Read {
        file: file.to_string(),
        source,
    };
    let meta = std::fs::metadata(path).map_err(err)?;
    let t = meta.file_type();
    if !t.is_file() {
        let what = if t.is_dir() {
            "a folder"
        } else if t.is_fifo() {
            "a FIFO (named pipe)"
        } else if t.is_char_device() || t.is_block_device() {
            "a device"
        } else {
            "not a regular file"
        };
        return Err(err(std::io::Error::other(format!(
            "it is {what}; expected a patch file (a regular TOML file)"
        ))));
    }
    let too_big = || {
        err(std::io::Error::other(format!(
            "it is larger than {} MiB; expected a patch file of at most that size",
            MAX_PATCH_BYTES >> 20
        )))
    };
    if meta.len() > MAX_PATCH_BYTES {
        return Err(too_big());
    }
    let mut bytes = Vec::new();
    std::fs::File::open(path)
        .and_then(|f| f.take(MAX_PATCH_BYTES + 1).read_to_end(&mut bytes))
        .map_err(err)?;
    if bytes.len() as u64 > MAX_PATCH_BYTES {
        return Err(too_big());
    }
    String::from_utf8(bytes).map_err(|e| {
        err(std::io::Error::new(
            std::io::ErrorKind::InvalidData,
            format!(
                "byte {} is not valid UTF-8; expected a UTF-8 text file",
                e.utf8_error().valid_up_to()
            ),
        ))
    })
}

/// Parse and validate patch text. `origin` names the text in messages (usually the file path;
/// its stem is the default title); `base_dir` resolves relative file paths; `sets` are
/// `"PATH=VALUE"` overrides.
pub fn parse_str(
    text: &str,
    origin: &str,
    base_dir: &Path,
    sets: &[String],
) -> Result<Patch, PatchError> {
    parse_str_variant(text, origin, base_dir, None, sets)
}

/// [`parse_str`] for one variant (or the base patch when `variant` is `None`). Every variant
/// is checked either way, so a broken variant is reported even when another is chosen.
pub fn parse_str_variant(
    text: &str,
    origin: &str,
    base_dir: &Path,
    variant: Option<&str>,
    sets: &[String],
) -> Result<Patch, PatchError> {
    let mut doc = parse_toml(text, origin)?;
    let lines = LineIndex::new(text);
    let vars = variants_at(&doc, origin, &lines)?;
    doc.remove("variants");
    let stem = Path::new(origin)
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| origin.to_string());

    let mut base = doc.clone();
    let overridden = apply_sets(&mut base, sets, origin)?;
    let ctx = Ctx {
        file: origin,
        lines: &lines,
        overridden: &overridden,
    };
    let patch = build::build(&base, &ctx, &stem, base_dir)?;

    if let Some(name) = variant {
        if !vars.iter().any(|v| v.name == name) {
            let valid: Vec<&str> = vars.iter().map(|v| v.name.as_str()).collect();
            return Err(ctx.err(
                "variants",
                Problem::UnknownName {
                    what: "variant".into(),
                    name: name.to_string(),
                    suggestion: suggest(name, valid.iter().copied()),
                    valid_list: if valid.is_empty() {
                        "the patch has no [variants.NAME] sections".into()
                    } else {
                        format!("variants are {}", valid.join(", "))
                    },
                },
            ));
        }
    }
    let mut chosen = None;
    for v in &vars {
        let line = lines.line_of(&format!("variants.{}", v.name));
        let wrap = |e: PatchError| PatchError::Variant {
            file: origin.to_string(),
            line,
            name: v.name.clone(),
            source: Box::new(e),
        };
        let mut d = doc.clone();
        apply_variant(&mut d, v).map_err(wrap)?;
        apply_sets(&mut d, sets, "").map_err(wrap)?;
        let quiet = LineIndex::default();
        let inner = Ctx {
            file: "",
            lines: &quiet,
            overridden: &[],
        };
        let p = build::build(&d, &inner, &stem, base_dir).map_err(wrap)?;
        if Some(v.name.as_str()) == variant {
            chosen = Some(p);
        }
    }
    Ok(chosen.unwrap_or(patch))
}

fn parse_toml(text: &str, origin: &str) -> Result<toml::Table, PatchError> {
    toml::from_str::<toml::Table>(text).map_err(|e| PatchError::Syntax {
        file: origin.to_string(),
        line: e.span().map(|s| LineStarts::new(text).line(s.start)),
        message: e
            .message()
            .lines()
            .map(str::trim)
            .filter(|l| !l.is_empty())
            .collect::<Vec<_>>()
            .join("; "),
    })
}

/// Apply `"PATH=VALUE"` strings; returns the canonical paths that were set.
fn apply_sets(
    doc: &mut toml::Table,
    sets: &[String],
    origin: &str,
) -> Result<Vec<String>, PatchError> {
    let mut done = Vec::with_capacity(sets.len());
    for arg in sets {
        let wrap = |e: PatchError| PatchError::Set {
            file: origin.to_string(),
            arg: arg.clone(),
            source: Box::new(e),
        };
        let Some((path, value)) = arg.split_once('=') else {
            return Err(wrap(PatchError::Invalid {
                file: String::new(),
                line: None,
                from_set: false,
                path: String::new(),
                problem: Box::new(Problem::Other(
                    "expected PATH=VALUE, like stages.sum.feedback.r=47k".into(),
                )),
            }));
        };
        let head = path.trim().split(['.', '[']).next().unwrap_or("").trim();
        if head == "variants" || head == "\"variants\"" {
            // The file's variants are read before overrides apply: a --set there would be
            // silently ignored, while the same in the file is checked. Refuse it.
            return Err(wrap(PatchError::Invalid {
                file: String::new(),
                line: None,
                from_set: false,
                path: String::new(),
                problem: Box::new(Problem::Other(
                    "variants cannot be changed with --set; edit [variants.NAME] in the file, \
                     or pick one with --variant"
                        .into(),
                )),
            }));
        }
        let canon = set::apply_canonical(doc, path, parse_set_value(value)).map_err(wrap)?;
        done.push(canon);
    }
    Ok(done)
}

/// One `[variants.NAME]` section: overrides by key path, in file order.
#[derive(Debug, Clone, PartialEq)]
pub struct Variant {
    /// The variant's name.
    pub name: String,
    /// `(path, value)` pairs to apply with [`apply_value`], in file order.
    pub overrides: Vec<(String, toml::Value)>,
}

/// The variants of a parsed patch document (its `[variants.NAME]` tables), in file order.
///
/// A variant maps key paths to values, e.g.
/// ```toml
/// [variants.hot]
/// "stages.sum.feedback.r" = "220k"
/// "sources.osc.amp" = "+4 dBu"
/// ```
/// Unquoted dotted keys (`stages.sum.feedback.r = "220k"`) mean the same: TOML reads them as
/// nested tables, which are flattened back into paths. A table value therefore sets its keys
/// one by one (it merges; it does not replace the whole table). Errors carry no file.
pub fn variants(doc: &toml::Table) -> Result<Vec<Variant>, PatchError> {
    variants_at(doc, "", &LineIndex::default())
}

fn variants_at(
    doc: &toml::Table,
    file: &str,
    lines: &LineIndex,
) -> Result<Vec<Variant>, PatchError> {
    let ctx = Ctx {
        file,
        lines,
        overridden: &[],
    };
    let mut out = Vec::new();
    let Some(v) = doc.get("variants") else {
        return Ok(out);
    };
    let toml::Value::Table(all) = v else {
        return Err(ctx.err(
            "variants",
            Problem::WrongType {
                expected: "a table of [variants.NAME] sections".into(),
                found: read::type_name(v),
            },
        ));
    };
    for (name, body) in all {
        let here = format!("variants.{name}");
        if !read::valid_name(name) {
            return Err(ctx.err(&here, Problem::BadName { name: name.clone() }));
        }
        if name.len() > build::MAX_VARIANT_NAME {
            return Err(ctx.err(
                &here,
                Problem::Other(format!(
                    "a variant name is at most {} characters (it is appended to file names), \
                     got {}",
                    build::MAX_VARIANT_NAME,
                    name.len()
                )),
            ));
        }
        let toml::Value::Table(t) = body else {
            return Err(ctx.err(
                &here,
                Problem::WrongType {
                    expected: "a table of \"key.path\" = value overrides".into(),
                    found: read::type_name(body),
                },
            ));
        };
        let mut overrides = Vec::new();
        flatten(t, "", &mut overrides);
        if let Some((p, _)) = overrides.iter().find(|(p, _)| {
            p == "variants" || p.starts_with("variants.") || p.starts_with("variants[")
        }) {
            return Err(ctx.err(
                &format!("{here}.{p}"),
                Problem::Other("a variant cannot change the variants".into()),
            ));
        }
        out.push(Variant {
            name: name.clone(),
            overrides,
        });
    }
    Ok(out)
}

fn flatten(t: &toml::Table, prefix: &str, out: &mut Vec<(String, toml::Value)>) {
    for (k, v) in t {
        let p = lines::join(prefix, k);
        match v {
            toml::Value::Table(sub) => flatten(sub, &p, out),
            other => out.push((p, other.clone())),
        }
    }
}

/// Apply a variant's overrides to a document (see [`apply_value`]); errors carry no file.
pub fn apply_variant(doc: &mut toml::Table, variant: &Variant) -> Result<(), PatchError> {
    for (path, value) in &variant.overrides {
        apply_value(doc, path, value.clone())?;
    }
    Ok(())
}

/// Read a patch file's variants without validating the patch (for listing them).
pub fn load_variants(path: &Path) -> Result<Vec<Variant>, PatchError> {
    let file = path.display().to_string();
    let text = read_text_as(path, &file)?;
    let doc = parse_toml(&text, &file)?;
    variants_at(&doc, &file, &LineIndex::new(&text))
}
