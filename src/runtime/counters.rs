//! What the daemon counts, and the rate limit on what it logs about refused input.
//!
//! Every event that matters operationally (a sample received, an output published or dropped, a rejection, a
//! reconnect) is counted here, from one place per event, so the periodic summary line and the final report agree
//! with the logs. Plain counters are relaxed atomics: the event loop and every worker bump them without a lock.
//! Rejections are also counted per (reason, channel or topic), which needs a map; that path is the rare one and
//! takes a mutex, with the number of distinct keys bounded so a flood of random topics cannot grow memory.

use std::collections::{BTreeMap, HashMap};
use std::fmt;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Mutex;
use std::time::{Duration, Instant};

/// Distinct (reason, key) pairs kept; beyond this, further keys of a reason are counted under [`OTHER_KEY`].
pub const MAX_REJECT_KEYS: usize = 1024;
/// The key that collects rejections once [`MAX_REJECT_KEYS`] is reached.
pub const OTHER_KEY: &str = "(other)";
/// Longest key kept, in bytes: a topic may be 64 KiB, and a thousand of those would be a lot of memory for a count.
pub const MAX_KEY_BYTES: usize = 200;

/// `text` cut to at most `max` bytes, at a character boundary.
pub fn clip(text: &str, max: usize) -> &str {
    if text.len() <= max {
        return text;
    }
    let mut end = max;
    while !text.is_char_boundary(end) {
        end -= 1;
    }
    &text[..end]
}

/// The daemon's counters. Shared by reference (`Arc`) between the event loop, the workers and the reporter.
#[derive(Debug, Default)]
pub struct Counters {
    /// Input messages taken from the broker (routed or not).
    pub received: AtomicU64,
    /// Input messages for channels another instance owns (`[instance]`): ignored before the payload is read.
    pub not_ours: AtomicU64,
    /// Output messages handed to the MQTT client.
    pub published: AtomicU64,
    /// Input samples with status `late` (older than the channel's last one).
    pub late: AtomicU64,
    /// Input samples with status `duplicate` (same time as the channel's last one).
    pub duplicate: AtomicU64,
    /// Stale reports published for quiet channels.
    pub stale: AtomicU64,
    /// Outputs dropped because the MQTT client's request queue was full (or closed).
    pub publish_dropped: AtomicU64,
    /// Successful connects after the first one.
    pub reconnects: AtomicU64,
    /// Samples whose value did not update the estimate (spike, out of range, stuck).
    pub withheld: AtomicU64,
    /// Flags raised, by kind in `detect::FlagKind::ALL` order.
    pub flags_raised: [AtomicU64; 7],
    /// Re-estimations whose parameters were taken.
    pub reestimate_accepted: AtomicU64,
    /// Re-estimations refused: the fit did not converge; the gain was too small; the task failed.
    pub reestimate_not_converged: AtomicU64,
    pub reestimate_no_gain: AtomicU64,
    pub reestimate_failed: AtomicU64,
    /// Checkpoints of channel state written, and attempts that failed.
    pub checkpoints_saved: AtomicU64,
    pub checkpoints_failed: AtomicU64,
    rejected_total: AtomicU64,
    rejected: Mutex<HashMap<(&'static str, String), u64>>,
}

/// A copy of the counters at one moment.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct CounterSnapshot {
    pub received: u64,
    /// Messages for channels of other instances, ignored.
    pub not_ours: u64,
    pub published: u64,
    pub rejected: u64,
    pub late: u64,
    pub duplicate: u64,
    pub stale: u64,
    pub publish_dropped: u64,
    pub reconnects: u64,
    pub withheld: u64,
    /// Flags raised, by kind in `detect::FlagKind::ALL` order.
    pub flags_raised: [u64; 7],
    pub reestimate_accepted: u64,
    /// Refused re-estimations, all reasons together.
    pub reestimate_refused: u64,
    pub checkpoints_saved: u64,
    pub checkpoints_failed: u64,
    /// Rejections per reason and channel (or topic, when no channel could be named), sorted.
    pub rejected_by: BTreeMap<(String, String), u64>,
}

impl Counters {
    pub fn new() -> Self {
        Self::default()
    }

    /// Adds one to a plain counter.
    pub fn bump(counter: &AtomicU64) {
        counter.fetch_add(1, Ordering::Relaxed);
    }

    /// Counts one rejection for `reason` (a short fixed word, e.g. `not_json`) and `key` (channel or topic).
    pub fn reject(&self, reason: &'static str, key: &str) {
        self.rejected_total.fetch_add(1, Ordering::Relaxed);
        let key = clip(key, MAX_KEY_BYTES).to_string();
        let mut map = self.rejected.lock().unwrap_or_else(|p| p.into_inner());
        let key = if map.len() >= MAX_REJECT_KEYS && !map.contains_key(&(reason, key.clone())) {
            OTHER_KEY.to_string()
        } else {
            key
        };
        *map.entry((reason, key)).or_insert(0) += 1;
    }

    pub fn snapshot(&self) -> CounterSnapshot {
        let get = |c: &AtomicU64| c.load(Ordering::Relaxed);
        let map = self.rejected.lock().unwrap_or_else(|p| p.into_inner());
        CounterSnapshot {
            received: get(&self.received),
            not_ours: get(&self.not_ours),
            published: get(&self.published),
            rejected: get(&self.rejected_total),
            late: get(&self.late),
            duplicate: get(&self.duplicate),
            stale: get(&self.stale),
            publish_dropped: get(&self.publish_dropped),
            reconnects: get(&self.reconnects),
            withheld: get(&self.withheld),
            flags_raised: std::array::from_fn(|i| get(&self.flags_raised[i])),
            reestimate_accepted: get(&self.reestimate_accepted),
            reestimate_refused: get(&self.reestimate_not_converged)
                + get(&self.reestimate_no_gain)
                + get(&self.reestimate_failed),
            checkpoints_saved: get(&self.checkpoints_saved),
            checkpoints_failed: get(&self.checkpoints_failed),
            rejected_by: map
                .iter()
                .map(|((r, k), n)| ((r.to_string(), k.clone()), *n))
                .collect(),
        }
    }
}

impl CounterSnapshot {
    /// Rejections of one reason, over all keys.
    pub fn rejected_for(&self, reason: &str) -> u64 {
        self.rejected_by
            .iter()
            .filter(|((r, _), _)| r == reason)
            .map(|(_, n)| n)
            .sum()
    }
}

impl fmt::Display for CounterSnapshot {
    /// One line, `key=value` pairs, for the log: `received=120 published=120 rejected=2 (not_json=2) ...`.
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "received={} published={} rejected={}",
            self.received, self.published, self.rejected
        )?;
        if self.rejected > 0 {
            let mut by_reason: BTreeMap<&str, u64> = BTreeMap::new();
            for ((r, _), n) in &self.rejected_by {
                *by_reason.entry(r).or_insert(0) += n;
            }
            let parts: Vec<String> = by_reason.iter().map(|(r, n)| format!("{r}={n}")).collect();
            write!(f, " ({})", parts.join(" "))?;
        }
        write!(f, " not_ours={}", self.not_ours)?;
        write!(
            f,
            " late={} duplicate={} stale={} publish_dropped={} reconnects={} withheld={} flags_raised={}",
            self.late,
            self.duplicate,
            self.stale,
            self.publish_dropped,
            self.reconnects,
            self.withheld,
            self.flags_raised.iter().sum::<u64>()
        )?;
        if self.reestimate_accepted + self.reestimate_refused > 0 {
            write!(
                f,
                " reestimated={} reestimate_refused={}",
                self.reestimate_accepted, self.reestimate_refused
            )?;
        }
        if self.checkpoints_saved + self.checkpoints_failed > 0 {
            write!(
                f,
                " checkpoints={} checkpoint_failures={}",
                self.checkpoints_saved, self.checkpoints_failed
            )?;
        }
        Ok(())
    }
}

/// At most one log line per reason per `period`; the lines in between are counted and reported with the next one.
#[derive(Debug)]
pub struct LogLimiter {
    period: Duration,
    state: Mutex<HashMap<&'static str, (Option<Instant>, u64)>>,
}

impl LogLimiter {
    pub fn new(period: Duration) -> Self {
        Self {
            period,
            state: Mutex::new(HashMap::new()),
        }
    }

    /// Whether to log an event of `reason` at `now`; `Some(n)` means yes, with `n` events suppressed since the
    /// last line of that reason.
    pub fn check(&self, reason: &'static str, now: Instant) -> Option<u64> {
        let mut map = self.state.lock().unwrap_or_else(|p| p.into_inner());
        let (last, suppressed) = map.entry(reason).or_insert((None, 0));
        match last {
            Some(t) if now.saturating_duration_since(*t) < self.period => {
                *suppressed += 1;
                None
            }
            _ => {
                *last = Some(now);
                Some(std::mem::take(suppressed))
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_and_snapshot() {
        let c = Counters::new();
        Counters::bump(&c.received);
        Counters::bump(&c.received);
        Counters::bump(&c.published);
        c.reject("not_json", "TT-101");
        c.reject("not_json", "FT-201");
        c.reject("no_channel", "plant/x");
        let s = c.snapshot();
        assert_eq!(s.received, 2);
        assert_eq!(s.rejected, 3);
        assert_eq!(s.rejected_for("not_json"), 2);
        assert_eq!(s.rejected_by[&("no_channel".into(), "plant/x".into())], 1);
        assert_eq!(
            s.to_string(),
            "received=2 published=1 rejected=3 (no_channel=1 not_json=2) not_ours=0 late=0 duplicate=0 stale=0 \
             publish_dropped=0 reconnects=0 withheld=0 flags_raised=0"
        );
    }

    #[test]
    fn reject_keys_are_bounded() {
        let c = Counters::new();
        for i in 0..(MAX_REJECT_KEYS + 500) {
            c.reject("no_channel", &format!("random/{i}"));
        }
        let s = c.snapshot();
        assert_eq!(s.rejected_by.len(), MAX_REJECT_KEYS + 1);
        assert_eq!(s.rejected_by[&("no_channel".into(), OTHER_KEY.into())], 500);
        assert_eq!(s.rejected, (MAX_REJECT_KEYS + 500) as u64);
        // A key already known keeps its own count.
        c.reject("no_channel", "random/0");
        assert_eq!(
            c.snapshot().rejected_by[&("no_channel".into(), "random/0".into())],
            2
        );
    }

    #[test]
    fn long_keys_are_clipped_at_a_character_boundary() {
        assert_eq!(clip("abc", 5), "abc");
        assert_eq!(clip("abcdef", 3), "abc");
        assert_eq!(clip("aé", 2), "a");
        let c = Counters::new();
        c.reject("no_rule", &"x/".repeat(10_000));
        let s = c.snapshot();
        let ((_, key), _) = s.rejected_by.iter().next().unwrap();
        assert_eq!(key.len(), MAX_KEY_BYTES);
    }

    #[test]
    fn limiter_lets_one_line_through_per_period() {
        let l = LogLimiter::new(Duration::from_secs(10));
        let t0 = Instant::now();
        assert_eq!(l.check("not_json", t0), Some(0));
        assert_eq!(l.check("not_json", t0 + Duration::from_secs(1)), None);
        assert_eq!(l.check("not_json", t0 + Duration::from_secs(2)), None);
        assert_eq!(l.check("too_large", t0 + Duration::from_secs(2)), Some(0));
        assert_eq!(l.check("not_json", t0 + Duration::from_secs(10)), Some(2));
        assert_eq!(l.check("not_json", t0 + Duration::from_secs(11)), None);
    }
}
