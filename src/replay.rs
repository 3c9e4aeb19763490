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
//!
//! [`Traces`] collects what `replay --report` draws: per channel the samples that reached the filter and the flag
//! spans, opened and closed by the rows' raised/cleared transitions. [`TraceBuilder`] is its per-channel part,
//! shared with the demo, which sees only the active flags of each output message ([`TraceBuilder::follow`]).

use crate::channel::{Channel, ChannelError, Outcome, SampleStatus};
use crate::config::ChannelConfig;
use crate::detect::{FlagKind, FlagSet, FlagSettings, Severity};
use crate::history::Series;
use crate::html_report::{ChannelTrace, FlagSpan};
use crate::reestimate::{Decision, Learner};
use std::cmp::{Ordering, Reverse};
use std::collections::{BinaryHeap, HashMap};
use std::fmt;
use std::io::Write;
use std::sync::Arc;
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
#[derive(Debug, Clone, PartialEq)]
pub struct Row<'a> {
    pub channel: &'a str,
    pub outcome: Outcome,
    /// The re-estimation this sample triggered, if any (accepted or refused); an accepted one runs from the next
    /// sample on.
    pub reestimated: Option<Arc<Decision>>,
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
    /// Re-estimations whose parameters were taken, and those refused by a guard rail.
    pub reestimated: usize,
    pub reestimate_refused: usize,
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
        if self.reestimated + self.reestimate_refused > 0 {
            write!(
                f,
                ", {} re-estimation(s) taken, {} refused",
                self.reestimated, self.reestimate_refused
            )?;
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
    /// Per series, its re-estimation schedule when `[reestimate]` turns it on (or while it learns).
    learners: Vec<Option<Learner>>,
    /// Per series: re-estimation is off, so the learner goes once a learning channel has its first model.
    learn_off: Vec<bool>,
    order: MergeByTime<'a>,
    summary: Summary,
}

impl<'a> Replay<'a> {
    /// Builds each series' channel from the model `config` gives its name.
    pub fn new(config: &ChannelConfig, series: &'a [Series]) -> Result<Self, ReplayError> {
        let mut channels = Vec::with_capacity(series.len());
        let mut learners = Vec::with_capacity(series.len());
        for (i, s) in series.iter().enumerate() {
            // Two series with one name would be one channel live; replaying them apart would mislead.
            if series[..i].iter().any(|o| o.name == s.name) {
                return Err(ReplayError::DuplicateChannel(s.name.clone()));
            }
            let model = config.model_for(&s.name);
            let flags = config.flags_for(&s.name);
            let learning = config.learning_for(&s.name);
            let channel = match learning {
                Some(kind) => Channel::learning(kind, model.interval, flags),
                None => Channel::with_flags(model, flags),
            }
            .map_err(|e| ReplayError::Model {
                channel: s.name.clone(),
                source: e,
            })?;
            channels.push(channel);
            // A channel that learns its parameters needs the window for its first fit even with [reestimate] off.
            let settings = config
                .learn_for(&s.name)
                .copied()
                .or_else(|| learning.map(|_| crate::reestimate::LearnSettings::default()));
            learners.push(settings.map(Learner::new));
        }
        let learn_off = series
            .iter()
            .map(|s| config.learn_for(&s.name).is_none())
            .collect();
        Ok(Self {
            series,
            channels,
            learners,
            learn_off,
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
        let mut outcome = self.channels[i].on_sample(s.times[k], Some(s.values[k]));
        let was_learning = self.channels[i].learning_target().is_some();
        self.summary.count(outcome.status);
        self.summary.flags_raised += outcome.flags.raised.len();
        // The daemon's schedule, run inline: the fit happens at the sample that makes it due, and an accepted
        // change applies from the next sample (live, it applies when the background fit returns).
        let reestimated = self.learners[i]
            .as_mut()
            .and_then(|l| l.run_inline(&mut self.channels[i], &outcome))
            .map(|d| {
                if d.accepted() {
                    self.summary.reestimated += 1;
                } else {
                    self.summary.reestimate_refused += 1;
                }
                Arc::new(d)
            });
        if was_learning && self.channels[i].learning_target().is_none() {
            // The first fit ended learning: the flag cleared with this sample.
            outcome.flags.active.remove(FlagKind::Learning);
            outcome.flags.cleared.insert(FlagKind::Learning);
            if self.learn_off[i] {
                self.learners[i] = None;
            }
        }
        Some(Row {
            channel: &s.name,
            outcome,
            reestimated,
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
pub fn write_csv<W: Write>(replay: Replay, out: W) -> Result<Summary, csv::Error> {
    write_csv_observed(replay, out, |_| {})
}

/// [`write_csv`], showing each row to `observe` as well (e.g. [`Traces::push`] for a report), so a history is
/// replayed once whatever is made of it.
pub fn write_csv_observed<W: Write>(
    mut replay: Replay,
    out: W,
    mut observe: impl FnMut(&Row),
) -> Result<Summary, csv::Error> {
    let mut w = csv::Writer::from_writer(out);
    w.write_record(CSV_HEADER)?;
    for row in replay.by_ref() {
        w.write_record(csv_fields(&row))?;
        observe(&row);
    }
    w.flush()?;
    Ok(replay.summary())
}

/// Flag kinds, as indices into per-kind arrays.
const KINDS: usize = FlagKind::ALL.len();

fn kind_index(kind: FlagKind) -> usize {
    FlagKind::ALL.iter().position(|k| *k == kind).unwrap_or(0)
}

/// The flag kind called `name` (`spike`, `stuck`, ...), as output messages spell it.
pub fn flag_kind(name: &str) -> Option<FlagKind> {
    FlagKind::ALL.into_iter().find(|k| k.as_str() == name)
}

/// One channel's [`ChannelTrace`] under construction: the samples, and the flags still on.
#[derive(Debug, Clone)]
pub struct TraceBuilder {
    trace: ChannelTrace,
    severity: [Severity; KINDS],
    /// Per kind, the index in `trace.flags` of its span while the flag is on.
    open: [Option<usize>; KINDS],
    active: FlagSet,
}

impl TraceBuilder {
    /// A trace for `channel`, whose flags get their severity from `settings` (the channel's detectors).
    pub fn new(channel: &str, settings: &FlagSettings) -> Self {
        TraceBuilder {
            trace: ChannelTrace {
                channel: channel.to_string(),
                ..ChannelTrace::default()
            },
            severity: FlagKind::ALL.map(|k| settings.severity(k)),
            open: [None; KINDS],
            active: FlagSet::EMPTY,
        }
    }

    /// Samples recorded so far.
    pub fn len(&self) -> usize {
        self.trace.times.len()
    }

    pub fn is_empty(&self) -> bool {
        self.trace.times.is_empty()
    }

    /// Flags on after the last transition.
    pub fn active(&self) -> FlagSet {
        self.active
    }

    /// One sample that reached the filter: NaN for no value, an infinite `std` while the model is diffuse.
    pub fn sample(&mut self, time: f64, raw: f64, estimate: f64, std: f64) {
        let t = &mut self.trace;
        t.times.push(time);
        t.raw.push(raw);
        t.estimate.push(estimate);
        t.std.push(std);
    }

    /// Flags raised and cleared at `time`. A kind both cleared and raised at one sample is closed, then reopened;
    /// raising a kind already on, or clearing one that is off, changes nothing.
    pub fn flags(&mut self, time: f64, raised: FlagSet, cleared: FlagSet) {
        for kind in cleared.iter() {
            if let Some(i) = self.open[kind_index(kind)].take() {
                self.trace.flags[i].end = Some(time);
            }
            self.active.remove(kind);
        }
        for kind in raised.iter() {
            let slot = &mut self.open[kind_index(kind)];
            if slot.is_none() {
                *slot = Some(self.trace.flags.len());
                self.trace.flags.push(FlagSpan {
                    kind: kind.as_str().to_string(),
                    severity: self.severity[kind_index(kind)].as_str().to_string(),
                    start: time,
                    end: None,
                });
            }
            self.active.insert(kind);
        }
    }

    /// The flags active at `time`, for a source that reports only those (the daemon's output messages): kinds that
    /// appeared are raised, kinds that went away are cleared.
    pub fn follow(&mut self, time: f64, active: FlagSet) {
        let raised = active
            .iter()
            .filter(|k| !self.active.contains(*k))
            .collect();
        let cleared = self
            .active
            .iter()
            .filter(|k| !active.contains(*k))
            .collect();
        self.flags(time, raised, cleared);
    }

    /// A parameter change at `time`, in words: the hook for live re-estimation, whose swaps are to be marked here
    /// (`obs_var 0.04 -> 0.05`) once channels report them.
    pub fn change(&mut self, time: f64, description: impl Into<String>) {
        self.trace.changes.push((time, description.into()));
    }

    /// The finished trace; flags still on keep `end: None`.
    pub fn finish(self) -> ChannelTrace {
        self.trace
    }
}

/// What a replay report draws, collected row by row from a [`Replay`]: one [`TraceBuilder`] per series.
#[derive(Debug, Clone)]
pub struct Traces {
    builders: Vec<TraceBuilder>,
    by_name: HashMap<String, usize>,
}

impl Traces {
    /// One trace per series of `replay`, in input order, with the severities its channels' detectors use.
    /// Build it before the replay runs.
    pub fn new(replay: &Replay) -> Self {
        let builders = replay
            .series
            .iter()
            .zip(&replay.channels)
            .map(|(s, c)| TraceBuilder::new(&s.name, c.detectors().settings()))
            .collect();
        let by_name = replay
            .series
            .iter()
            .enumerate()
            .map(|(i, s)| (s.name.clone(), i))
            .collect();
        Traces { builders, by_name }
    }

    /// Takes one replayed row. Late, duplicate and rejected samples never reached the filter, so they are not
    /// drawn; their flag transitions (if any) still count.
    pub fn push(&mut self, row: &Row) {
        let Some(&i) = self.by_name.get(row.channel) else {
            return;
        };
        let b = &mut self.builders[i];
        let o = &row.outcome;
        if let (Some(step), false) = (
            o.step,
            matches!(
                o.status,
                SampleStatus::Late | SampleStatus::Duplicate | SampleStatus::Rejected
            ),
        ) {
            b.sample(o.time, o.raw, step.estimate, o.std());
        }
        b.flags(o.time, o.flags.raised, o.flags.cleared);
        if let Some(d) = row.reestimated.as_ref().filter(|d| d.accepted()) {
            b.change(o.time, crate::reestimate::describe_change(d));
        }
    }

    /// A parameter change on `channel` (see [`TraceBuilder::change`]); unknown channels are ignored.
    pub fn change(&mut self, channel: &str, time: f64, description: impl Into<String>) {
        if let Some(&i) = self.by_name.get(channel) {
            self.builders[i].change(time, description);
        }
    }

    /// The traces, in input order, for [`crate::html_report::replay_report`].
    pub fn finish(self) -> Vec<ChannelTrace> {
        self.builders
            .into_iter()
            .map(TraceBuilder::finish)
            .collect()
    }
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

    /// With `[reestimate]` on, replay runs the live schedule: a channel whose noise grew learns it, the change
    /// rides on the row that triggered it, the summary counts it and the report trace marks it.
    #[test]
    fn replay_applies_the_reestimation_schedule() {
        let text = "[channels.default]\nmodel = \"level\"\ninterval = 1.0\nobs_var = 0.5\nlevel_var = 0.01\n\
                    [reestimate]\nenabled = true\nwindow = 1000\nevery_s = 250\n";
        let cfg = Config::from_str(text, "r.toml").unwrap().channels;
        let mut noise = crate::simulate::Noise::new(8);
        let mut level = 0.0;
        let (times, values): (Vec<f64>, Vec<f64>) = (0..3000)
            .map(|k| {
                level += 0.1 * noise.normal();
                (k as f64, level + 2.0f64.sqrt() * noise.normal())
            })
            .unzip();
        let s = vec![series("PT-401", &times, &values)];
        let mut replay = Replay::new(&cfg, &s).unwrap();
        let mut traces = Traces::new(&replay);
        let mut last_obs_var = 0.5;
        for row in replay.by_ref() {
            traces.push(&row);
            if let Some(d) = row.reestimated.as_ref().filter(|d| d.accepted()) {
                if let crate::model::ModelParams::Level { obs_var, .. } = d.new.params {
                    last_obs_var = obs_var;
                }
            }
        }
        let sum = replay.summary();
        assert!(sum.reestimated >= 2, "{sum:?}");
        assert!((last_obs_var - 2.0).abs() < 0.3, "{last_obs_var}");
        assert!(sum.to_string().contains("re-estimation(s) taken"), "{sum}");
        let changes = &traces.finish()[0].changes;
        assert_eq!(changes.len(), sum.reestimated);
        assert!(
            changes[0].1.starts_with("obs_var 0.5000 -> 1.0000"),
            "{changes:?}"
        );
        assert!(changes[0].1.contains("(limited)"), "{changes:?}");
    }

    /// A table with no parameters: the channel runs a flagged stand-in, fits its model once `min_samples` usable
    /// samples are in, clears the flag, and from then on runs exactly what `gaugewise fit` finds on that window.
    #[test]
    fn a_channel_without_parameters_learns_them() {
        let text = "[channels.default]\nmodel = \"lag\"\ninterval = 10.0\n";
        let cfg = Config::from_str(text, "l.toml").unwrap().channels;
        assert_eq!(
            cfg.learning_for("TT-101"),
            Some(crate::model::ModelKind::Lag)
        );
        let (s, _) = crate::history::read_path(
            std::path::Path::new(concat!(
                env!("CARGO_MANIFEST_DIR"),
                "/config/examples/vessel_temperature.csv"
            )),
            None,
            None,
        )
        .unwrap();
        let mut replay = Replay::new(&cfg, &s).unwrap();
        let mut first = None;
        let mut learning_rows = 0;
        for (k, row) in replay.by_ref().enumerate() {
            if row.outcome.flags.active.contains(FlagKind::Learning) {
                learning_rows += 1;
                assert!(row.outcome.std().is_finite() || k == 0, "{row:?}");
                assert_eq!(
                    row.outcome.flags.active.len(),
                    1,
                    "only the learning flag: {row:?}"
                );
            }
            if let Some(d) = row.reestimated {
                assert!(row.outcome.flags.cleared.contains(FlagKind::Learning));
                first = Some((k, d));
                break;
            }
        }
        let (k, d) = first.expect("a first fit");
        assert!(d.first && d.accepted(), "{d:?}");
        assert_eq!(
            learning_rows, k,
            "flagged on every row before the one that ended learning"
        );
        assert_eq!(d.new.kind(), crate::model::ModelKind::Lag);
        assert_eq!(replay.channel(0).unwrap().spec(), &d.new);
        // The same window through `gaugewise fit`'s estimator, cold: the same model.
        let (times, values): (Vec<f64>, Vec<f64>) = s[0].times[..=k]
            .iter()
            .zip(&s[0].values[..=k])
            .map(|(t, v)| (*t, *v))
            .unzip();
        let data = crate::estimate::Data {
            times: &times,
            values: &values,
            interval: 10.0,
        };
        let fit = crate::estimate::fit(&data, crate::model::ModelKind::Lag, None).unwrap();
        assert_eq!(fit.spec.unwrap(), d.new);
        // Learning ends; with [reestimate] off nothing more happens.
        assert!(replay.all(
            |r| r.reestimated.is_none() && !r.outcome.flags.active.contains(FlagKind::Learning)
        ));
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

    /// A history with a spike run (three single spikes) and a stuck stretch on TT-101, and TT-102 stuck until
    /// the end; white noise around the lag's mean otherwise.
    fn faulty_history() -> Vec<Series> {
        let mut noise = crate::simulate::Noise::new(11);
        let n = 240;
        let times: Vec<f64> = (0..n).map(|i| i as f64 * 10.0).collect();
        let mut a: Vec<f64> = (0..n).map(|_| 70.0 + 0.3 * noise.normal()).collect();
        let mut b: Vec<f64> = (0..n).map(|_| 70.0 + 0.3 * noise.normal()).collect();
        for k in [50, 53, 56] {
            a[k] += 6.0;
        }
        for k in 120..170 {
            a[k] = a[119];
        }
        for k in 200..n {
            b[k] = b[199];
        }
        vec![series("TT-101", &times, &a), series("TT-102", &times, &b)]
    }

    #[test]
    fn traces_hold_the_samples_and_flag_spans() {
        let s = faulty_history();
        let cfg = config();
        let mut replay = Replay::new(&cfg, &s).unwrap();
        let mut traces = Traces::new(&replay);
        let mut raised = 0;
        for row in replay.by_ref() {
            raised += row.outcome.flags.raised.len();
            traces.push(&row);
        }
        traces.change("TT-101", 1000.0, "obs_var 0.04 -> 0.05");
        traces.change("no-such-tag", 1000.0, "ignored");
        let traces = traces.finish();
        assert_eq!(traces.len(), 2);
        let (a, b) = (&traces[0], &traces[1]);
        assert_eq!(a.channel, "TT-101");
        assert_eq!(a.times, s[0].times);
        assert_eq!(a.raw, s[0].values);
        assert!(a.estimate.iter().all(|e| e.is_finite()));
        assert_eq!(
            a.changes,
            vec![(1000.0, "obs_var 0.04 -> 0.05".to_string())]
        );
        assert_eq!(
            raised,
            a.flags.len() + b.flags.len(),
            "one span per raise: {a:?}"
        );
        let spans = |t: &ChannelTrace, kind: &str| -> Vec<FlagSpan> {
            t.flags.iter().filter(|f| f.kind == kind).cloned().collect()
        };
        // The spikes: raised at the first, held through the others by the 60 s off-delay, then cleared.
        let spike = spans(a, "spike");
        assert_eq!(spike.len(), 1, "{spike:?}");
        assert_eq!(spike[0].start, 500.0);
        assert_eq!(spike[0].severity, "low");
        assert!(spike[0].end.is_some_and(|e| e >= 560.0 + 60.0), "{spike:?}");
        // The stuck stretch: raised after the window of 30 samples, cleared when the value moves at 1700 s.
        let stuck = spans(a, "stuck");
        assert_eq!(stuck.len(), 1, "{stuck:?}");
        assert!((1200.0..1700.0).contains(&stuck[0].start), "{stuck:?}");
        assert_eq!(stuck[0].end, Some(1700.0));
        assert_eq!(stuck[0].severity, "high");
        // Stuck until the end: still on.
        let open = spans(b, "stuck");
        assert_eq!(open.len(), 1, "{open:?}");
        assert_eq!(open[0].end, None);
    }

    #[test]
    fn write_csv_observed_shows_every_row() {
        let s = faulty_history();
        let cfg = config();
        let mut seen = 0;
        let mut out = Vec::new();
        let sum =
            write_csv_observed(Replay::new(&cfg, &s).unwrap(), &mut out, |_| seen += 1).unwrap();
        assert_eq!(seen, sum.rows);
        assert_eq!(
            String::from_utf8(out).unwrap().lines().count(),
            sum.rows + 1
        );
    }

    #[test]
    fn trace_builder_follows_active_flags() {
        use crate::detect::FlagDesign;
        let settings = FlagDesign::default().resolve(1.0).unwrap();
        let mut b = TraceBuilder::new("FT-201", &settings);
        let set = |kinds: &[FlagKind]| kinds.iter().copied().collect::<FlagSet>();
        b.follow(1.0, set(&[]));
        b.follow(2.0, set(&[FlagKind::Spike]));
        b.follow(3.0, set(&[FlagKind::Spike, FlagKind::Stuck]));
        b.follow(4.0, set(&[FlagKind::Stuck]));
        b.follow(5.0, set(&[FlagKind::Stuck, FlagKind::Spike]));
        assert_eq!(b.active(), set(&[FlagKind::Spike, FlagKind::Stuck]));
        // A kind cleared and raised at one sample: closed, then reopened.
        b.flags(6.0, set(&[FlagKind::Stuck]), set(&[FlagKind::Stuck]));
        let got: Vec<(String, f64, Option<f64>)> = b
            .finish()
            .flags
            .into_iter()
            .map(|f| (f.kind, f.start, f.end))
            .collect();
        assert_eq!(
            got,
            vec![
                ("spike".into(), 2.0, Some(4.0)),
                ("stuck".into(), 3.0, Some(6.0)),
                ("spike".into(), 5.0, None),
                ("stuck".into(), 6.0, None),
            ]
        );
        assert_eq!(flag_kind("stuck"), Some(FlagKind::Stuck));
        assert_eq!(flag_kind("drift"), None);
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
