//! Typed reading of TOML tables with key-path error messages.

use super::error::{suggest, PatchError, Problem};
use super::lines::{join, LineIndex};
use crate::units::{self, Level, Quantity};

/// Where errors are reported: the file, its line index and the paths that `--set` replaced.
pub(crate) struct Ctx<'a> {
    pub(crate) file: &'a str,
    pub(crate) lines: &'a LineIndex,
    pub(crate) overridden: &'a [String],
}

impl Ctx<'_> {
    /// An error at `path`.
    pub(crate) fn err(&self, path: &str, problem: Problem) -> PatchError {
        self.err_at(path, path, problem)
    }

    /// An error shown at `path` with the line of `line_path` (a key inside it).
    pub(crate) fn err_at(&self, path: &str, line_path: &str, problem: Problem) -> PatchError {
        let from_set = self.overridden.iter().any(|o| {
            line_path == o
                || line_path.starts_with(&format!("{o}."))
                || line_path.starts_with(&format!("{o}["))
        });
        PatchError::Invalid {
            file: self.file.to_string(),
            line: if from_set {
                None
            } else {
                self.lines.line_of(line_path)
            },
            from_set,
            path: path.to_string(),
            problem: Box::new(problem),
        }
    }
}

/// Result alias.
pub(crate) type R<T> = Result<T, PatchError>;

/// A TOML type with its article, for messages.
pub(crate) fn type_name(v: &toml::Value) -> String {
    match v {
        toml::Value::String(s) => format!("the string '{s}'"),
        toml::Value::Integer(i) => format!("the integer {i}"),
        toml::Value::Float(f) => format!("the number {f}"),
        toml::Value::Boolean(b) => format!("{b}"),
        toml::Value::Datetime(d) => format!("the date {d}"),
        toml::Value::Array(_) => "an array".into(),
        toml::Value::Table(_) => "a table".into(),
    }
}

/// The value as the user wrote it, for range messages.
pub(crate) fn raw(v: &toml::Value) -> String {
    match v {
        toml::Value::String(s) => format!("'{s}'"),
        toml::Value::Float(f) if f.is_finite() && *f != 0.0 && !(1e-3..1e6).contains(&f.abs()) => {
            format!("{f:e}")
        }
        other => other.to_string(),
    }
}

/// An inclusive or exclusive range for a checked quantity.
#[derive(Clone, Copy)]
pub(crate) struct Bounds {
    pub(crate) lo: f64,
    pub(crate) hi: f64,
    pub(crate) lo_open: bool,
    pub(crate) hi_open: bool,
}

impl Bounds {
    /// `lo <= x <= hi`.
    pub(crate) const fn closed(lo: f64, hi: f64) -> Bounds {
        Bounds {
            lo,
            hi,
            lo_open: false,
            hi_open: false,
        }
    }
    /// `lo < x < hi`.
    pub(crate) const fn open(lo: f64, hi: f64) -> Bounds {
        Bounds {
            lo,
            hi,
            lo_open: true,
            hi_open: true,
        }
    }
    fn contains(&self, x: f64) -> bool {
        let lo_ok = if self.lo_open {
            x > self.lo
        } else {
            x >= self.lo
        };
        let hi_ok = if self.hi_open {
            x < self.hi
        } else {
            x <= self.hi
        };
        lo_ok && hi_ok
    }
}

/// Print a value of a quantity for range messages.
pub(crate) fn show(q: Quantity, x: f64) -> String {
    match q {
        Quantity::Resistance => units::fmt_eng(x, "ohm"),
        Quantity::Capacitance => units::fmt_eng(x, "F"),
        Quantity::Frequency => units::fmt_eng(x, "Hz"),
        Quantity::Time if x >= 1.0 => format!("{x} s"),
        Quantity::Time => units::fmt_eng(x, "s"),
        Quantity::Voltage | Quantity::Level => units::fmt_eng(x, "V"),
        Quantity::SlewRate => units::fmt_eng(x, "V/s"),
        Quantity::Current => units::fmt_eng(x, "A"),
        Quantity::VoltageNoise => units::fmt_eng(x, "V/rtHz"),
        Quantity::CurrentNoise => units::fmt_eng(x, "A/rtHz"),
        Quantity::Temperature => format!("{x} K"),
        Quantity::Ratio => units::fmt_eng(x, ""),
        Quantity::Percent => format!("{}%", units::fmt_eng(x * 100.0, "")),
        Quantity::Angle => units::fmt_eng(x, "rad"),
    }
}

fn range_words(q: Quantity, b: &Bounds) -> String {
    let name = q.name();
    let lo = show(q, b.lo);
    let hi = show(q, b.hi);
    match (b.lo_open, b.hi_open) {
        (false, false) => format!("{name} from {lo} to {hi}"),
        (true, true) => format!("{name} above {lo} and below {hi}"),
        (true, false) => format!("{name} above {lo}, at most {hi}"),
        (false, true) => format!("{name} from {lo}, below {hi}"),
    }
}

/// A plain number or a unit string of quantity `q`, finite.
pub(crate) fn quantity(ctx: &Ctx, path: &str, v: &toml::Value, q: Quantity) -> R<f64> {
    let x = match v {
        toml::Value::Integer(i) => *i as f64,
        toml::Value::Float(f) => *f,
        toml::Value::String(s) => {
            units::parse(q, s).map_err(|e| ctx.err(path, Problem::Unit(e)))?
        }
        other => {
            return Err(ctx.err(
                path,
                Problem::WrongType {
                    expected: format!("{} (a number or a string like '{}')", q.name(), q.example()),
                    found: type_name(other),
                },
            ))
        }
    };
    if !x.is_finite() {
        return Err(ctx.err(
            path,
            Problem::OutOfRange {
                expected: format!(
                    "a finite {}",
                    q.name().split_once(' ').map_or(q.name(), |(_, n)| n)
                ),
                got: raw(v),
            },
        ));
    }
    Ok(x)
}

/// [`quantity`], then a range check.
pub(crate) fn bounded(ctx: &Ctx, path: &str, v: &toml::Value, q: Quantity, b: Bounds) -> R<f64> {
    let x = quantity(ctx, path, v, q)?;
    check(ctx, path, v, q, x, b)
}

/// Smallest nonzero magnitude accepted for any value, in SI units (1e-18: atto).
pub(crate) const TINY: f64 = 1e-18;

/// Range-check an already read value (a nonzero value smaller than [`TINY`] is refused too).
pub(crate) fn check(
    ctx: &Ctx,
    path: &str,
    v: &toml::Value,
    q: Quantity,
    x: f64,
    b: Bounds,
) -> R<f64> {
    if x != 0.0 && x.abs() < TINY && b.contains(x) {
        // Denormal and absurdly small figures pass "above 0" but make nonsense downstream
        // (1 / gbw overflows): no physical value railsong takes is this small.
        Err(ctx.err(
            path,
            Problem::OutOfRange {
                expected: format!("{}, and 0 or at least 1e-18 in size", range_words(q, &b)),
                got: raw(v),
            },
        ))
    } else if b.contains(x) {
        Ok(x)
    } else {
        Err(ctx.err(
            path,
            Problem::OutOfRange {
                expected: range_words(q, &b),
                got: raw(v),
            },
        ))
    }
}

/// A level (`"5 Vpk"`, `"10 Vpp"`, `"3.5 Vrms"`, `"+4 dBu"`); a plain number is peak volts.
pub(crate) fn level(ctx: &Ctx, path: &str, v: &toml::Value) -> R<Level> {
    match v {
        toml::Value::String(s) => {
            let l = units::parse_level(s).map_err(|e| ctx.err(path, Problem::Unit(e)))?;
            Ok(l)
        }
        _ => quantity(ctx, path, v, Quantity::Level).map(Level::Peak),
    }
}

/// A view of one TOML table at a key path.
pub(crate) struct Tab<'a> {
    pub(crate) ctx: &'a Ctx<'a>,
    pub(crate) path: String,
    pub(crate) t: &'a toml::Table,
}

impl<'a> Tab<'a> {
    pub(crate) fn new(ctx: &'a Ctx<'a>, path: String, t: &'a toml::Table) -> Tab<'a> {
        Tab { ctx, path, t }
    }

    /// Path of a key of this table.
    pub(crate) fn key_path(&self, key: &str) -> String {
        join(&self.path, key)
    }

    /// An error at a key of this table.
    pub(crate) fn err(&self, key: &str, problem: Problem) -> PatchError {
        self.ctx.err(&self.key_path(key), problem)
    }

    /// An error about the table itself.
    pub(crate) fn err_here(&self, problem: Problem) -> PatchError {
        self.ctx.err(&self.path, problem)
    }

    /// Every key must be in `allowed`. A key that is valid for another kind of this table
    /// (`elsewhere`) gets "does not apply {context}"; any other gets the nearest allowed key.
    pub(crate) fn check_keys(&self, allowed: &[&str], elsewhere: &[&str], context: &str) -> R<()> {
        for k in self.t.keys() {
            if allowed.contains(&k.as_str()) {
                continue;
            }
            if elsewhere.contains(&k.as_str()) {
                return Err(self.err(
                    k,
                    Problem::NotApplicable {
                        key: k.clone(),
                        context: context.to_string(),
                    },
                ));
            }
            return Err(self.ctx.err_at(
                &self.path,
                &self.key_path(k),
                Problem::UnknownKey {
                    key: k.clone(),
                    suggestion: suggest(k, allowed.iter().copied()),
                },
            ));
        }
        Ok(())
    }

    pub(crate) fn get(&self, key: &str) -> Option<&'a toml::Value> {
        self.t.get(key)
    }

    pub(crate) fn has(&self, key: &str) -> bool {
        self.t.contains_key(key)
    }

    fn missing(&self, key: &str, expected: &str) -> PatchError {
        self.err_here(Problem::Missing {
            key: key.to_string(),
            expected: expected.to_string(),
        })
    }

    fn wrong(&self, key: &str, expected: &str, v: &toml::Value) -> PatchError {
        self.err(
            key,
            Problem::WrongType {
                expected: expected.to_string(),
                found: type_name(v),
            },
        )
    }

    pub(crate) fn str_opt(&self, key: &str) -> R<Option<&'a str>> {
        match self.get(key) {
            None => Ok(None),
            Some(toml::Value::String(s)) => Ok(Some(s)),
            Some(v) => Err(self.wrong(key, "a string", v)),
        }
    }

    pub(crate) fn str_req(&self, key: &str, expected: &str) -> R<&'a str> {
        self.str_opt(key)?
            .ok_or_else(|| self.missing(key, expected))
    }

    /// A string that must be one of `valid`.
    pub(crate) fn word(&self, key: &str, valid: &[&str]) -> R<Option<&'a str>> {
        let Some(s) = self.str_opt(key)? else {
            return Ok(None);
        };
        if valid.contains(&s) {
            Ok(Some(s))
        } else {
            Err(self.err(
                key,
                Problem::NotOneOf {
                    valid: valid.iter().map(|s| s.to_string()).collect(),
                    got: s.to_string(),
                    suggestion: suggest(s, valid.iter().copied()),
                },
            ))
        }
    }

    pub(crate) fn bool_opt(&self, key: &str) -> R<Option<bool>> {
        match self.get(key) {
            None => Ok(None),
            Some(toml::Value::Boolean(b)) => Ok(Some(*b)),
            Some(v) => Err(self.wrong(key, "true or false", v)),
        }
    }

    /// An integer (a float with no fraction is accepted too).
    pub(crate) fn int_opt(&self, key: &str) -> R<Option<i64>> {
        match self.get(key) {
            None => Ok(None),
            Some(toml::Value::Integer(i)) => Ok(Some(*i)),
            Some(toml::Value::Float(f)) if f.fract() == 0.0 && f.abs() < 9.0e15 => {
                Ok(Some(*f as i64))
            }
            Some(v) => Err(self.wrong(key, "an integer", v)),
        }
    }

    pub(crate) fn q_opt(&self, key: &str, q: Quantity, b: Bounds) -> R<Option<f64>> {
        match self.get(key) {
            None => Ok(None),
            Some(v) => bounded(self.ctx, &self.key_path(key), v, q, b).map(Some),
        }
    }

    pub(crate) fn q_req(&self, key: &str, q: Quantity, b: Bounds) -> R<f64> {
        self.q_opt(key, q, b)?
            .ok_or_else(|| self.missing(key, &format!("{} like {}", q.name(), q.example())))
    }

    /// A quantity, or the word `none` (any case) for "no limit".
    pub(crate) fn q_or_none(&self, key: &str, q: Quantity, b: Bounds) -> R<Option<Option<f64>>> {
        match self.get(key) {
            None => Ok(None),
            Some(toml::Value::String(s)) if s.trim().eq_ignore_ascii_case("none") => Ok(Some(None)),
            Some(v) => bounded(self.ctx, &self.key_path(key), v, q, b).map(|x| Some(Some(x))),
        }
    }

    pub(crate) fn level_opt(&self, key: &str) -> R<Option<Level>> {
        match self.get(key) {
            None => Ok(None),
            Some(v) => level(self.ctx, &self.key_path(key), v).map(Some),
        }
    }

    pub(crate) fn level_req(&self, key: &str) -> R<Level> {
        self.level_opt(key)?
            .ok_or_else(|| self.missing(key, "a level like 5 Vpk, 10 Vpp, 3.5 Vrms or +4 dBu"))
    }

    pub(crate) fn table_opt(&self, key: &str) -> R<Option<Tab<'a>>> {
        match self.get(key) {
            None => Ok(None),
            Some(toml::Value::Table(t)) => Ok(Some(Tab::new(self.ctx, self.key_path(key), t))),
            Some(v) => Err(self.wrong(key, "a table", v)),
        }
    }

    pub(crate) fn table_req(&self, key: &str, expected: &str) -> R<Tab<'a>> {
        self.table_opt(key)?
            .ok_or_else(|| self.missing(key, expected))
    }

    pub(crate) fn array_opt(&self, key: &str) -> R<Option<&'a Vec<toml::Value>>> {
        match self.get(key) {
            None => Ok(None),
            Some(toml::Value::Array(a)) => Ok(Some(a)),
            Some(v) => Err(self.wrong(key, "an array", v)),
        }
    }

    pub(crate) fn array_req(&self, key: &str, expected: &str) -> R<&'a Vec<toml::Value>> {
        self.array_opt(key)?
            .ok_or_else(|| self.missing(key, expected))
    }

    /// The tables of an array of tables, each as a [`Tab`] at `key[i]`; `example` shows one
    /// element in the message when an element is not a table.
    pub(crate) fn tables_in(
        &self,
        key: &str,
        a: &'a [toml::Value],
        example: &str,
    ) -> R<Vec<Tab<'a>>> {
        let mut out = Vec::with_capacity(a.len());
        for (i, v) in a.iter().enumerate() {
            let p = format!("{}[{i}]", self.key_path(key));
            match v {
                toml::Value::Table(t) => out.push(Tab::new(self.ctx, p, t)),
                other => {
                    return Err(self.ctx.err(
                        &p,
                        Problem::WrongType {
                            expected: format!("a table like {example}"),
                            found: type_name(other),
                        },
                    ))
                }
            }
        }
        Ok(out)
    }
}

/// Names must be usable as file names: `[A-Za-z0-9_-]+`.
pub(crate) fn valid_name(name: &str) -> bool {
    !name.is_empty()
        && name
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b == b'_' || b == b'-')
}
