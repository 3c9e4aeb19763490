//! When each quiet channel is due a `stale` report: a deadline queue over a worker's channels.
//!
//! A channel becomes stale `after` seconds (wall clock) after its last accepted sample and then reports every
//! `every` seconds until a sample arrives again. A worker may own tens of thousands of channels, so the timer does
//! not scan them all on each tick: a min-heap holds one live deadline per channel (plus the odd superseded entry,
//! which is skipped when it surfaces). A sample only moves the channel's deadline; the heap entry is refreshed
//! lazily when it comes up, so the per-sample cost is a store, not a heap operation.
//!
//! Pure: the worker passes wall-clock seconds in; nothing here reads a clock.

use std::cmp::{Ordering, Reverse};
use std::collections::BinaryHeap;

/// Deadlines of channels `0..n` (the worker's own indices).
#[derive(Debug, Clone)]
pub struct StaleTimer {
    after: f64,
    every: f64,
    /// When the channel is next due a stale report; infinite before its first sample.
    due: Vec<f64>,
    /// The time of the channel's live heap entry; infinite when it has none. Always <= `due` when finite.
    queued: Vec<f64>,
    heap: BinaryHeap<Reverse<Entry>>,
}

#[derive(Debug, Clone, Copy, PartialEq)]
struct Entry {
    at: f64,
    channel: usize,
}

impl Eq for Entry {}

impl Ord for Entry {
    fn cmp(&self, other: &Self) -> Ordering {
        self.at
            .total_cmp(&other.at)
            .then(self.channel.cmp(&other.channel))
    }
}

impl PartialOrd for Entry {
    fn partial_cmp(&self, other: &Self) -> Option<Ordering> {
        Some(self.cmp(other))
    }
}

impl StaleTimer {
    /// `after_s`: silence before the first stale report; `every_s`: the cadence after it. A non-positive or
    /// non-finite `after_s` disables stale reports altogether (config validation decides what users may set).
    pub fn new(after_s: f64, every_s: f64) -> Self {
        let enabled = after_s.is_finite() && after_s > 0.0;
        Self {
            after: if enabled { after_s } else { f64::INFINITY },
            // A zero cadence would report in a tight loop; treat anything non-positive as "once per `after`".
            every: if every_s.is_finite() && every_s > 0.0 {
                every_s
            } else {
                after_s
            },
            due: Vec::new(),
            queued: Vec::new(),
            heap: BinaryHeap::new(),
        }
    }

    /// Whether stale reports are on at all.
    pub fn enabled(&self) -> bool {
        self.after.is_finite()
    }

    /// Registers a new channel (no deadline until its first sample); returns its index.
    pub fn add(&mut self) -> usize {
        self.due.push(f64::INFINITY);
        self.queued.push(f64::INFINITY);
        self.due.len() - 1
    }

    /// The channel accepted a sample received at wall time `received`: the silence starts again.
    pub fn on_sample(&mut self, channel: usize, received: f64) {
        if !self.enabled() || !received.is_finite() {
            return;
        }
        let due = received + self.after;
        self.due[channel] = due;
        // The live entry may be later than the new deadline (it was set for a stale cadence); only then is a new
        // entry needed. The old one is recognised as superseded when it surfaces.
        if due < self.queued[channel] {
            self.queued[channel] = due;
            self.heap.push(Reverse(Entry { at: due, channel }));
        }
    }

    /// Appends to `out` every channel due a stale report at wall time `now`, and schedules its next one `every`
    /// seconds later. Each channel appears at most once per call.
    pub fn due(&mut self, now: f64, out: &mut Vec<usize>) {
        while let Some(Reverse(top)) = self.heap.peek().copied() {
            if top.at > now {
                break;
            }
            self.heap.pop();
            let c = top.channel;
            if top.at != self.queued[c] {
                continue; // superseded by an earlier entry for the same channel
            }
            if self.due[c] <= now {
                out.push(c);
                // From now, not from the missed deadline: a late tick must not cause a burst of catch-up reports.
                self.due[c] = now + self.every;
            }
            self.queued[c] = self.due[c];
            self.heap.push(Reverse(Entry {
                at: self.due[c],
                channel: c,
            }));
        }
    }

    /// The earliest time anything may be due (for sleeping until then); infinite when nothing is scheduled.
    pub fn next_deadline(&self) -> f64 {
        self.heap.peek().map_or(f64::INFINITY, |Reverse(e)| e.at)
    }

    /// Heap entries, live and superseded (for tests of the bound).
    pub fn queued_entries(&self) -> usize {
        self.heap.len()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn due(t: &mut StaleTimer, now: f64) -> Vec<usize> {
        let mut out = Vec::new();
        t.due(now, &mut out);
        out
    }

    #[test]
    fn reports_after_silence_then_at_the_cadence() {
        let mut t = StaleTimer::new(30.0, 10.0);
        let a = t.add();
        assert!(
            due(&mut t, 1e9).is_empty(),
            "no sample yet, nothing to report"
        );
        t.on_sample(a, 100.0);
        assert!(due(&mut t, 129.9).is_empty());
        assert_eq!(due(&mut t, 130.0), vec![a]);
        assert!(due(&mut t, 139.0).is_empty());
        assert_eq!(due(&mut t, 140.5), vec![a]);
        assert_eq!(t.next_deadline(), 150.5);
    }

    #[test]
    fn data_stops_the_reports_and_restarts_the_silence() {
        let mut t = StaleTimer::new(30.0, 10.0);
        let a = t.add();
        t.on_sample(a, 0.0);
        assert_eq!(due(&mut t, 30.0), vec![a]);
        // Data returns at 35; the next report is 30 s after it, not at the old cadence (40).
        t.on_sample(a, 35.0);
        assert!(due(&mut t, 40.0).is_empty());
        assert!(due(&mut t, 64.9).is_empty());
        assert_eq!(due(&mut t, 65.0), vec![a]);
    }

    #[test]
    fn a_short_silence_limit_after_a_long_cadence_is_kept() {
        // every > after: a sample during the stale phase must bring the deadline forward.
        let mut t = StaleTimer::new(5.0, 60.0);
        let a = t.add();
        t.on_sample(a, 0.0);
        assert_eq!(due(&mut t, 5.0), vec![a]); // next at 65
        t.on_sample(a, 10.0); // due 15, earlier than the queued 65
        assert_eq!(due(&mut t, 15.0), vec![a]);
        assert!(
            due(&mut t, 65.0).is_empty(),
            "the superseded entry does not fire"
        );
        assert_eq!(due(&mut t, 75.0), vec![a]);
    }

    #[test]
    fn a_late_tick_does_not_burst() {
        let mut t = StaleTimer::new(10.0, 1.0);
        let a = t.add();
        t.on_sample(a, 0.0);
        assert_eq!(due(&mut t, 100.0), vec![a], "one report, not 90 catch-ups");
        assert!(due(&mut t, 100.5).is_empty());
        assert_eq!(due(&mut t, 101.0), vec![a]);
    }

    #[test]
    fn many_channels_each_once_and_heap_stays_bounded() {
        let mut t = StaleTimer::new(10.0, 5.0);
        let n = 1000;
        for _ in 0..n {
            t.add();
        }
        // Many samples per channel: the heap gets one entry per channel, not one per sample.
        for k in 0..50 {
            for c in 0..n {
                t.on_sample(c, k as f64 * 0.1 + c as f64 * 1e-4);
            }
        }
        assert_eq!(t.queued_entries(), n);
        let fired = due(&mut t, 100.0);
        assert_eq!(fired.len(), n);
        let mut sorted = fired.clone();
        sorted.sort_unstable();
        sorted.dedup();
        assert_eq!(sorted.len(), n);
        assert!(t.queued_entries() <= 2 * n);
    }

    #[test]
    fn disabled_timer_never_fires() {
        for after in [0.0, -1.0, f64::INFINITY, f64::NAN] {
            let mut t = StaleTimer::new(after, 1.0);
            assert!(!t.enabled());
            let a = t.add();
            t.on_sample(a, 0.0);
            assert!(due(&mut t, 1e12).is_empty());
            assert_eq!(t.next_deadline(), f64::INFINITY);
        }
    }
}
