//! Reading a tag's recorded history from CSV, for the offline bench (`gaugewise fit` and `gaugewise replay`).
//!
//! Historians export either *wide* files (one row per timestamp, one column per tag) or *long* files (one row per
//! sample: `time,channel,value`, channels interleaved). Both become [`Series`]: times in seconds and values with
//! NaN for a missing sample, which is how the filter (`filter`) and the estimator (`estimate`) expect gaps. This
//! module only reads; which model a series gets comes from `config`, and nothing here knows about models.
//!
//! Conventions, chosen so that a file that reads at all reads the way an engineer would expect:
//! - Rows in error messages are 1-based line numbers in the file (the header is line 1), as an editor shows them.
//! - Times are epoch seconds, epoch milliseconds or RFC 3339. A number is taken as milliseconds when its magnitude
//!   exceeds [`EPOCH_MS_THRESHOLD`] (1e11): as seconds that is the year 5138, as milliseconds it is March 1973, so no
//!   real timestamp is ambiguous. Small numbers (relative seconds such as 0, 10, 20) therefore read as seconds. All
//!   rows of a file must use the same form, so a stray millisecond value cannot hide as a huge jump forward.
//! - Without a time column, times are the sample index 0, 1, 2, ... ([`TimeBase::Index`], nominal interval 1).
//! - Missing values are empty cells, `NaN`, `null` or `NA` (any case). Anything else that is not a finite number
//!   is an error: silently dropping a cell like `12,5` (decimal comma) would corrupt a fit without a trace.

use std::collections::HashMap;
use std::fs::File;
use std::io::Read;
use std::path::Path;
use thiserror::Error;

/// Largest number of cells (data rows times header columns) a file may have. At about 16 bytes kept per cell this
/// bounds a read to under 1 GB, enough for a year of 1 s samples of one tag; larger histories should be split or
/// exported with fewer columns.
pub const MAX_CELLS: u64 = 50_000_000;

/// Numeric timestamps with a larger magnitude are epoch milliseconds, smaller ones epoch seconds.
pub const EPOCH_MS_THRESHOLD: f64 = 1e11;

/// Header names taken as the time column when none is named (compared case-insensitively).
const TIME_NAMES: [&str; 3] = ["time", "timestamp", "t"];

/// Cell texts that mean "no sample" (compared case-insensitively; the empty cell too).
const MISSING: [&str; 4] = ["", "nan", "null", "na"];

/// One channel's history.
#[derive(Debug, Clone, PartialEq)]
pub struct Series {
    pub name: String,
    /// Seconds: epoch seconds when the file has timestamps, else the sample index.
    pub times: Vec<f64>,
    /// Same length as `times`; NaN marks a missing sample.
    pub values: Vec<f64>,
}

/// What the times of a read mean.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TimeBase {
    /// No time column: times are the sample index 0, 1, 2, ... (nominal interval 1).
    Index,
    /// Times are seconds from a time column (epoch seconds, or whatever origin the file's numbers use).
    Seconds,
}

/// Why a history file could not be read. Every message names the file, and the row (line) and column if any.
#[derive(Debug, Error)]
pub enum HistoryError {
    #[error("{path}: cannot read: {source}")]
    Io {
        path: String,
        #[source]
        source: std::io::Error,
    },
    #[error("{file}: {source}")]
    Csv {
        file: String,
        #[source]
        source: csv::Error,
    },
    #[error("{file} is empty: expected a header row naming the columns")]
    Empty { file: String },
    #[error("{file} has a header but no data rows")]
    NoRows { file: String },
    #[error("{file} has no value column (columns are: {columns})")]
    NoValueColumn { file: String, columns: String },
    #[error("unknown column '{column}' in {file}; columns are: {columns}")]
    UnknownColumn {
        file: String,
        column: String,
        columns: String,
    },
    #[error("{file}: column '{column}' appears more than once in the header")]
    DuplicateColumn { file: String, column: String },
    #[error("{file}: column {index} of the header has no name")]
    UnnamedColumn { file: String, index: usize },
    #[error("{file}: column '{column}' is the time column and cannot also be a value column")]
    TimeAsValue { file: String, column: String },
    #[error("{file} has several time-like columns ({columns}); name the one to use")]
    AmbiguousTime { file: String, columns: String },
    #[error("{file}: row {row}: {found} fields, but the header has {expected}")]
    FieldCount {
        file: String,
        row: u64,
        found: usize,
        expected: usize,
    },
    #[error(
        "{file}: row {row}, column '{column}': '{text}' is not a finite number \
         (a missing value may be empty, NaN, null or NA)"
    )]
    BadValue {
        file: String,
        row: u64,
        column: String,
        text: String,
    },
    #[error("{file}: row {row}, column '{column}': {reason}")]
    BadTime {
        file: String,
        row: u64,
        column: String,
        reason: String,
    },
    #[error("{file}: row {row}: time {time} is not after the previous row's ({previous})")]
    NotIncreasing {
        file: String,
        row: u64,
        time: String,
        previous: String,
    },
    #[error(
        "{file}: row {row}: time {time} of channel '{channel}' is not after that channel's previous sample \
         ({previous})"
    )]
    ChannelNotIncreasing {
        file: String,
        row: u64,
        channel: String,
        time: String,
        previous: String,
    },
    #[error("{file}: row {row}: the channel name is empty")]
    EmptyChannel { file: String, row: u64 },
    #[error("unknown channel '{channel}' in {file}; channels are: {channels}")]
    UnknownChannel {
        file: String,
        channel: String,
        channels: String,
    },
    #[error("{file}: column '{column}' is requested twice")]
    RequestedTwice { file: String, column: String },
    #[error(
        "{file}: a long-format file needs columns time, channel and value; '{column}' is missing"
    )]
    NotLong { file: String, column: String },
    #[error("{file} has more than {limit} cells (reached at row {row}); split it or export fewer columns")]
    TooLarge { file: String, row: u64, limit: u64 },
}

/// Reads a wide file: one row per timestamp, one column per channel.
///
/// The time column is `time_column` if given (exact name), else the one column named `time`, `timestamp` or `t`
/// (any case), else there is none and times are the sample index. Value columns are `columns` (exact names, in
/// that order) if given, else every other column in header order.
pub fn read_wide(
    reader: impl Read,
    source: &str,
    time_column: Option<&str>,
    columns: Option<&[String]>,
) -> Result<(Vec<Series>, TimeBase), HistoryError> {
    let (mut rdr, header) = open_csv(reader, source)?;
    wide_from(&mut rdr, &header, source, time_column, columns, MAX_CELLS)
}

/// Reads a long file: a header containing `time`, `channel` and `value` (any case, any order; other columns are
/// ignored) and one sample per row. Series come in order of first appearance; `channels` keeps only those named
/// (in that order). Times must strictly increase within each channel, not across channels.
pub fn read_long(
    reader: impl Read,
    source: &str,
    channels: Option<&[String]>,
) -> Result<Vec<Series>, HistoryError> {
    let (mut rdr, header) = open_csv(reader, source)?;
    long_from(&mut rdr, &header, source, channels, MAX_CELLS)
}

/// Reads either format: long when the header is exactly `time`, `channel`, `value` (any case, any order), wide
/// otherwise. For a long file `columns` selects channels and `time_column`, if given, must name its time column.
pub fn read_any(
    reader: impl Read,
    source: &str,
    time_column: Option<&str>,
    columns: Option<&[String]>,
) -> Result<(Vec<Series>, TimeBase), HistoryError> {
    let (mut rdr, header) = open_csv(reader, source)?;
    if is_long_header(&header) {
        if let Some(name) = time_column {
            if !header.iter().any(|h| h == name) {
                return Err(HistoryError::UnknownColumn {
                    file: source.to_string(),
                    column: shown(name),
                    columns: list(&header),
                });
            }
        }
        Ok((
            long_from(&mut rdr, &header, source, columns, MAX_CELLS)?,
            TimeBase::Seconds,
        ))
    } else {
        wide_from(&mut rdr, &header, source, time_column, columns, MAX_CELLS)
    }
}

/// [`read_any`] on a file; the path is the source named in errors.
pub fn read_path(
    path: &Path,
    time_column: Option<&str>,
    columns: Option<&[String]>,
) -> Result<(Vec<Series>, TimeBase), HistoryError> {
    let source = path.display().to_string();
    let file = File::open(path).map_err(|e| HistoryError::Io {
        path: source.clone(),
        source: e,
    })?;
    read_any(file, &source, time_column, columns)
}

/// Median of the positive successive differences: the nominal sample interval of an irregular history, robust to
/// gaps (which are few and long) and to duplicated or out-of-order stamps (which are not positive). None if there
/// are no two increasing finite times.
pub fn median_interval(times: &[f64]) -> Option<f64> {
    let mut diffs: Vec<f64> = times
        .windows(2)
        .map(|w| w[1] - w[0])
        .filter(|d| d.is_finite() && *d > 0.0)
        .collect();
    if diffs.is_empty() {
        return None;
    }
    diffs.sort_by(f64::total_cmp);
    let n = diffs.len();
    Some(if n % 2 == 1 {
        diffs[n / 2]
    } else {
        0.5 * (diffs[n / 2 - 1] + diffs[n / 2])
    })
}

fn open_csv<R: Read>(
    reader: R,
    source: &str,
) -> Result<(csv::Reader<R>, Vec<String>), HistoryError> {
    // Flexible so that a short or long row is our FieldCount error naming the row, not csv's generic one; trimmed
    // because hand-edited files often have spaces after commas.
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .trim(csv::Trim::All)
        .from_reader(reader);
    let header: Vec<String> = rdr
        .headers()
        .map_err(|e| csv_error(source, e))?
        .iter()
        .enumerate()
        // A UTF-8 byte order mark (Excel exports) would otherwise become part of the first column's name.
        .map(|(i, h)| {
            if i == 0 {
                h.trim_start_matches('\u{feff}').trim()
            } else {
                h
            }
            .to_string()
        })
        .collect();
    if header.is_empty() {
        return Err(HistoryError::Empty {
            file: source.to_string(),
        });
    }
    Ok((rdr, header))
}

fn csv_error(source: &str, e: csv::Error) -> HistoryError {
    HistoryError::Csv {
        file: source.to_string(),
        source: e,
    }
}

fn is_long_header(header: &[String]) -> bool {
    header.len() == 3
        && ["time", "channel", "value"]
            .iter()
            .all(|want| header.iter().any(|h| h.eq_ignore_ascii_case(want)))
}

/// Index of the one header column called `name` (exactly); errors if absent or duplicated.
fn find_exact(header: &[String], name: &str, source: &str) -> Result<usize, HistoryError> {
    let mut hits = header
        .iter()
        .enumerate()
        .filter(|(_, h)| *h == name)
        .map(|(i, _)| i);
    match (hits.next(), hits.next()) {
        (Some(i), None) => Ok(i),
        (Some(_), Some(_)) => Err(HistoryError::DuplicateColumn {
            file: source.to_string(),
            column: shown(name),
        }),
        (None, _) => Err(HistoryError::UnknownColumn {
            file: source.to_string(),
            column: shown(name),
            columns: list(header),
        }),
    }
}

/// Index of the one header column called `name` in any case; errors if absent or duplicated.
fn find_ignore_case(header: &[String], name: &str, source: &str) -> Result<usize, HistoryError> {
    let hits: Vec<usize> = (0..header.len())
        .filter(|&i| header[i].eq_ignore_ascii_case(name))
        .collect();
    match hits.as_slice() {
        [i] => Ok(*i),
        [] => Err(HistoryError::NotLong {
            file: source.to_string(),
            column: name.to_string(),
        }),
        _ => Err(HistoryError::DuplicateColumn {
            file: source.to_string(),
            column: name.to_string(),
        }),
    }
}

fn wide_from<R: Read>(
    rdr: &mut csv::Reader<R>,
    header: &[String],
    source: &str,
    time_column: Option<&str>,
    columns: Option<&[String]>,
    max_cells: u64,
) -> Result<(Vec<Series>, TimeBase), HistoryError> {
    let time_idx = match time_column {
        Some(name) => Some(find_exact(header, name, source)?),
        None => {
            let hits: Vec<usize> = (0..header.len())
                .filter(|&i| TIME_NAMES.iter().any(|t| header[i].eq_ignore_ascii_case(t)))
                .collect();
            match hits.as_slice() {
                [] => None,
                [i] => Some(*i),
                _ => {
                    // Guessing between e.g. `time` and `t` could silently fit against the wrong clock.
                    let names: Vec<String> = hits.iter().map(|&i| header[i].clone()).collect();
                    return Err(HistoryError::AmbiguousTime {
                        file: source.to_string(),
                        columns: list(&names),
                    });
                }
            }
        }
    };

    let value_idx: Vec<usize> = match columns {
        Some(names) => {
            let mut idx = Vec::with_capacity(names.len());
            for name in names {
                let i = find_exact(header, name, source)?;
                if Some(i) == time_idx {
                    return Err(HistoryError::TimeAsValue {
                        file: source.to_string(),
                        column: shown(name),
                    });
                }
                if idx.contains(&i) {
                    return Err(HistoryError::RequestedTwice {
                        file: source.to_string(),
                        column: shown(name),
                    });
                }
                idx.push(i);
            }
            idx
        }
        None => {
            let idx: Vec<usize> = (0..header.len()).filter(|&i| Some(i) != time_idx).collect();
            for (k, &i) in idx.iter().enumerate() {
                if header[i].is_empty() {
                    return Err(HistoryError::UnnamedColumn {
                        file: source.to_string(),
                        index: i + 1,
                    });
                }
                if idx[..k].iter().any(|&j| header[j] == header[i]) {
                    return Err(HistoryError::DuplicateColumn {
                        file: source.to_string(),
                        column: shown(&header[i]),
                    });
                }
            }
            idx
        }
    };
    if value_idx.is_empty() {
        return Err(HistoryError::NoValueColumn {
            file: source.to_string(),
            columns: list(header),
        });
    }

    let mut times = Vec::new();
    let mut values: Vec<Vec<f64>> = vec![Vec::new(); value_idx.len()];
    let mut clock = Clock::default();
    let mut previous: Option<(f64, String)> = None;
    let mut cells: u64 = 0;
    let mut record = csv::StringRecord::new();
    while rdr
        .read_record(&mut record)
        .map_err(|e| csv_error(source, e))?
    {
        let row = record.position().map_or(0, |p| p.line());
        cells += header.len() as u64;
        if cells > max_cells {
            return Err(HistoryError::TooLarge {
                file: source.to_string(),
                row,
                limit: max_cells,
            });
        }
        if record.len() != header.len() {
            return Err(HistoryError::FieldCount {
                file: source.to_string(),
                row,
                found: record.len(),
                expected: header.len(),
            });
        }
        let t = match time_idx {
            Some(ti) => {
                let text = &record[ti];
                let t = clock
                    .parse(text, row)
                    .map_err(|reason| HistoryError::BadTime {
                        file: source.to_string(),
                        row,
                        column: shown(&header[ti]),
                        reason,
                    })?;
                if let Some((prev, prev_text)) = &previous {
                    if t <= *prev {
                        return Err(HistoryError::NotIncreasing {
                            file: source.to_string(),
                            row,
                            time: shown(text),
                            previous: prev_text.clone(),
                        });
                    }
                }
                previous = Some((t, shown(text)));
                t
            }
            None => times.len() as f64,
        };
        times.push(t);
        for (k, &vi) in value_idx.iter().enumerate() {
            let v = parse_value(&record[vi]).ok_or_else(|| HistoryError::BadValue {
                file: source.to_string(),
                row,
                column: shown(&header[vi]),
                text: shown(&record[vi]),
            })?;
            values[k].push(v);
        }
    }
    if times.is_empty() {
        return Err(HistoryError::NoRows {
            file: source.to_string(),
        });
    }
    let series = value_idx
        .iter()
        .zip(values)
        .map(|(&i, values)| Series {
            name: header[i].clone(),
            times: times.clone(),
            values,
        })
        .collect();
    let base = if time_idx.is_some() {
        TimeBase::Seconds
    } else {
        TimeBase::Index
    };
    Ok((series, base))
}

fn long_from<R: Read>(
    rdr: &mut csv::Reader<R>,
    header: &[String],
    source: &str,
    channels: Option<&[String]>,
    max_cells: u64,
) -> Result<Vec<Series>, HistoryError> {
    let ti = find_ignore_case(header, "time", source)?;
    let ci = find_ignore_case(header, "channel", source)?;
    let vi = find_ignore_case(header, "value", source)?;
    if let Some(wanted) = channels {
        if wanted.is_empty() {
            return Err(HistoryError::NoValueColumn {
                file: source.to_string(),
                columns: list(header),
            });
        }
        for (k, name) in wanted.iter().enumerate() {
            if wanted[..k].contains(name) {
                return Err(HistoryError::RequestedTwice {
                    file: source.to_string(),
                    column: shown(name),
                });
            }
        }
    }

    let mut series: Vec<Series> = Vec::new();
    // Channel name -> index into `series`, or None for a channel seen but not selected.
    let mut index: HashMap<String, Option<usize>> = HashMap::new();
    let mut seen: Vec<String> = Vec::new();
    let mut last_text: Vec<String> = Vec::new();
    let mut clock = Clock::default();
    let mut rows = 0u64;
    let mut cells: u64 = 0;
    let mut record = csv::StringRecord::new();
    while rdr
        .read_record(&mut record)
        .map_err(|e| csv_error(source, e))?
    {
        let row = record.position().map_or(0, |p| p.line());
        rows += 1;
        cells += header.len() as u64;
        if cells > max_cells {
            return Err(HistoryError::TooLarge {
                file: source.to_string(),
                row,
                limit: max_cells,
            });
        }
        if record.len() != header.len() {
            return Err(HistoryError::FieldCount {
                file: source.to_string(),
                row,
                found: record.len(),
                expected: header.len(),
            });
        }
        let channel = &record[ci];
        if channel.is_empty() {
            return Err(HistoryError::EmptyChannel {
                file: source.to_string(),
                row,
            });
        }
        // Times and values are checked for every row, selected channel or not: a broken file is broken.
        let t = clock
            .parse(&record[ti], row)
            .map_err(|reason| HistoryError::BadTime {
                file: source.to_string(),
                row,
                column: shown(&header[ti]),
                reason,
            })?;
        let v = parse_value(&record[vi]).ok_or_else(|| HistoryError::BadValue {
            file: source.to_string(),
            row,
            column: shown(&header[vi]),
            text: shown(&record[vi]),
        })?;
        let slot = match index.get(channel) {
            Some(slot) => *slot,
            None => {
                let selected = channels.is_none_or(|w| w.iter().any(|c| c == channel));
                let slot = if selected {
                    series.push(Series {
                        name: channel.to_string(),
                        times: Vec::new(),
                        values: Vec::new(),
                    });
                    last_text.push(String::new());
                    Some(series.len() - 1)
                } else {
                    None
                };
                index.insert(channel.to_string(), slot);
                seen.push(channel.to_string());
                slot
            }
        };
        let Some(s) = slot else { continue };
        let entry = &mut series[s];
        if let Some(&prev) = entry.times.last() {
            if t <= prev {
                return Err(HistoryError::ChannelNotIncreasing {
                    file: source.to_string(),
                    row,
                    channel: shown(channel),
                    time: shown(&record[ti]),
                    previous: last_text[s].clone(),
                });
            }
        }
        entry.times.push(t);
        entry.values.push(v);
        last_text[s] = shown(&record[ti]);
    }
    if rows == 0 {
        return Err(HistoryError::NoRows {
            file: source.to_string(),
        });
    }
    match channels {
        None => Ok(series),
        Some(wanted) => {
            let mut ordered = Vec::with_capacity(wanted.len());
            for name in wanted {
                let pos = series.iter().position(|s| &s.name == name).ok_or_else(|| {
                    HistoryError::UnknownChannel {
                        file: source.to_string(),
                        channel: shown(name),
                        channels: list(&seen),
                    }
                })?;
                ordered.push(series.swap_remove(pos));
            }
            // swap_remove only reorders what is left; `ordered` follows `wanted` exactly.
            Ok(ordered)
        }
    }
}

/// `None` if the text is neither a finite number nor one of the missing-value markers.
fn parse_value(text: &str) -> Option<f64> {
    if MISSING.iter().any(|m| text.eq_ignore_ascii_case(m)) {
        return Some(f64::NAN);
    }
    // Rust also parses "inf" and "1e999" (to infinity); a sensor never reads infinity, so those are errors.
    text.parse::<f64>().ok().filter(|v| v.is_finite())
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum TimeFormat {
    EpochSeconds,
    EpochMillis,
    Rfc3339,
}

impl TimeFormat {
    fn describe(self) -> &'static str {
        match self {
            TimeFormat::EpochSeconds => "epoch seconds",
            TimeFormat::EpochMillis => "epoch milliseconds",
            TimeFormat::Rfc3339 => "RFC 3339",
        }
    }
}

/// Parses a file's timestamps and holds it to the form of its first one.
#[derive(Debug, Default)]
struct Clock {
    first: Option<(TimeFormat, u64)>,
}

impl Clock {
    fn parse(&mut self, text: &str, row: u64) -> Result<f64, String> {
        let (t, format) = parse_time(text)?;
        match self.first {
            None => self.first = Some((format, row)),
            Some((f, first_row)) if f != format => {
                return Err(format!(
                    "time '{}' reads as {}, but row {} used {}",
                    shown(text),
                    format.describe(),
                    first_row,
                    f.describe()
                ))
            }
            Some(_) => {}
        }
        Ok(t)
    }
}

fn parse_time(text: &str) -> Result<(f64, TimeFormat), String> {
    if text.is_empty() {
        return Err("time is missing".to_string());
    }
    if let Ok(x) = text.parse::<f64>() {
        if !x.is_finite() {
            return Err(format!("time '{}' is not a finite number", shown(text)));
        }
        return Ok(if x.abs() > EPOCH_MS_THRESHOLD {
            (x / 1000.0, TimeFormat::EpochMillis)
        } else {
            (x, TimeFormat::EpochSeconds)
        });
    }
    if let Ok(dt) = chrono::DateTime::parse_from_rfc3339(text) {
        let t = dt.timestamp() as f64 + f64::from(dt.timestamp_subsec_nanos()) * 1e-9;
        return Ok((t, TimeFormat::Rfc3339));
    }
    let naive = ["%Y-%m-%dT%H:%M:%S%.f", "%Y-%m-%d %H:%M:%S%.f"]
        .iter()
        .any(|f| chrono::NaiveDateTime::parse_from_str(text, f).is_ok());
    if naive {
        // Local time without an offset is ambiguous twice a year; refuse rather than guess a zone.
        Err(format!(
            "time '{}' has no UTC offset; write it as RFC 3339 with Z or +hh:mm, e.g. 2026-03-02T00:00:10Z",
            shown(text)
        ))
    } else {
        Err(format!(
            "time '{}' is neither epoch seconds, epoch milliseconds nor RFC 3339 (e.g. 2026-03-02T00:00:10Z)",
            shown(text)
        ))
    }
}

/// A cell or name as quoted in a one-line message: control characters escaped, long texts cut.
fn shown(text: &str) -> String {
    const MAX_CHARS: usize = 60;
    let mut out: String = text
        .chars()
        .take(MAX_CHARS)
        .collect::<String>()
        .escape_debug()
        .to_string();
    if text.chars().count() > MAX_CHARS {
        out.push_str("...");
    }
    out
}

/// Column names for a message; a historian export can have thousands, so only the first few are listed.
fn list(names: &[String]) -> String {
    const MAX_NAMES: usize = 20;
    let mut out = names
        .iter()
        .take(MAX_NAMES)
        .map(|n| {
            if n.is_empty() {
                "(unnamed)".to_string()
            } else {
                shown(n)
            }
        })
        .collect::<Vec<_>>()
        .join(", ");
    if names.len() > MAX_NAMES {
        out.push_str(&format!(" and {} more", names.len() - MAX_NAMES));
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;
    use proptest::prelude::*;

    fn wide(text: &str) -> Result<(Vec<Series>, TimeBase), HistoryError> {
        read_wide(text.as_bytes(), "hist.csv", None, None)
    }

    fn either(text: &str) -> Result<(Vec<Series>, TimeBase), HistoryError> {
        read_any(text.as_bytes(), "hist.csv", None, None)
    }

    fn err(r: Result<(Vec<Series>, TimeBase), HistoryError>) -> String {
        r.expect_err("expected an error").to_string()
    }

    #[test]
    fn wide_epoch_seconds_with_missing_cells() {
        let (s, base) =
            wide("time,TT-101,FT-201\n100,1.5,2\n110,,NaN\n120,null,NA\n130.5,nan,-3e2\n").unwrap();
        assert_eq!(base, TimeBase::Seconds);
        assert_eq!(s.len(), 2);
        assert_eq!(s[0].name, "TT-101");
        assert_eq!(s[0].times, vec![100.0, 110.0, 120.0, 130.5]);
        assert_eq!(s[0].values[0], 1.5);
        assert!(s[0].values[1..].iter().all(|v| v.is_nan()));
        assert_eq!(s[1].values[0], 2.0);
        assert!(s[1].values[1].is_nan() && s[1].values[2].is_nan());
        assert_eq!(s[1].values[3], -300.0);
    }

    #[test]
    fn wide_epoch_milliseconds() {
        let (s, base) = wide("Timestamp,x\n1772409600000,1\n1772409610500,2\n").unwrap();
        assert_eq!(base, TimeBase::Seconds);
        assert_eq!(s[0].times, vec![1_772_409_600.0, 1_772_409_610.5]);
    }

    #[test]
    fn wide_rfc3339_with_offset_and_fraction() {
        let text = "t,x\n2026-03-02T00:00:10Z,1\n2026-03-02T01:00:10.25+01:00,2\n2026-03-02T00:00:11.5Z,3\n";
        let (s, _) = wide(text).unwrap();
        // 2026-03-02T00:00:00Z is 1772409600 s after the epoch.
        assert_relative_eq!(s[0].times[0], 1_772_409_610.0);
        assert_relative_eq!(s[0].times[1], 1_772_409_610.25, epsilon = 1e-6);
        assert_relative_eq!(s[0].times[2], 1_772_409_611.5, epsilon = 1e-6);
    }

    #[test]
    fn epoch_seconds_and_ms_agree() {
        let (a, _) = wide("time,x\n1772409610,1\n1772409620,2\n").unwrap();
        let (b, _) = wide("time,x\n1772409610000,1\n1772409620000,2\n").unwrap();
        let (c, _) = wide("time,x\n2026-03-02T00:00:10Z,1\n2026-03-02T00:00:20Z,2\n").unwrap();
        assert_eq!(a[0].times, b[0].times);
        assert_eq!(a[0].times, c[0].times);
    }

    #[test]
    fn no_time_column_gives_index() {
        let (s, base) = wide("a,b\n1,2\n3,4\n5,6\n").unwrap();
        assert_eq!(base, TimeBase::Index);
        assert_eq!(s[1].times, vec![0.0, 1.0, 2.0]);
        assert_eq!(median_interval(&s[1].times), Some(1.0));
    }

    #[test]
    fn named_time_and_value_columns() {
        let cols = vec!["c".to_string(), "a".to_string()];
        let text = "a,stamp,b,c\n1,10,2,3\n4,20,5,6\n";
        let (s, base) = read_wide(text.as_bytes(), "hist.csv", Some("stamp"), Some(&cols)).unwrap();
        assert_eq!(base, TimeBase::Seconds);
        assert_eq!(
            s.iter().map(|s| s.name.as_str()).collect::<Vec<_>>(),
            ["c", "a"]
        );
        assert_eq!(s[0].values, vec![3.0, 6.0]);
        assert_eq!(s[1].times, vec![10.0, 20.0]);
    }

    #[test]
    fn spaces_bom_and_crlf_are_tolerated() {
        let (s, _) = wide("\u{feff}time , x\r\n 1 , 2.5 \r\n2,3\r\n").unwrap();
        assert_eq!(s[0].name, "x");
        assert_eq!(s[0].values, vec![2.5, 3.0]);
    }

    #[test]
    fn unknown_time_column_lists_columns() {
        let e = err(read_wide(
            "a,b\n1,2\n".as_bytes(),
            "hist.csv",
            Some("x"),
            None,
        ));
        assert_eq!(e, "unknown column 'x' in hist.csv; columns are: a, b");
    }

    #[test]
    fn unknown_value_column() {
        let cols = vec!["zz".to_string()];
        let e = err(read_wide(
            "time,a\n1,2\n".as_bytes(),
            "hist.csv",
            None,
            Some(&cols),
        ));
        assert_eq!(e, "unknown column 'zz' in hist.csv; columns are: time, a");
    }

    #[test]
    fn bad_value_names_row_and_column() {
        let e = err(wide("time,TT-101\n1,2\n2,3\n3,12,5\n"));
        assert_eq!(e, "hist.csv: row 4: 3 fields, but the header has 2");
        let e = err(wide("time,TT-101\n1,2\n2,3\n3,\"12,5\"\n"));
        assert_eq!(
            e,
            "hist.csv: row 4, column 'TT-101': '12,5' is not a finite number \
             (a missing value may be empty, NaN, null or NA)"
        );
        let e = err(wide("time,x\n1,inf\n"));
        assert!(
            e.starts_with("hist.csv: row 2, column 'x': 'inf' is not a finite number"),
            "{e}"
        );
    }

    #[test]
    fn non_increasing_time_names_row() {
        let e = err(wide(
            "time,x\n2026-03-02T00:00:10Z,1\n2026-03-02T00:00:20Z,2\n2026-03-02T00:00:20Z,3\n",
        ));
        assert_eq!(
            e,
            "hist.csv: row 4: time 2026-03-02T00:00:20Z is not after the previous row's (2026-03-02T00:00:20Z)"
        );
        let e = err(wide("time,x\n5,1\n4,2\n"));
        assert_eq!(
            e,
            "hist.csv: row 3: time 4 is not after the previous row's (5)"
        );
    }

    #[test]
    fn bad_times_name_row_and_column() {
        let e = err(wide("time,x\n1,1\n,2\n"));
        assert_eq!(e, "hist.csv: row 3, column 'time': time is missing");
        let e = err(wide("time,x\nyesterday,1\n"));
        assert!(
            e.starts_with("hist.csv: row 2, column 'time': time 'yesterday' is neither"),
            "{e}"
        );
        let e = err(wide("time,x\n2026-03-02 00:00:10,1\n"));
        assert!(
            e.contains("row 2, column 'time'") && e.contains("has no UTC offset"),
            "{e}"
        );
        let e = err(wide("time,x\n1772409610,1\n1772409620000,2\n"));
        assert_eq!(
            e,
            "hist.csv: row 3, column 'time': time '1772409620000' reads as epoch milliseconds, \
             but row 2 used epoch seconds"
        );
    }

    #[test]
    fn empty_and_header_only_files() {
        assert_eq!(
            err(wide("")),
            "hist.csv is empty: expected a header row naming the columns"
        );
        assert_eq!(
            err(wide("time,x\n")),
            "hist.csv has a header but no data rows"
        );
        assert_eq!(
            err(wide("time\n1\n")),
            "hist.csv has no value column (columns are: time)"
        );
        let none: Vec<String> = Vec::new();
        let e = err(read_wide(
            "a\n1\n".as_bytes(),
            "hist.csv",
            None,
            Some(&none),
        ));
        assert_eq!(e, "hist.csv has no value column (columns are: a)");
    }

    #[test]
    fn header_problems() {
        assert_eq!(
            err(wide("time,x,x\n1,2,3\n")),
            "hist.csv: column 'x' appears more than once in the header"
        );
        assert_eq!(
            err(wide("time,x,\n1,2,3\n")),
            "hist.csv: column 3 of the header has no name"
        );
        assert_eq!(
            err(wide("time,t,x\n1,2,3\n")),
            "hist.csv has several time-like columns (time, t); name the one to use"
        );
        let cols = vec!["time".to_string()];
        let e = err(read_wide(
            "time,x\n1,2\n".as_bytes(),
            "hist.csv",
            Some("time"),
            Some(&cols),
        ));
        assert_eq!(
            e,
            "hist.csv: column 'time' is the time column and cannot also be a value column"
        );
    }

    #[test]
    fn long_format_interleaved() {
        let text = "time,channel,value\n\
                    10,FT-201,1.0\n\
                    10,TT-101,70\n\
                    20,FT-201,\n\
                    15,TT-101,71\n\
                    30,FT-201,3\n";
        let (s, base) = either(text).unwrap();
        assert_eq!(base, TimeBase::Seconds);
        assert_eq!(s.len(), 2);
        assert_eq!(s[0].name, "FT-201");
        assert_eq!(s[0].times, vec![10.0, 20.0, 30.0]);
        assert!(s[0].values[1].is_nan());
        assert_eq!(s[1].name, "TT-101");
        assert_eq!(s[1].times, vec![10.0, 15.0]);
        assert_eq!(s[1].values, vec![70.0, 71.0]);
    }

    #[test]
    fn long_format_any_order_and_case_with_selection() {
        let text = "Value,TIME,Channel\n1,10,a\n2,10,b\n3,20,a\n4,20,c\n";
        let want = vec!["c".to_string(), "a".to_string()];
        let (s, _) = read_any(text.as_bytes(), "hist.csv", None, Some(&want)).unwrap();
        assert_eq!(
            s.iter().map(|s| s.name.as_str()).collect::<Vec<_>>(),
            ["c", "a"]
        );
        assert_eq!(s[1].values, vec![1.0, 3.0]);
        let want = vec!["zz".to_string()];
        let e = err(read_any(text.as_bytes(), "hist.csv", None, Some(&want)));
        assert_eq!(e, "unknown channel 'zz' in hist.csv; channels are: a, b, c");
    }

    #[test]
    fn long_format_errors_name_row() {
        let text = "time,channel,value\n10,a,1\n10,b,2\n10,a,3\n";
        assert_eq!(
            err(either(text)),
            "hist.csv: row 4: time 10 of channel 'a' is not after that channel's previous sample (10)"
        );
        assert_eq!(
            err(either("time,channel,value\n10,,1\n")),
            "hist.csv: row 2: the channel name is empty"
        );
        let e = err(either("time,channel,value\n10,a,x\n"));
        assert!(
            e.starts_with("hist.csv: row 2, column 'value': 'x' is not a finite number"),
            "{e}"
        );
        let e = read_long("time,value\n1,2\n".as_bytes(), "hist.csv", None)
            .unwrap_err()
            .to_string();
        assert_eq!(e, "hist.csv: a long-format file needs columns time, channel and value; 'channel' is missing");
    }

    #[test]
    fn read_long_ignores_extra_columns() {
        let text = "quality,time,channel,value\ngood,1,a,5\nbad,2,a,6\n";
        let s = read_long(text.as_bytes(), "hist.csv", None).unwrap();
        assert_eq!(s[0].values, vec![5.0, 6.0]);
        // Four columns: read_any treats it as wide, with the time column found by name.
        let e = err(either(text));
        assert!(e.contains("column 'quality'"), "{e}");
    }

    #[test]
    fn read_path_maps_io_errors() {
        let e = read_path(Path::new("/nonexistent/hist.csv"), None, None)
            .unwrap_err()
            .to_string();
        assert!(e.starts_with("/nonexistent/hist.csv: cannot read:"), "{e}");
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("h.csv");
        std::fs::write(&path, "time,x\n1,2\n2,3\n").unwrap();
        let (s, _) = read_path(&path, None, None).unwrap();
        assert_eq!(s[0].values, vec![2.0, 3.0]);
    }

    #[test]
    fn invalid_utf8_is_an_error_naming_the_file() {
        let bytes = b"time,x\n1,\xff\xfe\n";
        let e = read_any(&bytes[..], "hist.csv", None, None)
            .unwrap_err()
            .to_string();
        assert!(e.starts_with("hist.csv: "), "{e}");
    }

    #[test]
    fn median_interval_ignores_gaps_and_duplicates() {
        assert_eq!(median_interval(&[]), None);
        assert_eq!(median_interval(&[1.0]), None);
        assert_eq!(median_interval(&[1.0, 1.0]), None);
        assert_eq!(
            median_interval(&[0.0, 10.0, 20.0, 30.0, 1000.0]),
            Some(10.0)
        );
        assert_eq!(median_interval(&[0.0, 1.0, 3.0]), Some(1.5));
        assert_eq!(median_interval(&[0.0, f64::NAN, 2.0, 4.0]), Some(2.0));
    }

    #[test]
    fn too_many_cells_is_refused() {
        // The real limit needs a file of hundreds of MB; the check is the same with a small one.
        let text = "time,a,b\n1,2,3\n2,3,4\n3,4,5\n4,5,6\n";
        let (mut rdr, header) = open_csv(text.as_bytes(), "hist.csv").unwrap();
        let e = wide_from(&mut rdr, &header, "hist.csv", None, None, 10)
            .unwrap_err()
            .to_string();
        assert_eq!(
            e,
            "hist.csv has more than 10 cells (reached at row 5); split it or export fewer columns"
        );
        let text = "time,channel,value\n1,a,3\n2,a,4\n3,a,5\n4,a,6\n";
        let (mut rdr, header) = open_csv(text.as_bytes(), "hist.csv").unwrap();
        let e = long_from(&mut rdr, &header, "hist.csv", None, 10)
            .unwrap_err()
            .to_string();
        assert_eq!(
            e,
            "hist.csv has more than 10 cells (reached at row 5); split it or export fewer columns"
        );
        assert_eq!(MAX_CELLS, 50_000_000);
    }

    proptest! {
        #[test]
        fn arbitrary_bytes_never_panic(bytes in proptest::collection::vec(any::<u8>(), 0..400)) {
            let _ = read_any(&bytes[..], "fuzz.csv", None, None);
            let _ = read_long(&bytes[..], "fuzz.csv", None);
            let _ = read_wide(&bytes[..], "fuzz.csv", Some("t"), Some(&["a".to_string()]));
        }

        #[test]
        fn csv_like_text_never_panics(text in "[0-9a-zA-Z:T.,\"\n +-]{0,300}") {
            let _ = read_any(text.as_bytes(), "fuzz.csv", None, None);
            let head = format!("time,channel,value\n{text}");
            let _ = read_any(head.as_bytes(), "fuzz.csv", None, None);
            let head = format!("time,x,y\n{text}");
            let _ = read_any(head.as_bytes(), "fuzz.csv", None, None);
        }

        #[test]
        fn wide_round_trip(
            start in -1e9f64..1e9,
            steps in proptest::collection::vec(1e-3f64..1e4, 1..30),
            cells in proptest::collection::vec(proptest::option::of(-1e12f64..1e12), 60),
        ) {
            let mut times = vec![start];
            for d in &steps {
                let next = times[times.len() - 1] + d;
                times.push(next);
            }
            let mut text = String::from("time,a,b\n");
            let mut want = Vec::new();
            for (i, t) in times.iter().enumerate() {
                let (a, b) = (cells[2 * i % 60], cells[(2 * i + 1) % 60]);
                let cell = |v: Option<f64>| v.map_or(String::new(), |v| format!("{v:?}"));
                text.push_str(&format!("{t:?},{},{}\n", cell(a), cell(b)));
                want.push((a, b));
            }
            let (s, base) = read_any(text.as_bytes(), "rt.csv", None, None).unwrap();
            prop_assert_eq!(base, TimeBase::Seconds);
            prop_assert_eq!(&s[0].times, &times);
            for (i, (a, b)) in want.iter().enumerate() {
                prop_assert_eq!(s[0].values[i].to_bits(), a.unwrap_or(f64::NAN).to_bits());
                prop_assert_eq!(s[1].values[i].to_bits(), b.unwrap_or(f64::NAN).to_bits());
            }
        }
    }
}
