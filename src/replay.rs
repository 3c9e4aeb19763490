//! Replaying a recorded history through the streaming path: every sample goes to its channel's
//! [`Channel::on_sample`], in time order across channels, exactly as the daemon will feed samples arriving over
//! MQTT. `gaugewise replay` is this module plus file handling; a model that misbehaves here would misbehave live.
//!
//! [`Replay`] is an iterator of [`Row`]s so the caller decides where output goes; [`write_csv`] is the bench's
//! format. Channels get their model from `config` ([`ChannelConfig::model_for`]) and samples come from `history`.
//!
//! Output CSV conventions: `time` is seconds as read by `history` (epoch seconds whatever the input form, or the
//! sample index when the file has no time column), with at most 3 decimals. Numbers use Rust's shortest exact form.
//! Empty cells mean "no value": `raw` of a missing sample, `estimate`/`std` of a dropped one (late, duplicate,
//! rejected), `innovation` when there was no observation update, `std_innovation` also while a diffuse state is
//! being initialised. `std` is `inf` until a diffuse model has seen enough values to pin its level down. `flags` is
//! the set of fault flags active after the sample, `|`-separated (`spike|bias`), empty when none.

use crate::channel::{Channel, ChannelError, Outcome, SampleStatus};
use crate::config::ChannelConfig;
use crate::history::Series;
use std::cmp::{Ordering, Reverse};
use std::collections::BinaryHeap;
use std::fmt;
use std::io::Write;
use thiserror::Error;

/// Why a replay could not start.
#[derive(Debug, Error)]
pub enum ReplayError {
    #[error("channel '{channel}': its configuration is unusable: {source}")]
    Model {
        channel: String,
        #[source]
        source: ChannelError,
    },
    #[error("two input series are both called '{0}'; channel names must be unique")]
    DuplicateChannel(String),
}

/// One replayed sample.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Row<'a> {
    pub channel: &'a str,
    pub outcome: Outcome,
}

/// Counts of what a replay did, by sample status.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Summary {
    pub channels: usize,
    pub rows: usize,
    pub ok: usize,
    pub missing: usize,
    pub late: usize,
    pub duplicate: usize,
    pub rejected: usize,
    /// Values that did not update the estimate (spikes, out of range, stuck).
    pub withheld: usize,
    /// Flags raised, all kinds together.
    pub flags_raised: usize,
}

impl Summary {
    fn count(&mut self, status: SampleStatus) {
        self.rows += 1;
        match status {
            SampleStatus::Ok => self.ok += 1,
            SampleStatus::Missing => self.missing += 1,
            SampleStatus::Late => self.late += 1,
            SampleStatus::Duplicate => self.duplicate += 1,
            SampleStatus::Rejected => self.rejected += 1,
            // A replay has no wall clock, so it never reports a channel stale; counted with the missing if it did.
            SampleStatus::Stale => self.missing += 1,
            SampleStatus::Withheld => self.withheld += 1,
        }
    }

    /// Samples that never reached a filter, whatever the reason.
    pub fn dropped(&self) -> usize {
        self.late + self.duplicate + self.rejected
    }
}

impl fmt::Display for Summary {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "replayed {} channel(s), {} rows: {} missing, {} rejected",
            self.channels,
            self.rows,
            self.missing,
            self.dropped()
        )?;
        if self.dropped() > 0 {
            write!(
                f,
                " ({} late, {} duplicate, {} unusable)",
                self.late, self.duplicate, self.rejected
            )?;
        }
        if self.withheld > 0 {
            write!(f, ", {} withheld", self.withheld)?;
        }
        if self.flags_raised > 0 {
            write!(f, ", {} flag(s) raised", self.flags_raised)?;
        }
        Ok(())
    }
}

/// Heap key: time first, then series index, so equal times keep the input's channel order (a stable merge).
#[derive(Debug, Clone, Copy, PartialEq)]
struct Key {
    time: f64,
    series: usize,
    sample: usize,
}

impl Eq for Key {}

impl Ord for Key {
    fn cmp(&self, other: &Self) -> Ordering {
        self.time
            .total_cmp(&other.time)
            .then(self.series.cmp(&other.series))
            .then(self.sample.cmp(&other.sample))
    }
}

impl PartialOrd for Key {
    fn partial_cmp(&self, other: &Self) -> Option<Ordering> {
        Some(self.cmp(other))
    }
}

/// `(series, sample)` indices of every sample of `series`, merged in time order; equal times come in series order,
/// and each series' own order is kept even if its times are not sorted (the channel then reports them as late).
/// A k-way merge rather than a sort: memory stays at one entry per channel however long the history.
#[derive(Debug, Clone)]
pub struct MergeByTime<'a> {
    series: &'a [Series],
    heap: BinaryHeap<Reverse<Key>>,
}

impl<'a> MergeByTime<'a> {
    pub fn new(series: &'a [Series]) -> Self {
        let heap = series
            .iter()
            .enumerate()
            .filter(|(_, s)| !s.times.is_empty())
            .map(|(i, s)| {
                Reverse(Key {
                    time: s.times[0],
                    series: i,
                    sample: 0,
                })
            })
            .collect();
        Self { series, heap }
    }
}

impl Iterator for MergeByTime<'_> {
    type Item = (usize, usize);

    fn next(&mut self) -> Option<(usize, usize)> {
        let Reverse(key) = self.heap.pop()?;
        let next = key.sample + 1;
        let s = &self.series[key.series];
        if next < s.times.len().min(s.values.len()) {
            self.heap.push(Reverse(Key {
                time: s.times[next],
                series: key.series,
                sample: next,
            }));
        }
        Some((key.series, key.sample))
    }
}

/// A replay in progress: one [`Channel`] per series, fed in merged time order.
#[derive(Debug, Clone)]
pub struct Replay<'a> {
    series: &'a [Series],
    channels: Vec<Channel>,
    order: MergeByTime<'a>,
    summary: Summary,
}

impl<'a> Replay<'a> {
    /// Builds each series' channel from the model `config` gives its name.
    pub fn new(config: &ChannelConfig, series: &'a [Series]) -> Result<Self, ReplayError> {
        let mut channels = Vec::with_capacity(series.len());
        for (i, s) in series.iter().enumerate() {
            // Two series with one name would be one channel live; replaying them apart would mislead.
            if series[..i].iter().any(|o| o.name == s.name) {
                return Err(ReplayError::DuplicateChannel(s.name.clone()));
            }
            let channel = Channel::with_flags(config.model_for(&s.name), config.flags_for(&s.name))
                .map_err(|e| ReplayError::Model {
                    channel: s.name.clone(),
                    source: e,
                })?;
            channels.push(channel);
        }
        Ok(Self {
            series,
            channels,
            order: MergeByTime::new(series),
            summary: Summary {
                channels: series.len(),
                ..Summary::default()
            },
        })
    }

    /// What has been replayed so far (everything, once the iterator is exhausted).
    pub fn summary(&self) -> Summary {
        self.summary
    }

    /// The channel state of series `i`, e.g. to inspect its filter after a replay.
    pub fn channel(&self, i: usize) -> Option<&Channel> {
        self.channels.get(i)
    }
}

impl<'a> Iterator for Replay<'a> {
    type Item = Row<'a>;

    fn next(&mut self) -> Option<Row<'a>> {
        let (i, k) = self.order.next()?;
        let s = &self.series[i];
        let outcome = self.channels[i].on_sample(s.times[k], Some(s.values[k]));
        self.summary.count(outcome.status);
        self.summary.flags_raised += outcome.flags.raised.len();
        Some(Row {
            channel: &s.name,
            outcome,
        })
    }
}

/// Column names of [`write_csv`]'s output.
pub const CSV_HEADER: [&str; 9] = [
    "time",
    "channel",
    "raw",
    "estimate",
    "std",
    "innovation",
    "std_innovation",
    "status",
    "flags",
];

/// Seconds with at most 3 decimals and no trailing zeros: `1772409610`, `1772409610.25`.
pub fn format_time(t: f64) -> String {
    if !t.is_finite() {
        return format!("{t}");
    }
    let s = format!("{t:.3}");
    let s = s.trim_end_matches('0').trim_end_matches('.');
    if s == "-0" {
        "0".to_string()
    } else {
        s.to_string()
    }
}

/// A value cell: empty for NaN (no value), `inf` for an unbounded std, else the shortest exact form.
fn cell(x: f64) -> String {
    if x.is_nan() {
        String::new()
    } else {
        format!("{x:?}")
    }
}

/// The CSV fields of one row, in [`CSV_HEADER`] order.
pub fn csv_fields(row: &Row) -> [String; 9] {
    let o = &row.outcome;
    let (estimate, innovation, standardized) = match &o.step {
        Some(s) => (s.estimate, s.innovation, s.standardized),
        None => (f64::NAN, f64::NAN, f64::NAN),
    };
    [
        format_time(o.time),
        row.channel.to_string(),
        cell(o.raw),
        cell(estimate),
        cell(o.std()),
        cell(innovation),
        cell(standardized),
        o.status.as_str().to_string(),
        o.flags.active.to_string(),
    ]
}

/// Writes every row of `replay` as CSV (header first) and returns the summary.
pub fn write_csv<W: Write>(mut replay: Replay, out: W) -> Result<Summary, csv::Error> {
    let mut w = csv::Writer::from_writer(out);
    w.write_record(CSV_HEADER)?;
    for row in replay.by_ref() {
        w.write_record(csv_fields(&row))?;
    }
    w.flush()?;
    Ok(replay.summary())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;

    const CONFIG: &str = "[channels.default]\nmodel = \"level\"\ninterval = 10.0\nobs_var = 0.25\nlevel_var = 0.01\n\
                          [[channels.override]]\nmatch = \"TT-*\"\nmodel = \"lag\"\ninterval = 10.0\nmean = 70.0\n\
                          tau = 300.0\nstate_var = 0.01\nobs_var = 0.04\n";

    fn config() -> ChannelConfig {
        Config::from_str(CONFIG, "test.toml").unwrap().channels
    }

    fn series(name: &str, times: &[f64], values: &[f64]) -> Series {
        Series {
            name: name.into(),
            times: times.to_vec(),
            values: values.to_vec(),
        }
    }

    #[test]
    fn merge_is_time_ordered_and_stable() {
        let s = vec![
            series("a", &[0.0, 10.0, 20.0], &[1.0; 3]),
            series("b", &[5.0, 10.0], &[1.0; 2]),
            series("c", &[], &[]),
            series("d", &[10.0, 30.0], &[1.0; 2]),
        ];
        let order: Vec<(usize, usize)> = MergeByTime::new(&s).collect();
        assert_eq!(
            order,
            vec![(0, 0), (1, 0), (0, 1), (1, 1), (3, 0), (0, 2), (3, 1)]
        );
    }

    #[test]
    fn merge_keeps_each_series_own_order() {
        let s = vec![series("a", &[0.0, 20.0, 10.0], &[1.0; 3])];
        let order: Vec<(usize, usize)> = MergeByTime::new(&s).collect();
        assert_eq!(order, vec![(0, 0), (0, 1), (0, 2)]);
    }

    #[test]
    fn replay_matches_channel_fed_directly() {
        let nan = f64::NAN;
        let s = vec![
            series("TT-101", &[0.0, 10.0, 20.0, 30.0], &[70.1, nan, 70.4, 70.2]),
            series("FT-201", &[0.0, 10.0, 20.0, 30.0], &[5.0, 5.2, 5.1, nan]),
        ];
        let cfg = config();
        let rows: Vec<Row> = Replay::new(&cfg, &s).unwrap().collect();
        assert_eq!(rows.len(), 8);
        let mut direct = Channel::new(cfg.model_for("TT-101")).unwrap();
        let tt: Vec<&Row> = rows.iter().filter(|r| r.channel == "TT-101").collect();
        for (k, r) in tt.iter().enumerate() {
            // Debug text, because NaN fields (a missing sample's innovation) never compare equal.
            let want = direct.on_sample(s[0].times[k], Some(s[0].values[k]));
            assert_eq!(format!("{:?}", r.outcome), format!("{want:?}"));
        }
        assert_eq!(rows[0].channel, "TT-101");
        assert_eq!(rows[1].channel, "FT-201");
        let mut replay = Replay::new(&cfg, &s).unwrap();
        replay.by_ref().for_each(drop);
        let sum = replay.summary();
        assert_eq!(
            sum,
            Summary {
                channels: 2,
                rows: 8,
                ok: 6,
                missing: 2,
                ..Summary::default()
            }
        );
        assert_eq!(
            sum.to_string(),
            "replayed 2 channel(s), 8 rows: 2 missing, 0 rejected"
        );
    }

    #[test]
    fn csv_cells() {
        let nan = f64::NAN;
        let s = vec![
            series("TT-101", &[0.0, 10.5, 10.5], &[70.1, nan, 70.0]),
            series("LT,1", &[0.0, 10.0], &[1.0, 1.5]),
        ];
        let cfg = config();
        let mut out = Vec::new();
        let sum = write_csv(Replay::new(&cfg, &s).unwrap(), &mut out).unwrap();
        assert_eq!(sum.duplicate, 1);
        let text = String::from_utf8(out).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(
            lines[0],
            "time,channel,raw,estimate,std,innovation,std_innovation,status,flags"
        );
        assert_eq!(lines.len(), 6);
        let cells = |l: &str| -> Vec<String> {
            csv::ReaderBuilder::new()
                .has_headers(false)
                .from_reader(l.as_bytes())
                .records()
                .next()
                .unwrap()
                .unwrap()
                .iter()
                .map(String::from)
                .collect()
        };
        // Lag channel, first sample: observed against the stationary prior.
        let first = cells(lines[1]);
        assert_eq!(first[0], "0");
        assert_eq!(first[2], "70.1");
        assert!(first[4].parse::<f64>().unwrap() > 0.0);
        assert!(!first[5].is_empty() && !first[6].is_empty());
        assert_eq!(first[7], "ok");
        // Level channel, first sample: the diffuse update has an innovation but no standardised one.
        let level = cells(lines[2]);
        assert_eq!(level[1], "LT,1");
        assert!(!level[5].is_empty() && level[6].is_empty(), "{level:?}");
        // Missing: empty raw and innovations, a prediction with a std.
        let missing = cells(lines[4]);
        assert_eq!(missing[0], "10.5");
        assert_eq!(missing[7], "missing");
        assert!(missing[2].is_empty() && missing[5].is_empty() && missing[6].is_empty());
        assert!(!missing[3].is_empty() && !missing[4].is_empty());
        // Duplicate: dropped, nothing but the raw value and the status.
        let dup = cells(lines[5]);
        assert_eq!(dup[7], "duplicate");
        assert_eq!(dup[2], "70.0");
        assert!(dup[3].is_empty() && dup[4].is_empty());
    }

    #[test]
    fn duplicate_channel_names_are_refused() {
        let s = vec![series("a", &[0.0], &[1.0]), series("a", &[0.0], &[1.0])];
        let e = Replay::new(&config(), &s).unwrap_err().to_string();
        assert_eq!(
            e,
            "two input series are both called 'a'; channel names must be unique"
        );
    }

    #[test]
    fn times_print_simply() {
        assert_eq!(format_time(1772409610.0), "1772409610");
        assert_eq!(format_time(1772409610.25), "1772409610.25");
        assert_eq!(format_time(3.0), "3");
        assert_eq!(format_time(-0.0001), "0");
        assert_eq!(format_time(0.1234), "0.123");
    }
}
