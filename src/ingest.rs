//! From an MQTT message to a sample: which input rule a topic falls under, which channel it feeds, and what value
//! and time its payload carries.
//!
//! Pure and synchronous, like the core: no IO, no clock, no logging. The receive time arrives as an argument, and
//! every refusal is a [`Reject`] with a stable label ([`Reject::reason`]) that the runtime counts and logs. Nothing
//! here panics on any topic or payload. `config` builds the [`InputRule`]s; `runtime` calls [`Router::route`] (or
//! [`Router::resolve`] then [`InputRule::read`], to shard by channel before the payload is parsed) for each message
//! and hands the [`Sample`] to the channel's worker, where `channel::Channel::on_sample` takes it.
//!
//! Rules, chosen so that a garbled message is refused with a reason rather than turned into a wrong number:
//! - **Topics.** A filter follows MQTT 3.1.1/5 matching: `+` is one whole level, `#` the rest (including the parent
//!   level: `a/#` matches `a`), and a topic starting with `$` is not matched by a wildcard in the first level. A
//!   shared subscription `$share/GROUP/FILTER` matches as FILTER. The first rule whose filter matches wins.
//! - **Channel names** come from a template over the topic's levels (0-based): `{2}`, `{1}-{2}`, `{topic}` for the
//!   whole topic, literal text around them, `{{` and `}}` for literal braces. A name must be 1 to
//!   [`MAX_CHANNEL_BYTES`] bytes. It may contain `/` (the output topic then has more levels), never `+`, `#` or NUL.
//! - **Plain numbers** ([`PayloadFormat::Number`]): UTF-8 text, surrounding whitespace ignored. Empty, `null` and
//!   `nan` (any case) are a missing sample, as in `history`; `inf` and numbers too large for f64 are
//!   [`Reject::NonFinite`].
//! - **JSON** ([`PayloadFormat::Json`]): fields are found by RFC 6901 pointers, in one pass over the text with no
//!   document tree built. The value field: a number is the value; `null` is a missing sample; a string holding a
//!   number (`"72.5"`) is accepted as that number, because several gateway firmwares quote every value; a string
//!   holding `NaN`/`Infinity` is [`Reject::NonFinite`] (JSON has `null` for "no value", so a NaN is a writer fault);
//!   any other string is [`Reject::NotNumber`]; a bool, object or array is [`Reject::WrongType`]. An absent value
//!   field is [`Reject::MissingField`].
//! - **Quality.** When a quality pointer and a non-empty list of good values are configured, a quality field
//!   present and not in the list makes the sample missing (the value is not even looked at: devices often send
//!   garbage with bad quality). Numbers compare by value (`192` equals `192.0`), strings exactly. An absent quality
//!   field carries no evidence of a fault and is taken as good.
//! - **Time.** Without a time pointer the receive time is used. With one, the field must be present and non-null
//!   ([`Reject::MissingField`]): silently mixing the device's clock with ours would reorder samples. Forms: epoch
//!   seconds, epoch milliseconds, RFC 3339, or auto (a number above [`EPOCH_MS_THRESHOLD`] in magnitude is
//!   milliseconds, smaller seconds; a string is RFC 3339 or a number in text). A time before 1970 or not finite is
//!   [`Reject::BadTime`]; one more than [`MAX_FUTURE_S`] ahead of the receive time is [`Reject::FutureTime`] (a
//!   device clock running ahead is a real plant fault, and one such sample would make every later one "late"). Old
//!   times are accepted: gateways replay their buffers after an outage.

use crate::history::EPOCH_MS_THRESHOLD;
use serde::de::{self, DeserializeSeed, IgnoredAny, MapAccess, SeqAccess, Visitor};
use serde::{Deserialize, Serialize};
use std::borrow::Cow;
use std::fmt;
use thiserror::Error;

/// Longest channel name, in bytes.
pub const MAX_CHANNEL_BYTES: usize = 256;

/// How far a payload's time may run ahead of the receive time, in seconds, before the sample is refused.
pub const MAX_FUTURE_S: f64 = 3600.0;

/// Longest topic or topic filter MQTT allows, in bytes.
pub const MAX_TOPIC_BYTES: usize = 65_535;

/// Largest payload MQTT can carry (the maximum remaining length of a packet).
pub const MAX_PAYLOAD_LIMIT: usize = 268_435_455;

/// A mistake in an input rule, found when the configuration is built.
#[derive(Debug, Clone, PartialEq, Eq, Error)]
pub enum IngestConfigError {
    #[error("topic filter '{filter}' is not valid: {why}")]
    BadFilter { filter: String, why: &'static str },
    #[error("channel template '{template}' is not valid: {why}")]
    BadTemplate { template: String, why: String },
    #[error(
        "channel template '{template}' uses topic level {{{index}}}, but topics matching '{filter}' have only \
         {levels} levels (counted from 0)"
    )]
    LevelOutOfRange {
        template: String,
        filter: String,
        index: usize,
        levels: usize,
    },
    #[error("{field} pointer '{pointer}' is not a JSON pointer (RFC 6901): {why}")]
    BadPointer {
        field: &'static str,
        pointer: String,
        why: &'static str,
    },
    #[error(
        "the {a} pointer '{pa}' and the {b} pointer '{pb}' overlap; each field must be its own member of the payload"
    )]
    OverlappingPointers {
        a: &'static str,
        pa: String,
        b: &'static str,
        pb: String,
    },
    #[error("good quality value {0} is not a number, string, bool or null")]
    BadGoodQuality(String),
    #[error("payload limit must be between 1 and {MAX_PAYLOAD_LIMIT} bytes, not {0}")]
    PayloadLimit(usize),
    #[error("QoS must be 0, 1 or 2, not {0}")]
    Qos(u8),
}

/// Why a message produced no sample. [`Reject::reason`] is the label for counters; `Display` is the log text.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Error)]
pub enum Reject {
    #[error("payload of {bytes} bytes is over the limit of {limit}")]
    TooLarge { bytes: usize, limit: usize },
    #[error("payload is not UTF-8 text")]
    NotUtf8,
    #[error("payload value is not a number")]
    NotNumber,
    #[error("payload is not valid JSON")]
    NotJson,
    #[error("payload has no {0} field")]
    MissingField(&'static str),
    #[error("payload {0} field has the wrong type")]
    WrongType(&'static str),
    #[error("payload value is not finite")]
    NonFinite,
    #[error("payload time is not a valid timestamp after 1970")]
    BadTime,
    #[error("payload time is more than {MAX_FUTURE_S} s ahead of the receive time")]
    FutureTime,
    #[error("topic matches no input")]
    NoRule,
    #[error("no valid channel name can be formed from the topic")]
    NoChannel,
}

impl Reject {
    /// Every label [`Reject::reason`] returns, in [`Reject::index`] order, so counters can be set up front.
    pub const REASONS: [&'static str; 11] = [
        "too_large",
        "not_utf8",
        "not_number",
        "not_json",
        "missing_field",
        "wrong_type",
        "non_finite",
        "bad_time",
        "future_time",
        "no_rule",
        "no_channel",
    ];

    /// Position of this reason in [`Reject::REASONS`], for array-indexed counters.
    pub fn index(&self) -> usize {
        match self {
            Reject::TooLarge { .. } => 0,
            Reject::NotUtf8 => 1,
            Reject::NotNumber => 2,
            Reject::NotJson => 3,
            Reject::MissingField(_) => 4,
            Reject::WrongType(_) => 5,
            Reject::NonFinite => 6,
            Reject::BadTime => 7,
            Reject::FutureTime => 8,
            Reject::NoRule => 9,
            Reject::NoChannel => 10,
        }
    }

    /// A stable snake_case label for metrics; never changes once released.
    pub fn reason(&self) -> &'static str {
        Self::REASONS[self.index()]
    }
}

// ---------------------------------------------------------------------------------------------------------------
// Topics

/// A topic name as it may appear in a PUBLISH: non-empty, within MQTT's length, no wildcard and no NUL.
fn valid_topic_name(topic: &str) -> bool {
    !topic.is_empty()
        && topic.len() <= MAX_TOPIC_BYTES
        && !topic.bytes().any(|b| b == b'+' || b == b'#' || b == 0)
}

/// A parsed MQTT topic filter.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TopicFilter {
    /// As subscribed, `$share/GROUP/` prefix included.
    text: String,
    /// Byte offset of the part that is matched against topics (after a `$share/GROUP/` prefix).
    start: usize,
}

impl TopicFilter {
    pub fn parse(text: &str) -> Result<Self, IngestConfigError> {
        let bad = |why| IngestConfigError::BadFilter {
            filter: text.to_string(),
            why,
        };
        if text.is_empty() {
            return Err(bad("it is empty"));
        }
        if text.len() > MAX_TOPIC_BYTES {
            return Err(bad("it is longer than 65535 bytes"));
        }
        if text.contains('\0') {
            return Err(bad("it contains a NUL character"));
        }
        let start = match text.strip_prefix("$share/") {
            Some(rest) => match rest.split_once('/') {
                Some((group, filter))
                    if !group.is_empty() && !filter.is_empty() && !group.contains(['+', '#']) =>
                {
                    text.len() - filter.len()
                }
                _ => return Err(bad("a shared subscription is $share/GROUP/FILTER")),
            },
            None => 0,
        };
        let mut levels = text[start..].split('/').peekable();
        while let Some(level) = levels.next() {
            if level.contains('#') && (level != "#" || levels.peek().is_some()) {
                return Err(bad("'#' must be a whole level and the last one"));
            }
            if level.contains('+') && level != "+" {
                return Err(bad("'+' must be a whole level"));
            }
        }
        Ok(Self {
            text: text.to_string(),
            start,
        })
    }

    /// The filter as given (what the daemon subscribes to).
    pub fn as_str(&self) -> &str {
        &self.text
    }

    /// The part matched against topics: the filter itself, or FILTER of `$share/GROUP/FILTER`.
    pub fn match_part(&self) -> &str {
        &self.text[self.start..]
    }

    /// Number of levels of the matched part, and whether it ends in `#` (so topics may have more).
    fn shape(&self) -> (usize, bool) {
        let part = self.match_part();
        (part.split('/').count(), part == "#" || part.ends_with("/#"))
    }

    /// Whether `topic` matches, by MQTT's rules; the captures give the template its levels.
    pub fn matches<'t>(&self, topic: &'t str) -> Option<Captures<'t>> {
        if !valid_topic_name(topic) {
            return None;
        }
        self.matches_valid(topic)
    }

    /// Matching for a topic already known to be a valid topic name.
    fn matches_valid<'t>(&self, topic: &'t str) -> Option<Captures<'t>> {
        let dollar = topic.starts_with('$');
        let mut levels = topic.split('/');
        for (i, f) in self.match_part().split('/').enumerate() {
            match f {
                "#" => {
                    return (!(i == 0 && dollar)).then_some(Captures { topic });
                }
                "+" => {
                    levels.next()?;
                    if i == 0 && dollar {
                        return None;
                    }
                }
                literal => {
                    if levels.next()? != literal {
                        return None;
                    }
                }
            }
        }
        levels.next().is_none().then_some(Captures { topic })
    }
}

impl fmt::Display for TopicFilter {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.text)
    }
}

/// A topic that matched a filter, seen as its levels (0-based, split at `/`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Captures<'t> {
    topic: &'t str,
}

impl<'t> Captures<'t> {
    /// The levels of any topic, for rendering a template without a filter.
    pub fn from_topic(topic: &'t str) -> Self {
        Self { topic }
    }

    pub fn topic(&self) -> &'t str {
        self.topic
    }

    pub fn level(&self, index: usize) -> Option<&'t str> {
        self.topic.split('/').nth(index)
    }
}

// ---------------------------------------------------------------------------------------------------------------
// Channel names

#[derive(Debug, Clone, PartialEq, Eq)]
enum Part {
    Literal(String),
    Level(usize),
    Topic,
}

/// Splits a template into literal text and `{name}` placeholders; `{{` and `}}` are literal braces.
pub(crate) fn split_template(text: &str) -> Result<Vec<TemplatePiece<'_>>, String> {
    let mut pieces = Vec::new();
    let mut literal = String::new();
    let mut rest = text;
    while let Some(i) = rest.find(['{', '}']) {
        literal.push_str(&rest[..i]);
        let brace = rest.as_bytes()[i];
        rest = &rest[i + 1..];
        if rest.as_bytes().first() == Some(&brace) {
            literal.push(brace as char);
            rest = &rest[1..];
        } else if brace == b'}' {
            return Err("a lone '}' (write '}}' for a literal brace)".to_string());
        } else {
            let end = rest
                .find(['}', '{'])
                .filter(|&e| rest.as_bytes()[e] == b'}')
                .ok_or("a '{' without its '}' (write '{{' for a literal brace)")?;
            if !literal.is_empty() {
                pieces.push(TemplatePiece::Literal(std::mem::take(&mut literal)));
            }
            pieces.push(TemplatePiece::Placeholder(&rest[..end]));
            rest = &rest[end + 1..];
        }
    }
    literal.push_str(rest);
    if !literal.is_empty() {
        pieces.push(TemplatePiece::Literal(literal));
    }
    Ok(pieces)
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub(crate) enum TemplatePiece<'a> {
    Literal(String),
    Placeholder(&'a str),
}

/// Writes literal template text with its braces doubled, so that it parses back to itself.
pub(crate) fn write_escaped(f: &mut fmt::Formatter<'_>, text: &str) -> fmt::Result {
    for piece in text.split_inclusive(['{', '}']) {
        f.write_str(piece)?;
        if piece.ends_with(['{', '}']) {
            f.write_str(&piece[piece.len() - 1..])?;
        }
    }
    Ok(())
}

/// How a channel's name is formed from the levels of its topic.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ChannelTemplate {
    parts: Vec<Part>,
}

impl ChannelTemplate {
    pub fn parse(text: &str) -> Result<Self, IngestConfigError> {
        let bad = |why: String| IngestConfigError::BadTemplate {
            template: text.to_string(),
            why,
        };
        let pieces = split_template(text).map_err(bad)?;
        let mut parts = Vec::with_capacity(pieces.len());
        for piece in pieces {
            match piece {
                TemplatePiece::Literal(s) => {
                    if s.contains(['+', '#', '\0']) {
                        return Err(bad(
                            "channel names cannot contain '+', '#' or NUL (they would break the output topic)"
                                .to_string(),
                        ));
                    }
                    parts.push(Part::Literal(s));
                }
                TemplatePiece::Placeholder("topic") => parts.push(Part::Topic),
                TemplatePiece::Placeholder(p) => {
                    match p.parse::<usize>() {
                        Ok(i) if p.bytes().all(|b| b.is_ascii_digit()) && i < MAX_TOPIC_BYTES => {
                            parts.push(Part::Level(i))
                        }
                        _ => return Err(bad(format!(
                            "unknown placeholder '{{{p}}}': use {{topic}} or a topic level number such as {{2}}"
                        ))),
                    }
                }
            }
        }
        if parts.is_empty() {
            return Err(bad("it is empty".to_string()));
        }
        Ok(Self { parts })
    }

    /// The highest topic level the template uses, if any.
    pub fn max_level(&self) -> Option<usize> {
        self.parts
            .iter()
            .filter_map(|p| match p {
                Part::Level(i) => Some(*i),
                _ => None,
            })
            .max()
    }

    /// The channel name for a topic; None when a level is missing or the name is empty or too long.
    pub fn render(&self, captures: &Captures<'_>) -> Option<String> {
        // Room for the usual case (each level used once) in one allocation.
        let guess: usize = self
            .parts
            .iter()
            .map(|p| match p {
                Part::Literal(s) => s.len(),
                Part::Level(_) | Part::Topic => 0,
            })
            .sum::<usize>()
            + captures.topic().len();
        let mut name = String::with_capacity(guess.min(MAX_CHANNEL_BYTES));
        for part in &self.parts {
            let piece = match part {
                Part::Literal(s) => s.as_str(),
                Part::Level(i) => captures.level(*i)?,
                Part::Topic => captures.topic(),
            };
            if name.len() + piece.len() > MAX_CHANNEL_BYTES {
                return None;
            }
            name.push_str(piece);
        }
        // Topic levels never hold '+', '#' or NUL (they are not valid in topic names), nor do literals.
        (!name.is_empty()).then_some(name)
    }
}

impl fmt::Display for ChannelTemplate {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for part in &self.parts {
            match part {
                Part::Literal(s) => write_escaped(f, s)?,
                Part::Level(i) => write!(f, "{{{i}}}")?,
                Part::Topic => f.write_str("{topic}")?,
            }
        }
        Ok(())
    }
}

// ---------------------------------------------------------------------------------------------------------------
// Payloads

/// How a payload's timestamp is written.
/// Its names ([`TimeFormat::NAMES`]) are the ones the configuration uses.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum TimeFormat {
    /// Numbers by magnitude (epoch milliseconds above 1e11, else seconds); strings RFC 3339 or a number in text.
    #[default]
    Auto,
    /// Epoch seconds (a number, or a number in a string).
    #[serde(rename = "epoch_s")]
    Seconds,
    /// Epoch milliseconds (a number, or a number in a string).
    #[serde(rename = "epoch_ms")]
    Milliseconds,
    /// An RFC 3339 string such as `2026-03-02T00:00:10.5Z`.
    Rfc3339,
}

impl TimeFormat {
    pub const NAMES: [&'static str; 4] = ["auto", "epoch_s", "epoch_ms", "rfc3339"];

    pub fn parse(text: &str) -> Option<Self> {
        match text {
            "auto" => Some(TimeFormat::Auto),
            "epoch_s" => Some(TimeFormat::Seconds),
            "epoch_ms" => Some(TimeFormat::Milliseconds),
            "rfc3339" => Some(TimeFormat::Rfc3339),
            _ => None,
        }
    }

    pub fn as_str(self) -> &'static str {
        match self {
            TimeFormat::Auto => "auto",
            TimeFormat::Seconds => "epoch_s",
            TimeFormat::Milliseconds => "epoch_ms",
            TimeFormat::Rfc3339 => "rfc3339",
        }
    }
}

impl fmt::Display for TimeFormat {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// What an input's payloads look like.
#[derive(Debug, Clone, PartialEq)]
pub enum PayloadFormat {
    /// The payload is a number in text, e.g. `72.5`.
    Number,
    /// A JSON document; fields are found by RFC 6901 pointers such as `/value` or `/data/0/v`.
    Json {
        value: String,
        time: Option<String>,
        time_format: TimeFormat,
        quality: Option<String>,
        /// Quality values that mean "good"; empty means quality is not checked.
        good_quality: Vec<serde_json::Value>,
    },
}

/// Field slots of the JSON walk.
const VALUE: usize = 0;
const TIME: usize = 1;
const QUALITY: usize = 2;
const FIELD_NAMES: [&str; 3] = ["value", "time", "quality"];

/// One reference token of a pointer, with its array index when it is one ("0" or no leading zero).
#[derive(Debug, Clone, PartialEq, Eq)]
struct Token {
    key: String,
    index: Option<usize>,
}

fn parse_pointer(field: &'static str, pointer: &str) -> Result<Vec<Token>, IngestConfigError> {
    let bad = |why| IngestConfigError::BadPointer {
        field,
        pointer: pointer.to_string(),
        why,
    };
    if pointer.is_empty() {
        return Ok(Vec::new());
    }
    let rest = pointer
        .strip_prefix('/')
        .ok_or_else(|| bad("it must be empty or start with '/'"))?;
    rest.split('/')
        .map(|raw| {
            let mut key = String::with_capacity(raw.len());
            let mut chars = raw.chars();
            while let Some(c) = chars.next() {
                if c == '~' {
                    match chars.next() {
                        Some('0') => key.push('~'),
                        Some('1') => key.push('/'),
                        _ => return Err(bad("'~' must be followed by 0 or 1")),
                    }
                } else {
                    key.push(c);
                }
            }
            let index = (key == "0" || (!key.starts_with('0') && !key.is_empty()))
                .then(|| key.parse::<usize>().ok())
                .flatten()
                .filter(|_| key.bytes().all(|b| b.is_ascii_digit()));
            Ok(Token { key, index })
        })
        .collect()
}

/// A value that quality is compared with.
#[derive(Debug, Clone, PartialEq)]
enum Good {
    Null,
    Bool(bool),
    Number(f64),
    Str(String),
}

/// A payload format checked and made ready for reading.
#[derive(Debug, Clone, PartialEq)]
enum Decoder {
    Number,
    Json {
        /// Pointer tokens per field slot; None when the field is not configured.
        paths: [Option<Vec<Token>>; 3],
        time_format: TimeFormat,
        good: Vec<Good>,
    },
}

impl Decoder {
    fn new(format: &PayloadFormat) -> Result<Self, IngestConfigError> {
        let PayloadFormat::Json {
            value,
            time,
            time_format,
            quality,
            good_quality,
        } = format
        else {
            return Ok(Decoder::Number);
        };
        let texts = [Some(value), time.as_ref(), quality.as_ref()];
        let mut paths: [Option<Vec<Token>>; 3] = [None, None, None];
        for (slot, text) in texts.iter().enumerate() {
            if let Some(t) = text {
                paths[slot] = Some(parse_pointer(FIELD_NAMES[slot], t)?);
            }
        }
        // One field's member inside another's would make the walk capture and descend at once; such a payload
        // cannot be read correctly anyway (the outer field would be an object), so refuse it here.
        for a in 0..3 {
            for b in a + 1..3 {
                if let (Some(pa), Some(pb)) = (&paths[a], &paths[b]) {
                    let n = pa.len().min(pb.len());
                    if pa[..n] == pb[..n] {
                        return Err(IngestConfigError::OverlappingPointers {
                            a: FIELD_NAMES[a],
                            pa: texts[a].map_or_else(String::new, |s| s.to_string()),
                            b: FIELD_NAMES[b],
                            pb: texts[b].map_or_else(String::new, |s| s.to_string()),
                        });
                    }
                }
            }
        }
        let good = good_quality
            .iter()
            .map(|g| match g {
                serde_json::Value::Null => Ok(Good::Null),
                serde_json::Value::Bool(b) => Ok(Good::Bool(*b)),
                serde_json::Value::Number(n) => n
                    .as_f64()
                    .map(Good::Number)
                    .ok_or_else(|| IngestConfigError::BadGoodQuality(g.to_string())),
                serde_json::Value::String(s) => Ok(Good::Str(s.clone())),
                _ => Err(IngestConfigError::BadGoodQuality(g.to_string())),
            })
            .collect::<Result<_, _>>()?;
        Ok(Decoder::Json {
            paths,
            time_format: *time_format,
            good,
        })
    }
}

/// A JSON value found at a pointer. Objects and arrays are skipped, never built.
#[derive(Debug, Clone, PartialEq)]
enum Leaf<'de> {
    Null,
    Bool(bool),
    Number(f64),
    Str(Cow<'de, str>),
    Composite,
}

type Slots<'de> = [Option<Leaf<'de>>; 3];

/// Walks a JSON document once, descending only into members that lie on a configured pointer.
struct Walk<'p, 's, 'de> {
    paths: &'p [Option<Vec<Token>>; 3],
    /// Fields whose pointer runs through the current node.
    active: u8,
    depth: usize,
    out: &'s mut Slots<'de>,
}

fn bits(mask: u8) -> impl Iterator<Item = usize> {
    (0..3).filter(move |i| mask & (1 << i) != 0)
}

impl<'de> DeserializeSeed<'de> for Walk<'_, '_, 'de> {
    type Value = ();

    fn deserialize<D: de::Deserializer<'de>>(self, d: D) -> Result<(), D::Error> {
        // Pointers never overlap (checked in `Decoder::new`), so a field ending here is the only active one.
        let ending = bits(self.active).find(|&i| {
            self.paths[i]
                .as_ref()
                .is_some_and(|p| p.len() == self.depth)
        });
        match ending {
            Some(slot) => {
                self.out[slot] = Some(d.deserialize_any(LeafVisitor)?);
                Ok(())
            }
            None => d.deserialize_any(self),
        }
    }
}

impl Walk<'_, '_, '_> {
    /// Fields whose next token is satisfied by `test`.
    fn next_mask(&self, test: impl Fn(&Token) -> bool) -> u8 {
        bits(self.active)
            .filter(|&i| {
                self.paths[i]
                    .as_ref()
                    .and_then(|p| p.get(self.depth))
                    .is_some_and(&test)
            })
            .fold(0, |m, i| m | (1 << i))
    }
}

impl<'de> Visitor<'de> for Walk<'_, '_, 'de> {
    type Value = ();

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("any JSON value")
    }

    fn visit_bool<E>(self, _: bool) -> Result<(), E> {
        Ok(())
    }
    fn visit_i64<E>(self, _: i64) -> Result<(), E> {
        Ok(())
    }
    fn visit_u64<E>(self, _: u64) -> Result<(), E> {
        Ok(())
    }
    fn visit_f64<E>(self, _: f64) -> Result<(), E> {
        Ok(())
    }
    fn visit_str<E>(self, _: &str) -> Result<(), E> {
        Ok(())
    }
    fn visit_unit<E>(self) -> Result<(), E> {
        Ok(())
    }

    fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<(), A::Error> {
        while let Some(mask) = map.next_key_seed(KeyMatch(&self))? {
            if mask == 0 {
                map.next_value::<IgnoredAny>()?;
            } else {
                // A repeated key replaces the earlier member, as in a parsed document.
                for i in bits(mask) {
                    self.out[i] = None;
                }
                map.next_value_seed(Walk {
                    paths: self.paths,
                    active: mask,
                    depth: self.depth + 1,
                    out: &mut *self.out,
                })?;
            }
        }
        Ok(())
    }

    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<(), A::Error> {
        let mut index = 0usize;
        loop {
            let mask = self.next_mask(|t| t.index == Some(index));
            let more = if mask == 0 {
                seq.next_element::<IgnoredAny>()?.is_some()
            } else {
                seq.next_element_seed(Walk {
                    paths: self.paths,
                    active: mask,
                    depth: self.depth + 1,
                    out: &mut *self.out,
                })?
                .is_some()
            };
            if !more {
                return Ok(());
            }
            index += 1;
        }
    }
}

/// Reads an object key and returns the fields whose pointer continues through it, without allocating.
struct KeyMatch<'w, 'p, 's, 'de>(&'w Walk<'p, 's, 'de>);

impl<'de> DeserializeSeed<'de> for KeyMatch<'_, '_, '_, '_> {
    type Value = u8;

    fn deserialize<D: de::Deserializer<'de>>(self, d: D) -> Result<u8, D::Error> {
        d.deserialize_str(self)
    }
}

impl Visitor<'_> for KeyMatch<'_, '_, '_, '_> {
    type Value = u8;

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("an object key")
    }

    fn visit_str<E>(self, key: &str) -> Result<u8, E> {
        Ok(self.0.next_mask(|t| t.key == key))
    }
}

struct LeafVisitor;

impl<'de> Visitor<'de> for LeafVisitor {
    type Value = Leaf<'de>;

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("any JSON value")
    }

    fn visit_bool<E>(self, b: bool) -> Result<Leaf<'de>, E> {
        Ok(Leaf::Bool(b))
    }
    fn visit_i64<E>(self, x: i64) -> Result<Leaf<'de>, E> {
        Ok(Leaf::Number(x as f64))
    }
    fn visit_u64<E>(self, x: u64) -> Result<Leaf<'de>, E> {
        Ok(Leaf::Number(x as f64))
    }
    fn visit_f64<E>(self, x: f64) -> Result<Leaf<'de>, E> {
        Ok(Leaf::Number(x))
    }
    fn visit_borrowed_str<E>(self, s: &'de str) -> Result<Leaf<'de>, E> {
        Ok(Leaf::Str(Cow::Borrowed(s)))
    }
    fn visit_str<E>(self, s: &str) -> Result<Leaf<'de>, E> {
        Ok(Leaf::Str(Cow::Owned(s.to_string())))
    }
    fn visit_string<E>(self, s: String) -> Result<Leaf<'de>, E> {
        Ok(Leaf::Str(Cow::Owned(s)))
    }
    fn visit_unit<E>(self) -> Result<Leaf<'de>, E> {
        Ok(Leaf::Null)
    }
    fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Leaf<'de>, A::Error> {
        while map.next_entry::<IgnoredAny, IgnoredAny>()?.is_some() {}
        Ok(Leaf::Composite)
    }
    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Leaf<'de>, A::Error> {
        while seq.next_element::<IgnoredAny>()?.is_some() {}
        Ok(Leaf::Composite)
    }
}

/// Finds the configured fields of a JSON text in one pass; the whole text must be one valid JSON value.
fn extract<'de>(text: &'de str, paths: &[Option<Vec<Token>>; 3]) -> Result<Slots<'de>, Reject> {
    let mut out: Slots<'de> = [None, None, None];
    let active = (0..3)
        .filter(|&i| paths[i].is_some())
        .fold(0, |m, i| m | (1 << i));
    let mut de = serde_json::Deserializer::from_str(text);
    Walk {
        paths,
        active,
        depth: 0,
        out: &mut out,
    }
    .deserialize(&mut de)
    .and_then(|()| de.end())
    .map_err(|_| Reject::NotJson)?;
    Ok(out)
}

/// A number written as text: Ok(None) for NaN, Err(NonFinite) for infinities, Err(NotNumber) otherwise.
fn number_text(text: &str) -> Result<Option<f64>, Reject> {
    match text.trim().parse::<f64>() {
        Ok(x) if x.is_finite() => Ok(Some(x)),
        Ok(x) if x.is_nan() => Ok(None),
        Ok(_) => Err(Reject::NonFinite),
        Err(_) => Err(Reject::NotNumber),
    }
}

fn rfc3339(text: &str) -> Result<f64, Reject> {
    let dt = chrono::DateTime::parse_from_rfc3339(text.trim()).map_err(|_| Reject::BadTime)?;
    // Same arithmetic as `history`, so `replay` and the daemon see identical times.
    Ok(dt.timestamp() as f64 + f64::from(dt.timestamp_subsec_nanos()) * 1e-9)
}

fn epoch_auto(x: f64) -> f64 {
    if x.abs() > EPOCH_MS_THRESHOLD {
        x / 1000.0
    } else {
        x
    }
}

fn time_of(leaf: Option<&Leaf<'_>>, format: TimeFormat) -> Result<f64, Reject> {
    let numeric = |s: &str| match number_text(s) {
        Ok(Some(x)) => Ok(x),
        _ => Err(Reject::BadTime),
    };
    match (leaf, format) {
        (None | Some(Leaf::Null), _) => Err(Reject::MissingField("time")),
        (Some(Leaf::Bool(_) | Leaf::Composite), _)
        | (Some(Leaf::Number(_)), TimeFormat::Rfc3339) => Err(Reject::WrongType("time")),
        (Some(Leaf::Number(x)), TimeFormat::Seconds) => Ok(*x),
        (Some(Leaf::Number(x)), TimeFormat::Milliseconds) => Ok(x / 1000.0),
        (Some(Leaf::Number(x)), TimeFormat::Auto) => Ok(epoch_auto(*x)),
        (Some(Leaf::Str(s)), TimeFormat::Seconds) => numeric(s),
        (Some(Leaf::Str(s)), TimeFormat::Milliseconds) => numeric(s).map(|x| x / 1000.0),
        (Some(Leaf::Str(s)), TimeFormat::Rfc3339) => rfc3339(s),
        (Some(Leaf::Str(s)), TimeFormat::Auto) => match number_text(s) {
            Ok(Some(x)) => Ok(epoch_auto(x)),
            Ok(None) | Err(Reject::NonFinite) => Err(Reject::BadTime),
            Err(_) => rfc3339(s),
        },
    }
}

fn is_good(leaf: &Leaf<'_>, good: &[Good]) -> bool {
    good.iter().any(|g| match (g, leaf) {
        (Good::Null, Leaf::Null) => true,
        (Good::Bool(a), Leaf::Bool(b)) => a == b,
        (Good::Number(a), Leaf::Number(b)) => a == b,
        (Good::Str(a), Leaf::Str(b)) => a == b,
        _ => false,
    })
}

/// What a payload says, before the channel is known.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Reading {
    /// Seconds since the epoch (or the payload's own origin).
    pub time: f64,
    /// None for a missing sample (null, NaN or bad quality).
    pub value: Option<f64>,
    /// The time came from the payload, not the receive time.
    pub time_from_payload: bool,
    /// The value was discarded because the quality field was not good.
    pub bad_quality: bool,
}

/// One sample for one channel, ready for `channel::Channel::on_sample(time, value)`.
#[derive(Debug, Clone, PartialEq)]
pub struct Sample {
    pub channel: String,
    pub time: f64,
    pub value: Option<f64>,
    pub time_from_payload: bool,
    pub bad_quality: bool,
}

// ---------------------------------------------------------------------------------------------------------------
// Rules and routing

/// One configured input: which topics, how they name their channel, how their payloads read.
#[derive(Debug, Clone, PartialEq)]
pub struct InputRule {
    filter: TopicFilter,
    template: ChannelTemplate,
    format: PayloadFormat,
    decoder: Decoder,
    max_payload_bytes: usize,
    qos: u8,
}

impl InputRule {
    /// Checks everything that can be checked before a message arrives. QoS defaults to 1 (see [`Self::with_qos`]).
    pub fn new(
        filter: &str,
        channel: &str,
        format: PayloadFormat,
        max_payload_bytes: usize,
    ) -> Result<Self, IngestConfigError> {
        let filter = TopicFilter::parse(filter)?;
        let template = ChannelTemplate::parse(channel)?;
        let (levels, open) = filter.shape();
        if let Some(index) = template.max_level() {
            if !open && index >= levels {
                return Err(IngestConfigError::LevelOutOfRange {
                    template: channel.to_string(),
                    filter: filter.match_part().to_string(),
                    index,
                    levels,
                });
            }
        }
        if max_payload_bytes == 0 || max_payload_bytes > MAX_PAYLOAD_LIMIT {
            return Err(IngestConfigError::PayloadLimit(max_payload_bytes));
        }
        let decoder = Decoder::new(&format)?;
        Ok(Self {
            filter,
            template,
            format,
            decoder,
            max_payload_bytes,
            qos: 1,
        })
    }

    /// The QoS to subscribe with.
    pub fn with_qos(mut self, qos: u8) -> Result<Self, IngestConfigError> {
        if qos > 2 {
            return Err(IngestConfigError::Qos(qos));
        }
        self.qos = qos;
        Ok(self)
    }

    pub fn filter(&self) -> &TopicFilter {
        &self.filter
    }

    pub fn template(&self) -> &ChannelTemplate {
        &self.template
    }

    pub fn format(&self) -> &PayloadFormat {
        &self.format
    }

    pub fn max_payload_bytes(&self) -> usize {
        self.max_payload_bytes
    }

    pub fn qos(&self) -> u8 {
        self.qos
    }

    /// Reads a payload received at `received` (epoch seconds) under this rule.
    pub fn read(&self, payload: &[u8], received: f64) -> Result<Reading, Reject> {
        if payload.len() > self.max_payload_bytes {
            return Err(Reject::TooLarge {
                bytes: payload.len(),
                limit: self.max_payload_bytes,
            });
        }
        let text = std::str::from_utf8(payload).map_err(|_| Reject::NotUtf8)?;
        match &self.decoder {
            Decoder::Number => {
                let t = text.trim();
                let value = if t.is_empty() || t.eq_ignore_ascii_case("null") {
                    None
                } else {
                    number_text(t)?
                };
                Ok(Reading {
                    time: received,
                    value,
                    time_from_payload: false,
                    bad_quality: false,
                })
            }
            Decoder::Json {
                paths,
                time_format,
                good,
            } => {
                let slots = extract(text, paths)?;
                let bad_quality = paths[QUALITY].is_some()
                    && !good.is_empty()
                    && slots[QUALITY].as_ref().is_some_and(|q| !is_good(q, good));
                let value = if bad_quality {
                    None
                } else {
                    match &slots[VALUE] {
                        None => return Err(Reject::MissingField("value")),
                        Some(Leaf::Null) => None,
                        Some(Leaf::Number(x)) => Some(*x),
                        Some(Leaf::Str(s)) => match number_text(s)? {
                            Some(x) => Some(x),
                            None => return Err(Reject::NonFinite),
                        },
                        Some(Leaf::Bool(_) | Leaf::Composite) => {
                            return Err(Reject::WrongType("value"))
                        }
                    }
                };
                let (time, time_from_payload) = match paths[TIME] {
                    None => (received, false),
                    Some(_) => {
                        let t = time_of(slots[TIME].as_ref(), *time_format)?;
                        if !(t >= 0.0 && t.is_finite()) {
                            return Err(Reject::BadTime);
                        }
                        if t > received + MAX_FUTURE_S {
                            return Err(Reject::FutureTime);
                        }
                        (t, true)
                    }
                };
                Ok(Reading {
                    time,
                    value,
                    time_from_payload,
                    bad_quality,
                })
            }
        }
    }
}

/// The rule and channel a topic resolves to.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Resolved {
    /// Index into [`Router::rules`].
    pub rule: usize,
    pub channel: String,
}

/// All inputs, tried in order.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Router {
    rules: Vec<InputRule>,
}

impl Router {
    pub fn new(rules: Vec<InputRule>) -> Self {
        Self { rules }
    }

    pub fn rules(&self) -> &[InputRule] {
        &self.rules
    }

    /// The first rule whose filter matches, and the channel its template names.
    pub fn resolve(&self, topic: &str) -> Result<Resolved, Reject> {
        if !valid_topic_name(topic) {
            return Err(Reject::NoRule);
        }
        let (rule, captures) = self
            .rules
            .iter()
            .enumerate()
            .find_map(|(i, r)| r.filter.matches_valid(topic).map(|c| (i, c)))
            .ok_or(Reject::NoRule)?;
        let channel = self.rules[rule]
            .template
            .render(&captures)
            .ok_or(Reject::NoChannel)?;
        Ok(Resolved { rule, channel })
    }

    /// The channel a topic feeds, if any: for counting a rejected message against its channel.
    pub fn channel_for(&self, topic: &str) -> Option<String> {
        self.resolve(topic).ok().map(|r| r.channel)
    }

    /// One message to one sample, or the reason there is none.
    pub fn route(&self, topic: &str, payload: &[u8], received: f64) -> Result<Sample, Reject> {
        let Resolved { rule, channel } = self.resolve(topic)?;
        let r = self.rules[rule].read(payload, received)?;
        Ok(Sample {
            channel,
            time: r.time,
            value: r.value,
            time_from_payload: r.time_from_payload,
            bad_quality: r.bad_quality,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;
    use serde_json::json;

    const NOW: f64 = 1_772_409_600.0; // 2026-03-02T00:00:00Z

    fn json_format(
        time: Option<&str>,
        quality: Option<&str>,
        good: Vec<serde_json::Value>,
    ) -> PayloadFormat {
        PayloadFormat::Json {
            value: "/v".to_string(),
            time: time.map(str::to_string),
            time_format: TimeFormat::Auto,
            quality: quality.map(str::to_string),
            good_quality: good,
        }
    }

    fn number_rule() -> InputRule {
        InputRule::new(
            "brackenfield/+/+/value",
            "{1}-{2}",
            PayloadFormat::Number,
            1024,
        )
        .unwrap()
    }

    fn json_rule() -> InputRule {
        InputRule::new(
            "bw/json/#",
            "{2}",
            json_format(Some("/t"), Some("/q"), vec![json!(192), json!("good")]),
            256,
        )
        .unwrap()
    }

    fn read(rule: &InputRule, payload: &str) -> Result<Reading, Reject> {
        rule.read(payload.as_bytes(), NOW)
    }

    #[test]
    fn filter_matching_follows_mqtt() {
        let m = |f: &str, t: &str| TopicFilter::parse(f).unwrap().matches(t).is_some();
        assert!(m("sport/tennis/player1/#", "sport/tennis/player1"));
        assert!(m("sport/tennis/player1/#", "sport/tennis/player1/ranking"));
        assert!(m("sport/#", "sport"));
        assert!(m("#", "a/b/c"));
        assert!(m("+/+", "/finance"));
        assert!(m("/+", "/finance"));
        assert!(!m("+", "/finance"));
        assert!(m("a//b", "a//b"));
        assert!(!m("sport/+", "sport"));
        assert!(m("sport/+", "sport/"));
        assert!(!m("#", "$SYS/broker"));
        assert!(!m("+/monitor", "$SYS/monitor"));
        assert!(m("$SYS/#", "$SYS/broker"));
        assert!(m("$SYS/+", "$SYS/x"));
        assert!(m("$share/g/plant/+", "plant/TT-101"));
        assert!(!m("a/b", "a/b/c"));
        assert!(!m("a/b/c", "a/b"));
        // Not valid topic names.
        assert!(!m("#", ""));
        assert!(!m("#", "a/+"));
        assert!(!m("#", "a/#"));
        assert!(!m("#", "a\0b"));
    }

    #[test]
    fn bad_filters_are_refused() {
        for f in [
            "",
            "a/#/b",
            "a#",
            "a/b+",
            "+a",
            "a\0",
            "$share/g",
            "$share//a",
            "$share/g/",
            "$share/+/a",
        ] {
            assert!(TopicFilter::parse(f).is_err(), "{f:?}");
        }
        let f = TopicFilter::parse("$share/grp/plant/#").unwrap();
        assert_eq!(f.as_str(), "$share/grp/plant/#");
        assert_eq!(f.match_part(), "plant/#");
    }

    #[test]
    fn templates_render_topic_levels() {
        let t = |s: &str, topic: &str| {
            ChannelTemplate::parse(s)
                .unwrap()
                .render(&Captures::from_topic(topic))
        };
        assert_eq!(t("{2}", "bw/area1/TT-101"), Some("TT-101".into()));
        assert_eq!(t("{1}-{2}", "bw/area1/TT-101"), Some("area1-TT-101".into()));
        assert_eq!(
            t("{topic}", "bw/area1/TT-101"),
            Some("bw/area1/TT-101".into())
        );
        assert_eq!(t("x{{{0}}}", "bw/a"), Some("x{bw}".into()));
        assert_eq!(t("{3}", "bw/a"), None);
        assert_eq!(t("{1}", "bw//c"), None, "an empty name");
        assert_eq!(t("TT-{1}", "bw//c"), Some("TT-".into()));
        assert_eq!(t("{0}", &"x".repeat(257)), None, "too long");
        assert_eq!(t("{0}", &"x".repeat(256)), Some("x".repeat(256)));
        for bad in [
            "", "{", "}", "{x}", "{-1}", "{+1}", "{ 1}", "a{1", "a+b", "{1}#", "{1{2}}",
        ] {
            assert!(ChannelTemplate::parse(bad).is_err(), "{bad:?}");
        }
    }

    #[test]
    fn rule_checks_template_levels_against_the_filter() {
        let e = InputRule::new("bw/+/+", "{3}", PayloadFormat::Number, 10).unwrap_err();
        assert!(
            matches!(
                e,
                IngestConfigError::LevelOutOfRange {
                    index: 3,
                    levels: 3,
                    ..
                }
            ),
            "{e}"
        );
        assert!(InputRule::new("bw/+/#", "{7}", PayloadFormat::Number, 10).is_ok());
        assert!(InputRule::new("$share/g/bw/+", "{1}", PayloadFormat::Number, 10).is_ok());
        assert!(InputRule::new("bw/+", "{1}", PayloadFormat::Number, 0).is_err());
        assert!(number_rule().with_qos(3).is_err());
        assert_eq!(number_rule().with_qos(0).unwrap().qos(), 0);
    }

    #[test]
    fn pointers_are_checked() {
        let fmt = |v: &str, t: Option<&str>| PayloadFormat::Json {
            value: v.to_string(),
            time: t.map(str::to_string),
            time_format: TimeFormat::Auto,
            quality: None,
            good_quality: vec![],
        };
        assert!(InputRule::new("a", "x", fmt("v", None), 10).is_err());
        assert!(InputRule::new("a", "x", fmt("/v~2", None), 10).is_err());
        assert!(InputRule::new("a", "x", fmt("/v", Some("/v")), 10).is_err());
        assert!(InputRule::new("a", "x", fmt("/d", Some("/d/t")), 10).is_err());
        assert!(InputRule::new("a", "x", fmt("", Some("/t")), 10).is_err());
        assert!(InputRule::new("a", "x", fmt("/d/v", Some("/d/t")), 10).is_ok());
        let mut f = json_format(None, Some("/q"), vec![json!({"a": 1})]);
        assert!(InputRule::new("a", "x", f.clone(), 10).is_err());
        if let PayloadFormat::Json { good_quality, .. } = &mut f {
            *good_quality = vec![json!(null), json!(true), json!(0), json!("ok")];
        }
        assert!(InputRule::new("a", "x", f, 10).is_ok());
    }

    #[test]
    fn plain_numbers() {
        let r = number_rule();
        let v = |p: &str| read(&r, p).map(|x| x.value);
        assert_eq!(v("72.5"), Ok(Some(72.5)));
        assert_eq!(v(" -1e3\r\n"), Ok(Some(-1000.0)));
        assert_eq!(v(""), Ok(None));
        assert_eq!(v("null"), Ok(None));
        assert_eq!(v("NaN"), Ok(None));
        assert_eq!(v("inf"), Err(Reject::NonFinite));
        assert_eq!(v("1e400"), Err(Reject::NonFinite));
        assert_eq!(v("12,5"), Err(Reject::NotNumber));
        assert_eq!(v("{\"v\":1}"), Err(Reject::NotNumber));
        assert_eq!(r.read(&[0xff, 0x31], NOW), Err(Reject::NotUtf8));
        let x = read(&r, "1").unwrap();
        assert_eq!((x.time, x.time_from_payload), (NOW, false));
    }

    #[test]
    fn json_values() {
        let r = json_rule();
        let v = |p: &str| read(&r, p).map(|x| x.value);
        assert_eq!(v(r#"{"v":72.5,"t":1772409600}"#), Ok(Some(72.5)));
        assert_eq!(v(r#"{"t":1772409600,"v":-3}"#), Ok(Some(-3.0)));
        assert_eq!(v(r#"{"v":null,"t":1772409600}"#), Ok(None));
        assert_eq!(v(r#"{"v":" 72.5","t":1772409600}"#), Ok(Some(72.5)));
        assert_eq!(v(r#"{"v":"NaN","t":1772409600}"#), Err(Reject::NonFinite));
        assert_eq!(
            v(r#"{"v":"-Infinity","t":1772409600}"#),
            Err(Reject::NonFinite)
        );
        assert_eq!(v(r#"{"v":"off","t":1772409600}"#), Err(Reject::NotNumber));
        assert_eq!(
            v(r#"{"v":true,"t":1772409600}"#),
            Err(Reject::WrongType("value"))
        );
        assert_eq!(
            v(r#"{"v":[1],"t":1772409600}"#),
            Err(Reject::WrongType("value"))
        );
        assert_eq!(
            v(r#"{"v":{"x":1},"t":1772409600}"#),
            Err(Reject::WrongType("value"))
        );
        assert_eq!(v(r#"{"t":1772409600}"#), Err(Reject::MissingField("value")));
        assert_eq!(v(r#"{"v":1}"#), Err(Reject::MissingField("time")));
        assert_eq!(v(r#"{"v":1,"t":null}"#), Err(Reject::MissingField("time")));
        assert_eq!(v(r#"{"v":1,"t":1772409600} x"#), Err(Reject::NotJson));
        assert_eq!(v(r#"{"v":1,"t":1772409600"#), Err(Reject::NotJson));
        assert_eq!(v(r#"{"v":1e999,"t":1772409600}"#), Err(Reject::NotJson));
        assert_eq!(v("72.5"), Err(Reject::MissingField("value")));
        // A repeated key: the last one counts, as in a parsed document.
        assert_eq!(v(r#"{"v":1,"v":2,"t":1772409600}"#), Ok(Some(2.0)));
        // Escaped keys and strings.
        assert_eq!(
            v(r#"{"\u0076":"7\u0032","t":"1772409600"}"#),
            Ok(Some(72.0))
        );
        let big = format!(r#"{{"v":1,"t":1772409600,"pad":"{}"}}"#, "x".repeat(300));
        assert_eq!(
            v(&big),
            Err(Reject::TooLarge {
                bytes: big.len(),
                limit: 256
            })
        );
    }

    #[test]
    fn json_times() {
        let r = json_rule();
        let t = |p: &str| {
            read(&r, &format!(r#"{{"v":1,"t":{p}}}"#)).map(|x| (x.time, x.time_from_payload))
        };
        assert_eq!(t("1772409600.5"), Ok((1772409600.5, true)));
        assert_eq!(t("1772409600500"), Ok((1772409600.5, true)));
        assert_eq!(t(r#""2026-03-02T00:00:00.5Z""#), Ok((1772409600.5, true)));
        assert_eq!(t(r#""2026-03-02T01:00:00+01:00""#), Ok((NOW, true)));
        assert_eq!(t(r#""1772409600""#), Ok((NOW, true)));
        assert_eq!(t("10"), Ok((10.0, true)), "old times are accepted");
        assert_eq!(t("-1"), Err(Reject::BadTime));
        assert_eq!(t(r#""2026-03-02 00:00:00""#), Err(Reject::BadTime));
        assert_eq!(t(r#""nan""#), Err(Reject::BadTime));
        assert_eq!(t(r#""yesterday""#), Err(Reject::BadTime));
        assert_eq!(t("true"), Err(Reject::WrongType("time")));
        assert_eq!(t("[1]"), Err(Reject::WrongType("time")));
        assert_eq!(
            t(&format!("{}", NOW + MAX_FUTURE_S)),
            Ok((NOW + MAX_FUTURE_S, true))
        );
        assert_eq!(
            t(&format!("{}", NOW + MAX_FUTURE_S + 1.0)),
            Err(Reject::FutureTime)
        );
        assert_eq!(t(r#""9999-12-31T23:59:59Z""#), Err(Reject::FutureTime));

        let with = |tf: TimeFormat, p: &str| {
            let rule = InputRule::new(
                "a",
                "x",
                PayloadFormat::Json {
                    value: "/v".into(),
                    time: Some("/t".into()),
                    time_format: tf,
                    quality: None,
                    good_quality: vec![],
                },
                100,
            )
            .unwrap();
            read(&rule, &format!(r#"{{"v":1,"t":{p}}}"#)).map(|x| x.time)
        };
        assert_eq!(with(TimeFormat::Seconds, "100"), Ok(100.0));
        assert_eq!(with(TimeFormat::Seconds, r#""100""#), Ok(100.0));
        assert_eq!(with(TimeFormat::Milliseconds, "100"), Ok(0.1));
        assert_eq!(
            with(TimeFormat::Milliseconds, r#""1772409600000""#),
            Ok(NOW)
        );
        assert_eq!(
            with(TimeFormat::Rfc3339, "100"),
            Err(Reject::WrongType("time"))
        );
        assert_eq!(
            with(TimeFormat::Rfc3339, r#""2026-03-02T00:00:00Z""#),
            Ok(NOW)
        );
        assert_eq!(
            with(TimeFormat::Seconds, r#""2026-03-02T00:00:00Z""#),
            Err(Reject::BadTime)
        );
    }

    #[test]
    fn quality() {
        let r = json_rule();
        let q = |p: &str| {
            read(&r, &format!(r#"{{"v":1,"t":1772409600,"q":{p}}}"#))
                .map(|x| (x.value, x.bad_quality))
        };
        assert_eq!(q("192"), Ok((Some(1.0), false)));
        assert_eq!(q("192.0"), Ok((Some(1.0), false)));
        assert_eq!(q(r#""good""#), Ok((Some(1.0), false)));
        assert_eq!(q(r#""GOOD""#), Ok((None, true)));
        assert_eq!(q("0"), Ok((None, true)));
        assert_eq!(q("null"), Ok((None, true)));
        assert_eq!(q("{}"), Ok((None, true)));
        // Absent quality is no evidence of a fault.
        assert_eq!(
            read(&r, r#"{"v":1,"t":1772409600}"#).map(|x| x.value),
            Ok(Some(1.0))
        );
        // Bad quality overrides a garbage value, but not a bad time.
        assert_eq!(
            read(&r, r#"{"v":"NaN","t":1772409600,"q":8}"#).map(|x| x.value),
            Ok(None)
        );
        assert_eq!(
            read(&r, r#"{"q":8,"t":1772409600}"#).map(|x| x.value),
            Ok(None)
        );
        assert_eq!(
            read(&r, r#"{"v":1,"q":8}"#),
            Err(Reject::MissingField("time"))
        );
        // An empty list of good values switches the check off.
        let open = InputRule::new("a", "x", json_format(None, Some("/q"), vec![]), 100).unwrap();
        assert_eq!(
            read(&open, r#"{"v":1,"q":0}"#).map(|x| x.value),
            Ok(Some(1.0))
        );
    }

    #[test]
    fn nested_pointers_and_arrays() {
        let rule = InputRule::new(
            "a",
            "x",
            PayloadFormat::Json {
                value: "/data/1/v".into(),
                time: Some("/meta/a~1b/t~0".into()),
                time_format: TimeFormat::Seconds,
                quality: None,
                good_quality: vec![],
            },
            1000,
        )
        .unwrap();
        let p = r#"{"data":[{"v":1},{"v":2.25}],"meta":{"a/b":{"t~":5}},"x":[[[{}]]]}"#;
        assert_eq!(
            read(&rule, p).map(|x| (x.time, x.value)),
            Ok((5.0, Some(2.25)))
        );
        let p = r#"{"data":{"1":{"v":3}},"meta":{"a/b":{"t~":5}}}"#;
        assert_eq!(read(&rule, p).map(|x| x.value), Ok(Some(3.0)));
        let p = r#"{"data":[{"v":1}],"meta":{"a/b":{"t~":5}}}"#;
        assert_eq!(read(&rule, p), Err(Reject::MissingField("value")));
        // The whole document as the value.
        let whole = InputRule::new("a", "x", json_format(None, None, vec![]), 100);
        assert!(whole.is_ok());
        let root = InputRule::new(
            "a",
            "x",
            PayloadFormat::Json {
                value: String::new(),
                time: None,
                time_format: TimeFormat::Auto,
                quality: None,
                good_quality: vec![],
            },
            100,
        )
        .unwrap();
        assert_eq!(read(&root, " 4.5 ").map(|x| x.value), Ok(Some(4.5)));
        assert_eq!(read(&root, "null").map(|x| x.value), Ok(None));
    }

    #[test]
    fn deep_nesting_is_refused_not_a_crash() {
        // Skipped and captured members are walked by serde_json without recursion; the walk itself only descends
        // as deep as the longest pointer.
        let r = InputRule::new("a", "x", json_rule().format().clone(), 1 << 20).unwrap();
        let deep = "[".repeat(100_000) + &"]".repeat(100_000);
        assert_eq!(read(&r, &deep), Err(Reject::MissingField("value")));
        let deep_value = format!(
            "{{\"v\":{}1{}}}",
            "{\"a\":".repeat(50_000),
            "}".repeat(50_000)
        );
        assert_eq!(read(&r, &deep_value), Err(Reject::WrongType("value")));
        let unclosed = "{\"v\":".to_string() + &"[".repeat(100_000);
        assert_eq!(read(&r, &unclosed), Err(Reject::NotJson));
    }

    #[test]
    fn router_picks_the_first_matching_rule() {
        let router = Router::new(vec![
            number_rule(),
            json_rule(),
            InputRule::new("bw/#", "other-{1}", PayloadFormat::Number, 64).unwrap(),
        ]);
        let s = router
            .route("brackenfield/area1/TT-101/value", b"71.5", NOW)
            .unwrap();
        assert_eq!(
            s,
            Sample {
                channel: "area1-TT-101".into(),
                time: NOW,
                value: Some(71.5),
                time_from_payload: false,
                bad_quality: false,
            }
        );
        let s = router
            .route("bw/json/FT-201", br#"{"v":3,"t":1772409590}"#, NOW)
            .unwrap();
        assert_eq!(
            (s.channel.as_str(), s.time, s.value),
            ("FT-201", NOW - 10.0, Some(3.0))
        );
        assert_eq!(router.route("bw/x", b"1", NOW).unwrap().channel, "other-x");
        assert_eq!(router.route("bw", b"1", NOW), Err(Reject::NoChannel));
        assert_eq!(router.route("elsewhere/x", b"1", NOW), Err(Reject::NoRule));
        assert_eq!(router.route("bw/+", b"1", NOW), Err(Reject::NoRule));
        assert_eq!(router.channel_for("bw/json/LT-301"), Some("LT-301".into()));
        assert_eq!(router.resolve("bw/json/LT-301").unwrap().rule, 1);
    }

    #[test]
    fn every_reason_is_reachable_and_labelled() {
        let router = Router::new(vec![
            number_rule(),
            json_rule(),
            InputRule::new("bw/#", "{1}", PayloadFormat::Number, 64).unwrap(),
        ]);
        let n = "brackenfield/a/b/value";
        let j = "bw/json/x";
        let cases: [(&str, &[u8], Reject); 11] = [
            (
                n,
                &[b'1'; 2000],
                Reject::TooLarge {
                    bytes: 2000,
                    limit: 1024,
                },
            ),
            (n, b"\xc3\x28", Reject::NotUtf8),
            (n, b"seven", Reject::NotNumber),
            (j, b"{", Reject::NotJson),
            (j, br#"{"t":1}"#, Reject::MissingField("value")),
            (j, br#"{"v":false,"t":1}"#, Reject::WrongType("value")),
            (j, br#"{"v":"inf","t":1}"#, Reject::NonFinite),
            (j, br#"{"v":1,"t":-5}"#, Reject::BadTime),
            (j, br#"{"v":1,"t":99999999999}"#, Reject::FutureTime),
            ("nowhere", b"1", Reject::NoRule),
            ("bw", b"1", Reject::NoChannel),
        ];
        let mut seen = [false; 11];
        for (topic, payload, want) in cases {
            let got = router.route(topic, payload, NOW).unwrap_err();
            assert_eq!(got, want);
            assert_eq!(Reject::REASONS[got.index()], got.reason());
            assert!(!got.to_string().is_empty());
            seen[got.index()] = true;
        }
        assert!(seen.iter().all(|&s| s));
        let mut labels = Reject::REASONS.to_vec();
        labels.sort_unstable();
        labels.dedup();
        assert_eq!(labels.len(), Reject::REASONS.len());
    }

    #[test]
    fn time_format_names() {
        for name in TimeFormat::NAMES {
            let f = TimeFormat::parse(name).unwrap();
            assert_eq!(f.as_str(), name);
            let via_serde: TimeFormat = serde_json::from_value(json!(name)).unwrap();
            assert_eq!(via_serde, f);
        }
        assert_eq!(TimeFormat::parse("epoch"), None);
    }

    // ---- properties

    /// Matching by the textbook recursion over levels, to compare with.
    fn reference_match(filter: &[&str], topic: &[&str], first: bool) -> bool {
        match (filter.first(), topic.first()) {
            (Some(&"#"), _) => !(first && topic[0].starts_with('$')),
            (Some(&"+"), Some(t)) => {
                !(first && t.starts_with('$')) && reference_match(&filter[1..], &topic[1..], false)
            }
            (Some(f), Some(t)) => f == t && reference_match(&filter[1..], &topic[1..], false),
            (None, None) => true,
            _ => false,
        }
    }

    fn level() -> impl Strategy<Value = &'static str> {
        prop::sample::select(vec!["a", "b", "", "$s", "ab"])
    }

    fn filter_levels() -> impl Strategy<Value = Vec<&'static str>> {
        (
            prop::collection::vec(prop::sample::select(vec!["a", "b", "", "$s", "+"]), 1..5),
            any::<bool>(),
        )
            .prop_map(|(mut v, hash)| {
                if hash {
                    v.push("#");
                }
                v
            })
    }

    /// Arbitrary JSON with keys that collide with pointer tokens.
    fn json_value() -> impl Strategy<Value = serde_json::Value> {
        let key = prop::sample::select(vec!["a", "b", "0", "1", "~", "/", "", "01"])
            .prop_map(str::to_string);
        let leaf = prop_oneof![
            Just(serde_json::Value::Null),
            any::<bool>().prop_map(serde_json::Value::Bool),
            any::<i32>().prop_map(|x| json!(x)),
            (-1e6f64..1e6).prop_map(|x| json!(x)),
            prop::sample::select(vec!["72.5", "x", "NaN", "", "2026-03-02T00:00:00Z"])
                .prop_map(|s| json!(s)),
        ];
        leaf.prop_recursive(4, 40, 5, move |inner| {
            prop_oneof![
                prop::collection::vec(inner.clone(), 0..4).prop_map(serde_json::Value::Array),
                prop::collection::vec((key.clone(), inner), 0..4)
                    .prop_map(|kv| serde_json::Value::Object(kv.into_iter().collect())),
            ]
        })
    }

    fn pointer() -> impl Strategy<Value = String> {
        prop::collection::vec(
            prop::sample::select(vec!["a", "b", "0", "1", "~0", "~1", "", "01"]),
            0..4,
        )
        .prop_map(|tokens| tokens.iter().map(|t| format!("/{t}")).collect())
    }

    fn leaf_of(v: &serde_json::Value) -> Leaf<'_> {
        match v {
            serde_json::Value::Null => Leaf::Null,
            serde_json::Value::Bool(b) => Leaf::Bool(*b),
            serde_json::Value::Number(n) => Leaf::Number(n.as_f64().unwrap()),
            serde_json::Value::String(s) => Leaf::Str(Cow::Borrowed(s)),
            _ => Leaf::Composite,
        }
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(2000))]

        #[test]
        fn filter_matching_agrees_with_reference(f in filter_levels(), t in prop::collection::vec(level(), 1..6)) {
            let text = f.join("/");
            prop_assume!(!text.is_empty());
            let filter = TopicFilter::parse(&text).unwrap();
            let topic = t.join("/");
            // An empty topic is not a valid topic name, so nothing matches it.
            let expected = !topic.is_empty() && reference_match(&f, &t, true);
            prop_assert_eq!(filter.matches(&topic).is_some(), expected);
        }

        #[test]
        fn extraction_agrees_with_a_parsed_document(doc in json_value(), p in pointer()) {
            let text = doc.to_string();
            let paths = [Some(parse_pointer("value", &p).unwrap()), None, None];
            let slots = extract(&text, &paths).unwrap();
            prop_assert_eq!(slots[VALUE].clone(), doc.pointer(&p).map(leaf_of));
        }

        #[test]
        fn three_fields_found_in_one_pass(doc in json_value(), a in pointer(), b in pointer(), c in pointer()) {
            let format = PayloadFormat::Json {
                value: a.clone(),
                time: Some(b.clone()),
                time_format: TimeFormat::Auto,
                quality: Some(c.clone()),
                good_quality: vec![],
            };
            if let Ok(Decoder::Json { paths, .. }) = Decoder::new(&format) {
                let text = doc.to_string();
                let slots = extract(&text, &paths).unwrap();
                for (slot, p) in [a, b, c].iter().enumerate() {
                    prop_assert_eq!(slots[slot].clone(), doc.pointer(p).map(leaf_of));
                }
            }
        }

        #[test]
        fn templates_round_trip(parts in prop::collection::vec(prop_oneof![
            "[a-z{}/ -]{1,6}".prop_map(TemplatePieceOwned::Literal),
            (0usize..20).prop_map(TemplatePieceOwned::Level),
            Just(TemplatePieceOwned::Topic),
        ], 1..6)) {
            let mut text = String::new();
            for p in &parts {
                match p {
                    TemplatePieceOwned::Literal(s) => text.push_str(&s.replace('{', "{{").replace('}', "}}")),
                    TemplatePieceOwned::Level(i) => text.push_str(&format!("{{{i}}}")),
                    TemplatePieceOwned::Topic => text.push_str("{topic}"),
                }
            }
            let t = ChannelTemplate::parse(&text).unwrap();
            prop_assert_eq!(t.to_string(), text.clone());
            prop_assert_eq!(ChannelTemplate::parse(&t.to_string()).unwrap(), t);
        }

        #[test]
        fn template_parser_never_panics(text in ".{0,20}", topic in "[a-z/{}]{0,20}") {
            if let Ok(t) = ChannelTemplate::parse(&text) {
                let reparsed = ChannelTemplate::parse(&t.to_string()).unwrap();
                prop_assert_eq!(&reparsed, &t);
                if let Some(name) = t.render(&Captures::from_topic(&topic)) {
                    prop_assert!(!name.is_empty() && name.len() <= MAX_CHANNEL_BYTES);
                }
            }
            let _ = TopicFilter::parse(&text);
        }

        #[test]
        fn routing_never_panics(topic in "\\PC{0,30}", payload in prop::collection::vec(any::<u8>(), 0..80)) {
            let router = Router::new(vec![
                number_rule(),
                json_rule(),
                InputRule::new("#", "{topic}", PayloadFormat::Number, 64).unwrap(),
            ]);
            let _ = router.route(&topic, &payload, NOW);
            let _ = router.route("bw/json/x", &payload, NOW);
        }

        #[test]
        fn every_channel_name_makes_an_output_topic(topic in "[a-z0-9$/ +#-]{1,30}") {
            let router = Router::new(vec![
                InputRule::new("$SYS/#", "{topic}", PayloadFormat::Number, 64).unwrap(),
                InputRule::new("+/+/#", "{0}-{1}", PayloadFormat::Number, 64).unwrap(),
                InputRule::new("#", "{topic}", PayloadFormat::Number, 64).unwrap(),
            ]);
            let output = crate::publish::OutputTopic::parse("bw/clean/{channel}").unwrap();
            let mut buf = String::new();
            if let Ok(r) = router.resolve(&topic) {
                prop_assert!(output.render(&r.channel, &mut buf).is_ok(), "{:?}", r.channel);
            }
        }

        #[test]
        fn json_payloads_never_panic(doc in json_value(), t in prop_oneof![Just(None), json_value().prop_map(Some)]) {
            let router = Router::new(vec![json_rule()]);
            let mut doc = doc;
            if let (serde_json::Value::Object(m), Some(t)) = (&mut doc, t) {
                m.insert("t".into(), t);
            }
            let text = doc.to_string();
            if let Ok(s) = router.route("bw/json/x", text.as_bytes(), NOW) {
                prop_assert!(s.time.is_finite() && s.time >= 0.0 && s.time <= NOW + MAX_FUTURE_S);
                prop_assert!(s.value.is_none_or(f64::is_finite));
            }
        }
    }

    #[derive(Debug, Clone)]
    enum TemplatePieceOwned {
        Literal(String),
        Level(usize),
        Topic,
    }
}
