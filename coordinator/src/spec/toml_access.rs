//! Typed access to a TOML document that keeps every problem with its place:
//! the general layer under the sweep-file rules ([`super::reader`]).
//!
//! [`Reader`] walks the spanned document tree of the `toml` crate
//! (`toml::de::DeTable`) and turns each value into a Rust value, recording a
//! [`SpecError`] with line, column, key and what would be valid for every
//! value of the wrong type instead of stopping at the first.

use std::time::Duration;

use toml::de::{DeTable, DeValue};
use toml::Spanned;

use super::error::LineIndex;
use super::{SpecError, SpecErrors};

/// A spanned TOML value.
pub(super) type Value<'i> = Spanned<DeValue<'i>>;

/// Collects errors while walking the document.
pub(super) struct Reader<'a> {
    pub(super) file: &'a str,
    pub(super) lines: LineIndex<'a>,
    /// (byte offset, error): sorted by offset at the end.
    pub(super) errors: Vec<(usize, SpecError)>,
    /// (byte offset, warning): problems that do not stop the sweep.
    pub(super) warnings: Vec<(usize, SpecError)>,
}

pub(super) fn join(path: &str, key: &str) -> String {
    if path.is_empty() {
        key.to_string()
    } else {
        format!("{path}.{key}")
    }
}

pub(super) fn type_name(v: &DeValue<'_>) -> &'static str {
    match v {
        DeValue::String(_) => "a string",
        DeValue::Integer(_) => "a whole number",
        DeValue::Float(_) => "a decimal number",
        DeValue::Boolean(_) => "true/false",
        DeValue::Datetime(_) => "a date",
        DeValue::Array(_) => "a list",
        DeValue::Table(_) => "a table",
    }
}

/// The closest known key, if it is close enough to be a likely misspelling.
pub(super) fn closest<'k>(word: &str, known: &[&'k str]) -> Option<&'k str> {
    let lower = word.to_ascii_lowercase();
    known
        .iter()
        .map(|k| (strsim::damerau_levenshtein(&lower, k), *k))
        .filter(|(d, k)| {
            *d <= (k.len() / 3).max(1) || lower.starts_with(*k) || k.starts_with(&*lower)
        })
        .min_by_key(|(d, _)| *d)
        .map(|(_, k)| k)
}

/// A number quoted in a message, exactly as it reads back.
pub(super) fn num(x: f64) -> String {
    tessera_models::text::exact(x)
}

pub(super) fn parse_integer(v: &DeValue<'_>) -> Option<Option<i64>> {
    match v {
        DeValue::Integer(i) => {
            let digits: String = i.as_str().chars().filter(|c| *c != '_').collect();
            Some(i64::from_str_radix(&digits, i.radix()).ok())
        }
        _ => None,
    }
}

pub(super) fn parse_float(v: &DeValue<'_>) -> Option<f64> {
    match v {
        DeValue::Float(f) => {
            let s: String = f.as_str().chars().filter(|c| *c != '_').collect();
            let neg = s.starts_with('-');
            if s.ends_with("nan") {
                Some(f64::NAN)
            } else if s.ends_with("inf") {
                Some(if neg {
                    f64::NEG_INFINITY
                } else {
                    f64::INFINITY
                })
            } else {
                s.parse().ok()
            }
        }
        DeValue::Integer(_) => parse_integer(v).flatten().map(|i| i as f64),
        _ => None,
    }
}

/// Position of a table in the file: its own span if the parser gave it one,
/// else the key that names it.
pub(super) fn table_start(value: &Value<'_>, key_start: usize) -> usize {
    let s = value.span();
    if s.start < s.end {
        s.start
    } else {
        key_start
    }
}

impl Reader<'_> {
    pub(super) fn error(&mut self, at: usize, key: &str, message: impl Into<String>) {
        let (line, column) = self.lines.line_col(at);
        self.errors.push((
            at,
            SpecError {
                file: self.file.to_string(),
                line,
                column,
                key: key.to_string(),
                message: message.into(),
            },
        ));
    }

    /// Records a warning: something that will not stop the sweep but that
    /// whoever runs the sweep should know about.
    pub(super) fn warning(&mut self, at: usize, key: &str, message: impl Into<String>) {
        let (line, column) = self.lines.line_col(at);
        self.warnings.push((
            at,
            SpecError {
                file: self.file.to_string(),
                line,
                column,
                key: key.to_string(),
                message: message.into(),
            },
        ));
    }

    /// The warnings, in file order.
    pub(super) fn take_warnings(&mut self) -> Vec<SpecError> {
        let mut w = std::mem::take(&mut self.warnings);
        w.sort_by_key(|(at, _)| *at);
        w.into_iter().map(|(_, e)| e).collect()
    }

    pub(super) fn finish(&mut self) -> SpecErrors {
        let mut errors = std::mem::take(&mut self.errors);
        errors.sort_by_key(|(at, _)| *at);
        SpecErrors(errors.into_iter().map(|(_, e)| e).collect())
    }

    pub(super) fn line_of(&self, at: usize) -> usize {
        self.lines.line_col(at).0
    }

    /// Reports every key of `table` that is not in `known`, with a suggestion.
    pub(super) fn check_keys(&mut self, table: &DeTable<'_>, path: &str, known: &[&str]) {
        for (k, _) in table.iter() {
            let name: &str = k.get_ref();
            if known.contains(&name) {
                continue;
            }
            let hint = match closest(name, known) {
                Some(c) => format!("did you mean `{c}`? "),
                None => String::new(),
            };
            let message = format!(
                "unknown key `{name}`; {hint}valid keys here: {}",
                known.join(", ")
            );
            self.error(k.span().start, &join(path, name), message);
        }
    }

    pub(super) fn lookup<'t, 'i>(
        table: &'t DeTable<'i>,
        key: &str,
    ) -> Option<(&'t Spanned<std::borrow::Cow<'i, str>>, &'t Value<'i>)> {
        table.get_key_value(key)
    }

    pub(super) fn string(&mut self, v: &Value<'_>, key: &str, example: &str) -> Option<String> {
        match v.get_ref() {
            DeValue::String(s) => Some(s.to_string()),
            other => {
                let found = type_name(other);
                self.error(
                    v.span().start,
                    key,
                    format!("expected text in quotes, e.g. {key} = {example}; found {found}"),
                );
                None
            }
        }
    }

    pub(super) fn nonempty_string(
        &mut self,
        v: &Value<'_>,
        key: &str,
        example: &str,
    ) -> Option<String> {
        let s = self.string(v, key, example)?;
        if s.trim().is_empty() {
            self.error(
                v.span().start,
                key,
                format!("must not be empty, e.g. {key} = {example}"),
            );
            return None;
        }
        Some(s)
    }

    /// A finite number (whole or decimal).
    pub(super) fn number(&mut self, v: &Value<'_>, key: &str) -> Option<f64> {
        match parse_float(v.get_ref()) {
            Some(x) if x.is_finite() => Some(x),
            Some(_) => {
                self.error(
                    v.span().start,
                    key,
                    "must be a finite number (not nan or inf)",
                );
                None
            }
            None => {
                let found = type_name(v.get_ref());
                self.error(
                    v.span().start,
                    key,
                    format!("expected a number, e.g. 0.5 or 20; found {found}"),
                );
                None
            }
        }
    }

    /// A whole number in `[min, max]`.
    pub(super) fn whole(
        &mut self,
        v: &Value<'_>,
        key: &str,
        min: i64,
        max: i64,
        what: &str,
    ) -> Option<i64> {
        let at = v.span().start;
        match parse_integer(v.get_ref()) {
            Some(Some(i)) if (min..=max).contains(&i) => Some(i),
            Some(_) => {
                self.error(
                    at,
                    key,
                    format!("must be a whole number from {min} to {max} ({what})"),
                );
                None
            }
            None => {
                let found = match v.get_ref() {
                    DeValue::Float(f) => format!("the decimal number {}", f.as_str()),
                    other => type_name(other).to_string(),
                };
                self.error(
                    at,
                    key,
                    format!(
                        "expected a whole number without decimal point, e.g. {key} = {min_ex}; found {found} ({what})",
                        min_ex = min.max(1)
                    ),
                );
                None
            }
        }
    }

    pub(super) fn boolean(&mut self, v: &Value<'_>, key: &str) -> Option<bool> {
        match v.get_ref() {
            DeValue::Boolean(b) => Some(*b),
            other => {
                let found = type_name(other);
                self.error(
                    v.span().start,
                    key,
                    format!("expected true or false (without quotes); found {found}"),
                );
                None
            }
        }
    }

    pub(super) fn table<'t, 'i>(
        &mut self,
        v: &'t Value<'i>,
        key: &str,
        example: &str,
    ) -> Option<&'t DeTable<'i>> {
        match v.get_ref() {
            DeValue::Table(t) => Some(t),
            other => {
                let found = type_name(other);
                self.error(
                    v.span().start,
                    key,
                    format!("expected a table, written as a header line {example}; found {found}"),
                );
                None
            }
        }
    }

    pub(super) fn duration(&mut self, v: &Value<'_>, key: &str) -> Option<Duration> {
        const FORMS: &str = "valid forms: \"90s\", \"10m\", \"2h\", \"1h 30m\"";
        let at = v.span().start;
        let s = match v.get_ref() {
            DeValue::String(s) => s.to_string(),
            other => {
                let found = match other {
                    DeValue::Integer(i) => format!("the bare number {}", i.as_str()),
                    DeValue::Float(f) => format!("the bare number {}", f.as_str()),
                    o => type_name(o).to_string(),
                };
                self.error(
                    at,
                    key,
                    format!("expected a duration in quotes with a unit; found {found}; {FORMS}"),
                );
                return None;
            }
        };
        match humantime::parse_duration(s.trim()) {
            Ok(d) if d.is_zero() => {
                self.error(at, key, format!("must be longer than zero; {FORMS}"));
                None
            }
            Ok(d) => Some(d),
            Err(e) => {
                self.error(at, key, format!("\"{s}\" is not a duration ({e}); {FORMS}"));
                None
            }
        }
    }

    pub(super) fn json(&mut self, v: &Value<'_>, key: &str) -> Option<serde_json::Value> {
        use serde_json::Value as J;
        match v.get_ref() {
            DeValue::String(s) => Some(J::String(s.to_string())),
            DeValue::Boolean(b) => Some(J::Bool(*b)),
            DeValue::Integer(_) => match parse_integer(v.get_ref()).flatten() {
                Some(i) => Some(J::from(i)),
                None => {
                    self.error(v.span().start, key, "whole number too large");
                    None
                }
            },
            DeValue::Float(_) => {
                let x = self.number(v, key)?;
                serde_json::Number::from_f64(x).map(J::Number)
            }
            DeValue::Datetime(d) => Some(J::String(d.to_string())),
            DeValue::Array(items) => {
                let mut out = Vec::new();
                let mut ok = true;
                for (i, item) in items.iter().enumerate() {
                    match self.json(item, &format!("{key}[{}]", i + 1)) {
                        Some(j) => out.push(j),
                        None => ok = false,
                    }
                }
                ok.then_some(J::Array(out))
            }
            DeValue::Table(t) => {
                let mut out = serde_json::Map::new();
                let mut ok = true;
                for (k, item) in t.iter() {
                    match self.json(item, &join(key, k.get_ref())) {
                        Some(j) => {
                            out.insert(k.get_ref().to_string(), j);
                        }
                        None => ok = false,
                    }
                }
                ok.then_some(J::Object(out))
            }
        }
    }
}
