//! Environment overrides of configuration keys: `GAUGEWISE_<SECTION>__<KEY>...=value`.
//!
//! The variable name is the key path in capitals with `__` between levels and an array element's index as its own
//! level: `GAUGEWISE_BROKER__PORT` sets `broker.port`, `GAUGEWISE_INPUTS__0__QOS` sets `inputs[0].qos`. The value is
//! read as a TOML value (`1884`, `true`, `0.5`, `[192, "good"]`, `"text"`), and as plain text when it is not one.
//! Overrides are written into the parsed file before the strict deserialisation in `config`, so an override is
//! checked exactly like the key in the file would be, and an override of a key that does not exist is refused.
//!
//! This module only parses the variables and edits the TOML tree; `config` decides which errors belong to which
//! variable. Variables are applied in key order (indices numerically), so `GAUGEWISE_INPUTS__2__TOPIC` can append
//! a third input after `__1__` when the file has two.

use std::cmp::Ordering;
use std::ffi::OsString;

/// Every configuration variable starts with this.
pub const ENV_PREFIX: &str = "GAUGEWISE_";
/// Separates the levels of a key path in a variable name.
pub const ENV_SEPARATOR: &str = "__";
/// Variables with the prefix that are not configuration keys (read elsewhere), so they are not refused as unknown.
pub const ENV_NOT_CONFIG: &[&str] = &["GAUGEWISE_LOG"];

/// One level of a key path.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord)]
pub(crate) enum Segment {
    Key(String),
    Index(usize),
}

/// One configuration variable found in the environment. The value is private: it may be a password.
#[derive(Clone, PartialEq)]
pub struct EnvOverride {
    /// The variable's name, e.g. `GAUGEWISE_BROKER__PORT`.
    pub var: String,
    /// The key path it sets, written as errors write it, e.g. `inputs[0].qos`.
    pub key: String,
    pub(crate) path: Vec<Segment>,
    pub(crate) value: toml::Value,
    /// The variable's value as given, for a retry as plain text.
    pub(crate) text: String,
}

impl std::fmt::Debug for EnvOverride {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{} -> {}", self.var, self.key)
    }
}

/// Why a variable could not be applied; `config` adds the file name.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct EnvProblem {
    pub var: String,
    pub key: String,
    pub message: String,
}

/// The configuration variables among `vars`, sorted by key path.
pub(crate) fn collect<I, K, V>(vars: I) -> Result<Vec<EnvOverride>, EnvProblem>
where
    I: IntoIterator<Item = (K, V)>,
    K: Into<OsString>,
    V: Into<OsString>,
{
    let mut out = Vec::new();
    for (name, value) in vars {
        let (name, value) = (name.into(), value.into());
        let Some(name) = name.to_str().map(str::to_string) else {
            if name.to_string_lossy().starts_with(ENV_PREFIX) {
                return Err(EnvProblem {
                    var: name.to_string_lossy().into_owned(),
                    key: "(environment)".to_string(),
                    message: "the variable's name is not valid UTF-8".to_string(),
                });
            }
            continue;
        };
        if !name.starts_with(ENV_PREFIX) || ENV_NOT_CONFIG.contains(&name.as_str()) {
            continue;
        }
        let path = parse_name(&name)?;
        let key = key_text(&path);
        let Some(text) = value.to_str() else {
            return Err(EnvProblem {
                var: name,
                key,
                message: "the value is not valid UTF-8".to_string(),
            });
        };
        out.push(EnvOverride {
            var: name,
            key,
            value: parse_value(text),
            text: text.to_string(),
            path,
        });
    }
    out.sort_by(|a, b| a.path.cmp(&b.path).then_with(|| a.var.cmp(&b.var)));
    Ok(out)
}

fn parse_name(name: &str) -> Result<Vec<Segment>, EnvProblem> {
    let rest = &name[ENV_PREFIX.len()..];
    let problem = |message: String| EnvProblem {
        var: name.to_string(),
        key: rest.to_ascii_lowercase().replace(ENV_SEPARATOR, "."),
        message,
    };
    let mut path = Vec::new();
    for part in rest.split(ENV_SEPARATOR) {
        if part.is_empty() {
            return Err(problem(format!(
                "is not a key path: a level is empty; write levels as {ENV_PREFIX}SECTION{ENV_SEPARATOR}KEY, \
                 e.g. {ENV_PREFIX}BROKER{ENV_SEPARATOR}PORT"
            )));
        }
        if part.bytes().all(|b| b.is_ascii_digit()) {
            let index = part
                .parse::<usize>()
                .map_err(|_| problem(format!("index {part} is too large")))?;
            if path.is_empty() {
                return Err(problem(
                    "is not a key path: it starts with an index, but the top level has only named sections"
                        .to_string(),
                ));
            }
            path.push(Segment::Index(index));
        } else {
            path.push(Segment::Key(part.to_ascii_lowercase()));
        }
    }
    Ok(path)
}

/// The key path as errors print it: `inputs[0].qos`.
pub(crate) fn key_text(path: &[Segment]) -> String {
    let mut out = String::new();
    for s in path {
        match s {
            Segment::Key(k) => {
                if !out.is_empty() {
                    out.push('.');
                }
                out.push_str(k);
            }
            Segment::Index(i) => out.push_str(&format!("[{i}]")),
        }
    }
    out
}

/// A TOML value if the text is one (a number, boolean, array, quoted string...), else the text as a string.
fn parse_value(text: &str) -> toml::Value {
    match toml::from_str::<toml::Table>(&format!("v = {text}")) {
        // More than one key means the text smuggled in a newline and another key: that is not one value.
        Ok(mut t) if t.len() == 1 => t.remove("v").unwrap_or_else(|| plain(text)),
        _ => plain(text),
    }
}

fn plain(text: &str) -> toml::Value {
    toml::Value::String(text.to_string())
}

impl EnvOverride {
    /// Whether the value was read as something other than a string (and so may be retried as the plain text).
    pub(crate) fn typed(&self) -> bool {
        !self.value.is_str()
    }

    /// The value as plain text, for keys that want a string although the text reads as a number (`0042`).
    pub(crate) fn as_text(&self) -> EnvOverride {
        EnvOverride {
            value: plain(&self.text),
            ..self.clone()
        }
    }
}

/// Writes `o` into `doc`, creating missing tables (and the next element of an array) on the way.
pub(crate) fn apply(doc: &mut toml::Table, o: &EnvOverride) -> Result<(), EnvProblem> {
    let problem = |upto: usize, message: String| EnvProblem {
        var: o.var.clone(),
        key: key_text(&o.path[..upto]),
        message,
    };
    let (first, rest) = match o.path.split_first() {
        Some((Segment::Key(k), rest)) => (k, rest),
        _ => return Err(problem(0, "names no key".to_string())),
    };
    if rest.is_empty() {
        doc.insert(first.clone(), o.value.clone());
        return Ok(());
    }
    let mut node = doc
        .entry(first.clone())
        .or_insert_with(|| empty_for(&rest[0]));
    for (depth, seg) in rest.iter().enumerate() {
        let upto = depth + 1;
        let last = depth + 1 == rest.len();
        let next = if last { None } else { Some(&rest[depth + 1]) };
        let fresh = || match next {
            Some(n) => empty_for(n),
            None => o.value.clone(),
        };
        node = match (node, seg) {
            (toml::Value::Table(t), Segment::Key(k)) => {
                if last {
                    t.insert(k.clone(), o.value.clone());
                    return Ok(());
                }
                t.entry(k.clone()).or_insert_with(fresh)
            }
            (toml::Value::Array(items), Segment::Index(i)) => match (*i).cmp(&items.len()) {
                Ordering::Less => {
                    if last {
                        items[*i] = o.value.clone();
                        return Ok(());
                    }
                    &mut items[*i]
                }
                Ordering::Equal => {
                    items.push(fresh());
                    if last {
                        return Ok(());
                    }
                    items.last_mut().expect("just pushed")
                }
                Ordering::Greater => {
                    return Err(problem(
                        upto + 1,
                        format!(
                            "{} has {} element(s): an override can set one of them or add the next, [{}]",
                            key_text(&o.path[..upto]),
                            items.len(),
                            items.len()
                        ),
                    ))
                }
            },
            (other, seg) => {
                let what = match seg {
                    Segment::Key(k) => format!("a table, so it has no key `{k}`"),
                    Segment::Index(i) => format!("an array, so it has no element [{i}]"),
                };
                return Err(problem(
                    upto,
                    format!("is {} in the file, not {what}", kind_of(other)),
                ));
            }
        };
    }
    Ok(())
}

fn empty_for(next: &Segment) -> toml::Value {
    match next {
        Segment::Key(_) => toml::Value::Table(toml::Table::new()),
        Segment::Index(_) => toml::Value::Array(Vec::new()),
    }
}

fn kind_of(v: &toml::Value) -> &'static str {
    match v {
        toml::Value::String(_) => "a string",
        toml::Value::Integer(_) => "an integer",
        toml::Value::Float(_) => "a float",
        toml::Value::Boolean(_) => "a boolean",
        toml::Value::Datetime(_) => "a date-time",
        toml::Value::Array(_) => "an array",
        toml::Value::Table(_) => "a table",
    }
}
