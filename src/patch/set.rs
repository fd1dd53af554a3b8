//! Overrides by dotted key path: `--set PATH=VALUE` and `[variants.NAME]`.

use super::error::{suggest, PatchError, Problem};
use super::lines::join;
use super::schema::{keys_at, Keys};

/// One step of a key path.
#[derive(Debug, Clone, PartialEq)]
enum Seg {
    /// `.name` (or a bare number, which indexes an array when the container is one).
    Key(String),
    /// `[n]`.
    Index(usize),
}

fn invalid(path: &str, problem: Problem) -> PatchError {
    PatchError::Invalid {
        file: String::new(),
        line: None,
        from_set: false,
        path: path.to_string(),
        problem: Box::new(problem),
    }
}

fn bad_path(path: &str) -> PatchError {
    invalid(
        path,
        Problem::Other(
            "expected a key path like stages.sum.feedback.r or stages.sum.inputs[1].r".into(),
        ),
    )
}

/// Split `stages.sum.inputs[1].r` (or `stages.sum.inputs.1.r`) into steps.
fn parse_path(path: &str) -> Result<Vec<Seg>, PatchError> {
    let mut segs = Vec::new();
    let mut rest = path.trim();
    if rest.is_empty() {
        return Err(bad_path(path));
    }
    let mut need_key = true;
    while !rest.is_empty() {
        if let Some(r) = rest.strip_prefix('[') {
            let close = r.find(']').ok_or_else(|| bad_path(path))?;
            let n: usize = r[..close].trim().parse().map_err(|_| bad_path(path))?;
            segs.push(Seg::Index(n));
            rest = &r[close + 1..];
            need_key = false;
            continue;
        }
        if !need_key {
            rest = rest.strip_prefix('.').ok_or_else(|| bad_path(path))?;
        }
        let end = rest.find(['.', '[']).unwrap_or(rest.len());
        let key = rest[..end].trim();
        if key.is_empty() {
            return Err(bad_path(path));
        }
        segs.push(Seg::Key(key.to_string()));
        rest = &rest[end..];
        need_key = false;
    }
    if matches!(segs.first(), Some(Seg::Index(_))) {
        return Err(bad_path(path));
    }
    Ok(segs)
}

/// Read a `--set` value: a TOML number, boolean, quoted string, array or inline table when it
/// is one, else the text itself as a string (so `4k7` and `10 Vpp` need no quotes).
pub fn parse_set_value(value: &str) -> toml::Value {
    let t = value.trim();
    if let Ok(tab) = format!("v = {t}").parse::<toml::Table>() {
        if tab.len() == 1 {
            match tab.get("v") {
                Some(toml::Value::Datetime(_)) | None => {}
                Some(v) => return v.clone(),
            }
        }
    }
    toml::Value::String(t.to_string())
}

/// Apply `PATH=VALUE` to a parsed patch document; see [`apply_value`]. `value` is read with
/// [`parse_set_value`].
pub fn apply_set(doc: &mut toml::Table, path: &str, value: &str) -> Result<(), PatchError> {
    apply_value(doc, path, parse_set_value(value))
}

enum Container<'a> {
    Table(&'a mut toml::Table),
    Array(&'a mut Vec<toml::Value>),
}

fn kind_of(v: &toml::Value) -> &'static str {
    match v {
        toml::Value::String(_) => "a string",
        toml::Value::Integer(_) => "an integer",
        toml::Value::Float(_) => "a float",
        toml::Value::Boolean(_) => "a boolean",
        toml::Value::Datetime(_) => "a date",
        toml::Value::Array(_) => "an array",
        toml::Value::Table(_) => "a table",
    }
}

/// Set the value at a dotted key path (`stages.sum.feedback.r`, `stages.sum.inputs[1].r`,
/// `stages.sum.inputs.1.r`), replacing what is there.
///
/// Every table and array element on the way must already exist (else the error names the
/// missing part and, when one is close, the key that was probably meant). The last key may be
/// new only where that kind of table has such a key (e.g. `feedback.c` may be added to a
/// feedback table, `stages.sum.bogus` may not); the patch validation then checks the whole
/// table. Errors carry the path but no file or line.
pub fn apply_value(
    doc: &mut toml::Table,
    path: &str,
    value: toml::Value,
) -> Result<(), PatchError> {
    apply_canonical(doc, path, value).map(|_| ())
}

/// [`apply_value`], returning the canonical spelling of the path that was set
/// (`stages.sum.inputs[1].r`).
pub(crate) fn apply_canonical(
    doc: &mut toml::Table,
    path: &str,
    value: toml::Value,
) -> Result<String, PatchError> {
    let segs = parse_path(path)?;
    let full = path.trim();
    let mut canon = String::new();
    let mut names: Vec<String> = Vec::new();
    let mut cont = Container::Table(doc);
    let n = segs.len();
    for (i, seg) in segs.into_iter().enumerate() {
        let last = i + 1 == n;
        match cont {
            Container::Table(t) => {
                let key = match seg {
                    Seg::Key(k) => k,
                    Seg::Index(_) => {
                        return Err(invalid(
                            full,
                            Problem::Other(format!("'{canon}' is a table, not an array")),
                        ))
                    }
                };
                let here = join(&canon, &key);
                if last {
                    if t.contains_key(&key) {
                        t.insert(key, value);
                        return Ok(here);
                    }
                    return match keys_at(&names) {
                        Keys::Any => {
                            t.insert(key, value);
                            Ok(here)
                        }
                        Keys::Listed(l) if l.contains(&key.as_str()) => {
                            t.insert(key, value);
                            Ok(here)
                        }
                        Keys::Listed(l) => Err(invalid(
                            &canon,
                            Problem::UnknownKey {
                                suggestion: suggest(&key, l.iter().copied()),
                                key,
                            },
                        )),
                        Keys::None => Err(invalid(
                            full,
                            Problem::NoSuchPath {
                                suggestion: suggest(&key, t.keys().map(String::as_str)),
                                missing: here,
                            },
                        )),
                    };
                }
                let suggestion = suggest(&key, t.keys().map(String::as_str));
                let Some(next) = t.get_mut(&key) else {
                    return Err(invalid(
                        full,
                        Problem::NoSuchPath {
                            missing: here,
                            suggestion,
                        },
                    ));
                };
                names.push(key);
                canon = here;
                cont = match next {
                    toml::Value::Table(t) => Container::Table(t),
                    toml::Value::Array(a) => Container::Array(a),
                    other => {
                        return Err(invalid(
                            full,
                            Problem::Other(format!(
                                "'{canon}' is {}, not a table or an array",
                                kind_of(other)
                            )),
                        ))
                    }
                };
            }
            Container::Array(a) => {
                let idx = match seg {
                    Seg::Index(k) => k,
                    Seg::Key(k) => k.parse::<usize>().map_err(|_| {
                        invalid(
                            full,
                            Problem::Other(format!(
                                "'{canon}' is an array: expected an index like {canon}[0], \
                                 got '{k}'"
                            )),
                        )
                    })?,
                };
                let here = format!("{canon}[{idx}]");
                if idx >= a.len() {
                    return Err(invalid(
                        full,
                        Problem::Other(format!(
                            "'{here}' does not exist ({canon} has {} element{})",
                            a.len(),
                            if a.len() == 1 { "" } else { "s" }
                        )),
                    ));
                }
                if last {
                    a[idx] = value;
                    return Ok(here);
                }
                names.push(idx.to_string());
                canon = here;
                cont = match &mut a[idx] {
                    toml::Value::Table(t) => Container::Table(t),
                    toml::Value::Array(a) => Container::Array(a),
                    other => {
                        return Err(invalid(
                            full,
                            Problem::Other(format!(
                                "'{canon}' is {}, not a table or an array",
                                kind_of(other)
                            )),
                        ))
                    }
                };
            }
        }
    }
    // parse_path never returns an empty path, so the loop always returns.
    Err(bad_path(path))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn doc() -> toml::Table {
        r#"
[stages.sum]
type = "inverting-sum"
inputs = [{ from = "a", r = "100k" }, { from = "b", r = "100k" }]
feedback = { r = "100k" }
"#
        .parse()
        .unwrap()
    }

    #[test]
    fn paths_split() {
        assert_eq!(
            parse_path("a.b[1].c").unwrap(),
            vec![
                Seg::Key("a".into()),
                Seg::Key("b".into()),
                Seg::Index(1),
                Seg::Key("c".into())
            ]
        );
        assert_eq!(parse_path("a.1").unwrap().len(), 2);
        for bad in ["", "a..b", "a[", "a[x]", "[0].a", "a.", "a[1]b"] {
            assert!(parse_path(bad).is_err(), "{bad}");
        }
    }

    #[test]
    fn values_read_as_toml_when_they_are() {
        assert_eq!(parse_set_value("8"), toml::Value::Integer(8));
        assert_eq!(parse_set_value("-1.5"), toml::Value::Float(-1.5));
        assert_eq!(parse_set_value("true"), toml::Value::Boolean(true));
        assert_eq!(parse_set_value("4k7"), toml::Value::String("4k7".into()));
        assert_eq!(parse_set_value("\"8\""), toml::Value::String("8".into()));
        assert_eq!(
            parse_set_value("10 Vpp"),
            toml::Value::String("10 Vpp".into())
        );
        assert!(matches!(parse_set_value("[1, 2]"), toml::Value::Array(_)));
        // A value cannot smuggle in a second key.
        assert_eq!(
            parse_set_value("1\nx = 2"),
            toml::Value::String("1\nx = 2".into())
        );
    }

    #[test]
    fn set_by_index_both_spellings_and_new_leaf() {
        let mut d = doc();
        apply_set(&mut d, "stages.sum.inputs[1].r", "47k").unwrap();
        apply_set(&mut d, "stages.sum.inputs.0.r", "22k").unwrap();
        apply_set(&mut d, "stages.sum.feedback.c", "100p").unwrap();
        let inputs = d["stages"]["sum"]["inputs"].as_array().unwrap();
        assert_eq!(inputs[0]["r"].as_str(), Some("22k"));
        assert_eq!(inputs[1]["r"].as_str(), Some("47k"));
        assert_eq!(d["stages"]["sum"]["feedback"]["c"].as_str(), Some("100p"));
    }

    #[test]
    fn set_errors_name_the_path() {
        let mut d = doc();
        let e = apply_set(&mut d, "stages.sum.feedbak.r", "1k").unwrap_err();
        let m = e.to_string();
        assert!(m.contains("stages.sum.feedbak"), "{m}");
        assert!(m.contains("did you mean 'feedback'"), "{m}");
        let e = apply_set(&mut d, "stages.sum.inputs[2].r", "1k").unwrap_err();
        assert!(e.to_string().contains("has 2 elements"), "{e}");
        let e = apply_set(&mut d, "stages.sum.bogus", "1").unwrap_err();
        assert!(e.to_string().contains("unknown key 'bogus'"), "{e}");
        let e = apply_set(&mut d, "stages.other.type", "follower").unwrap_err();
        assert!(
            e.to_string().contains("'stages.other' does not exist"),
            "{e}"
        );
        let e = apply_set(&mut d, "stages.sum.type.x", "1").unwrap_err();
        assert!(e.to_string().contains("is a string"), "{e}");
    }
}
