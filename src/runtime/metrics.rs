//! What the metrics endpoint says: the Prometheus text exposition of the daemon's counters, the processing-latency
//! histogram, and the health verdict.
//!
//! Pure apart from the histogram's atomics: the runtime takes a [`Snapshot`] of its counters and gauges, and
//! [`render`] writes it in the text format Prometheus scrapes (version 0.0.4: `# HELP` and `# TYPE` before each
//! family, label values escaped, histogram buckets cumulative and ending in `+Inf`). The format is written here
//! rather than through a metrics crate because every value already lives in the runtime's own atomics
//! ([`super::counters`]); a registry would have to mirror them or be fed through a custom collector, which is more
//! code than the format itself. `tests/daemon_metrics.rs` parses the output strictly.
//!
//! Rejections are exported by reason only, never by channel or topic: a label per channel would let a flood of
//! random topic names create unbounded series in Prometheus, the very thing `limits` guards against.

use super::counters::CounterSnapshot;
use crate::detect::FlagKind;
use crate::ingest::Reject;
use std::fmt::Write as _;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Duration;

/// Upper bounds of the latency buckets, in seconds. From 100 µs (the daemon's own work is a few µs per sample, so
/// the first buckets show scheduling) to 2.5 s (anything above is a stall).
pub const LATENCY_BUCKETS_S: [f64; 14] = [
    0.0001, 0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5,
];

/// Refusal reasons the runtime itself gives (besides `ingest`'s), listed so their series exist from the start.
pub const RUNTIME_REASONS: [&str; 4] = [
    "unusable_sample",
    "too_many_channels",
    "bad_model",
    "no_output_topic",
];

/// The Content-Type of [`render`]'s output.
pub const CONTENT_TYPE: &str = "text/plain; version=0.0.4; charset=utf-8";

/// Processing latencies: receipt of an MQTT message to its output handed to the client. One per worker, so the
/// workers never share a cache line for it; the endpoint adds them up.
#[derive(Debug)]
pub struct LatencyHistogram {
    /// Not cumulative: `counts[i]` holds observations in (bound[i-1], bound[i]]; the last one is above every bound.
    counts: [AtomicU64; LATENCY_BUCKETS_S.len() + 1],
    sum_ns: AtomicU64,
}

/// Bucket bounds in nanoseconds, for an integer comparison per observation.
const BOUNDS_NS: [u64; LATENCY_BUCKETS_S.len()] = [
    100_000,
    250_000,
    500_000,
    1_000_000,
    2_500_000,
    5_000_000,
    10_000_000,
    25_000_000,
    50_000_000,
    100_000_000,
    250_000_000,
    500_000_000,
    1_000_000_000,
    2_500_000_000,
];

impl Default for LatencyHistogram {
    fn default() -> Self {
        Self::new()
    }
}

impl LatencyHistogram {
    pub fn new() -> Self {
        Self {
            counts: std::array::from_fn(|_| AtomicU64::new(0)),
            sum_ns: AtomicU64::new(0),
        }
    }

    pub fn record(&self, latency: Duration) {
        let ns = u64::try_from(latency.as_nanos()).unwrap_or(u64::MAX);
        // Prometheus buckets are "less than or equal": the first bound >= ns.
        let i = BOUNDS_NS.partition_point(|&b| b < ns);
        self.counts[i].fetch_add(1, Ordering::Relaxed);
        self.sum_ns.fetch_add(ns, Ordering::Relaxed);
    }

    /// Adds this histogram's counts into `into`.
    pub fn add_to(&self, into: &mut HistogramSnapshot) {
        for (acc, c) in into.counts.iter_mut().zip(&self.counts) {
            *acc += c.load(Ordering::Relaxed);
        }
        into.sum_ns = into
            .sum_ns
            .saturating_add(self.sum_ns.load(Ordering::Relaxed));
    }
}

/// Latency counts at one moment (not cumulative, as kept).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct HistogramSnapshot {
    pub counts: [u64; LATENCY_BUCKETS_S.len() + 1],
    pub sum_ns: u64,
}

impl HistogramSnapshot {
    pub fn count(&self) -> u64 {
        self.counts.iter().sum()
    }
}

/// Everything the metrics endpoint exports, read at one moment.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Snapshot {
    pub counters: CounterSnapshot,
    /// Channels with state.
    pub channels: u64,
    /// Channels silent for longer than `stale_after_s` (publishing stale forecasts).
    pub channels_stale: u64,
    pub broker_connected: bool,
    pub reloads_applied: u64,
    pub reloads_refused: u64,
    /// Seconds since the event loop last ticked.
    pub loop_tick_age_s: f64,
    pub latency: HistogramSnapshot,
}

/// One metric family's header.
fn family(out: &mut String, name: &str, kind: &str, help: &str) {
    let _ = writeln!(out, "# HELP {name} {}", escape_help(help));
    let _ = writeln!(out, "# TYPE {name} {kind}");
}

fn sample(out: &mut String, name: &str, value: impl std::fmt::Display) {
    let _ = writeln!(out, "{name} {value}");
}

fn labelled(out: &mut String, name: &str, label: &str, value_of_label: &str, value: u64) {
    let _ = writeln!(
        out,
        "{name}{{{label}=\"{}\"}} {value}",
        escape_label(value_of_label)
    );
}

/// HELP text: backslash and newline escaped.
fn escape_help(text: &str) -> String {
    text.replace('\\', "\\\\").replace('\n', "\\n")
}

/// A label value: backslash, double quote and newline escaped.
fn escape_label(text: &str) -> String {
    text.replace('\\', "\\\\")
        .replace('"', "\\\"")
        .replace('\n', "\\n")
}

/// A float as Prometheus reads it (`+Inf`, `-Inf`, `NaN` spelled its way).
fn float(v: f64) -> String {
    if v.is_nan() {
        "NaN".to_string()
    } else if v == f64::INFINITY {
        "+Inf".to_string()
    } else if v == f64::NEG_INFINITY {
        "-Inf".to_string()
    } else {
        format!("{v}")
    }
}

/// The Prometheus text exposition of `s`.
pub fn render(s: &Snapshot) -> String {
    let c = &s.counters;
    let mut out = String::with_capacity(4096);
    let counter = |out: &mut String, name: &str, help: &str, v: u64| {
        family(out, name, "counter", help);
        sample(out, name, v);
    };
    counter(
        &mut out,
        "gaugewise_samples_received_total",
        "Input messages taken from the broker, usable or not.",
        c.received,
    );
    counter(
        &mut out,
        "gaugewise_outputs_published_total",
        "Output messages (one per input sample, plus stale reports) handed to the MQTT client.",
        c.published,
    );
    counter(
        &mut out,
        "gaugewise_outputs_dropped_total",
        "Outputs dropped because the MQTT request queue was full (limits: broker.request_queue).",
        c.publish_dropped,
    );

    family(
        &mut out,
        "gaugewise_rejected_total",
        "counter",
        "Input messages refused, by reason.",
    );
    let mut by_reason: std::collections::BTreeMap<&str, u64> = Reject::REASONS
        .iter()
        .chain(RUNTIME_REASONS.iter())
        .map(|r| (*r, 0))
        .collect();
    for ((reason, _), n) in &c.rejected_by {
        *by_reason.entry(reason.as_str()).or_insert(0) += n;
    }
    for (reason, n) in &by_reason {
        labelled(&mut out, "gaugewise_rejected_total", "reason", reason, *n);
    }

    counter(
        &mut out,
        "gaugewise_samples_not_ours_total",
        "Input messages for channels another instance owns ([instance]), ignored before their payload is read.",
        c.not_ours,
    );
    counter(
        &mut out,
        "gaugewise_samples_late_total",
        "Samples older than their channel's last one: dropped without touching the state.",
        c.late,
    );
    counter(
        &mut out,
        "gaugewise_samples_duplicate_total",
        "Samples with the same time as their channel's last one: dropped without touching the state.",
        c.duplicate,
    );
    counter(
        &mut out,
        "gaugewise_samples_withheld_total",
        "Samples whose value did not update the estimate (spike, out of range, stuck).",
        c.withheld,
    );
    counter(
        &mut out,
        "gaugewise_stale_reports_total",
        "Stale forecasts published for channels that went quiet.",
        c.stale,
    );

    family(
        &mut out,
        "gaugewise_flags_raised_total",
        "counter",
        "Fault flags raised, by kind.",
    );
    for (kind, n) in FlagKind::ALL.iter().zip(c.flags_raised) {
        labelled(
            &mut out,
            "gaugewise_flags_raised_total",
            "kind",
            kind.as_str(),
            n,
        );
    }

    family(
        &mut out,
        "gaugewise_reestimations_total",
        "counter",
        "Live re-estimations, by result: accepted, or refused by a guard rail (or a failed fit).",
    );
    labelled(
        &mut out,
        "gaugewise_reestimations_total",
        "result",
        "accepted",
        c.reestimate_accepted,
    );
    labelled(
        &mut out,
        "gaugewise_reestimations_total",
        "result",
        "refused",
        c.reestimate_refused,
    );

    family(
        &mut out,
        "gaugewise_checkpoints_total",
        "counter",
        "Checkpoints of channel state, by result: saved, or failed (the last good one stays; retried next time).",
    );
    labelled(
        &mut out,
        "gaugewise_checkpoints_total",
        "result",
        "saved",
        c.checkpoints_saved,
    );
    labelled(
        &mut out,
        "gaugewise_checkpoints_total",
        "result",
        "failed",
        c.checkpoints_failed,
    );

    counter(
        &mut out,
        "gaugewise_reconnects_total",
        "Successful connections to the broker after the first one.",
        c.reconnects,
    );
    family(
        &mut out,
        "gaugewise_config_reloads_total",
        "counter",
        "Configuration reloads (SIGHUP), by result.",
    );
    labelled(
        &mut out,
        "gaugewise_config_reloads_total",
        "result",
        "applied",
        s.reloads_applied,
    );
    labelled(
        &mut out,
        "gaugewise_config_reloads_total",
        "result",
        "refused",
        s.reloads_refused,
    );

    let gauge = |out: &mut String, name: &str, help: &str, v: String| {
        family(out, name, "gauge", help);
        sample(out, name, v);
    };
    gauge(
        &mut out,
        "gaugewise_channels",
        "Channels the daemon keeps state for.",
        s.channels.to_string(),
    );
    gauge(
        &mut out,
        "gaugewise_channels_stale",
        "Channels silent for longer than timing.stale_after_s.",
        s.channels_stale.to_string(),
    );
    gauge(
        &mut out,
        "gaugewise_broker_connected",
        "1 while the MQTT connection is up, else 0.",
        u8::from(s.broker_connected).to_string(),
    );
    gauge(
        &mut out,
        "gaugewise_event_loop_tick_age_seconds",
        "Seconds since the MQTT event loop last ticked (it ticks every second when healthy).",
        float((s.loop_tick_age_s * 1000.0).round() / 1000.0),
    );

    let name = "gaugewise_processing_latency_seconds";
    family(
        &mut out,
        name,
        "histogram",
        "Time from receipt of an input message to its output handed to the MQTT client.",
    );
    let mut cumulative = 0u64;
    for (i, bound) in LATENCY_BUCKETS_S.iter().enumerate() {
        cumulative += s.latency.counts[i];
        let _ = writeln!(
            out,
            "{name}_bucket{{le=\"{}\"}} {cumulative}",
            float(*bound)
        );
    }
    let count = s.latency.count();
    let _ = writeln!(out, "{name}_bucket{{le=\"+Inf\"}} {count}");
    let _ = writeln!(out, "{name}_sum {}", float(s.latency.sum_ns as f64 / 1e9));
    let _ = writeln!(out, "{name}_count {count}");
    out
}

/// How long the event loop may go without a tick before health fails: several tick periods, so a busy moment is
/// not a failure.
pub const MAX_TICK_AGE: Duration = Duration::from_secs(5);

/// What `/health` looks at.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HealthInputs {
    pub broker_connected: bool,
    /// Seconds since the event loop last ticked.
    pub loop_tick_age_s: f64,
    /// Shutdown has begun.
    pub stopping: bool,
}

/// `/health`'s answer: healthy or not, and a one-line JSON body with the reasons.
pub fn health(h: &HealthInputs) -> (bool, String) {
    let mut reasons: Vec<String> = Vec::new();
    if h.stopping {
        reasons.push("shutting down".to_string());
    }
    if !h.broker_connected {
        reasons.push("not connected to the MQTT broker".to_string());
    }
    // NaN (an unknown age) fails too.
    let fresh = h.loop_tick_age_s <= MAX_TICK_AGE.as_secs_f64();
    if !fresh {
        reasons.push(format!(
            "the event loop has not ticked for {:.1} s (limit {} s)",
            h.loop_tick_age_s,
            MAX_TICK_AGE.as_secs()
        ));
    }
    let healthy = reasons.is_empty();
    let body = serde_json::json!({
        "status": if healthy { "ok" } else { "unhealthy" },
        "reasons": reasons,
        "broker_connected": h.broker_connected,
        "loop_tick_age_s": if h.loop_tick_age_s.is_finite() {
            serde_json::json!((h.loop_tick_age_s * 1000.0).round() / 1000.0)
        } else {
            serde_json::Value::Null
        },
    });
    (healthy, format!("{body}\n"))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bounds_agree() {
        for (s, ns) in LATENCY_BUCKETS_S.iter().zip(BOUNDS_NS) {
            assert_eq!((s * 1e9).round() as u64, ns);
        }
        assert!(BOUNDS_NS.windows(2).all(|w| w[0] < w[1]));
    }

    #[test]
    fn histogram_buckets_are_less_or_equal() {
        let h = LatencyHistogram::new();
        h.record(Duration::from_nanos(100_000)); // exactly on the first bound: first bucket
        h.record(Duration::from_nanos(100_001)); // just above: second
        h.record(Duration::from_secs(10)); // beyond every bound
        h.record(Duration::ZERO);
        let mut s = HistogramSnapshot::default();
        h.add_to(&mut s);
        h.add_to(&mut s); // two workers with the same counts
        assert_eq!(s.counts[0], 4);
        assert_eq!(s.counts[1], 2);
        assert_eq!(s.counts[LATENCY_BUCKETS_S.len()], 2);
        assert_eq!(s.count(), 8);
        assert_eq!(s.sum_ns, 2 * (200_001 + 10_000_000_000));
    }

    #[test]
    fn exposition_is_well_formed() {
        let mut s = Snapshot {
            channels: 3,
            channels_stale: 1,
            broker_connected: true,
            reloads_applied: 2,
            loop_tick_age_s: 0.25,
            ..Snapshot::default()
        };
        s.counters.received = 10;
        s.counters.not_ours = 6;
        s.counters.flags_raised[2] = 4; // bias
        s.counters
            .rejected_by
            .insert(("not_json".into(), "TT-101".into()), 2);
        s.counters
            .rejected_by
            .insert(("not_json".into(), "FT-201".into()), 1);
        s.counters
            .rejected_by
            .insert(("some \"new\" reason".into(), "x".into()), 1);
        s.latency.counts[0] = 5;
        s.latency.counts[3] = 2;
        s.latency.sum_ns = 1_500_000;
        let text = render(&s);
        let lines: Vec<&str> = text.lines().collect();
        assert!(lines.contains(&"gaugewise_samples_received_total 10"));
        assert!(lines.contains(&"gaugewise_samples_not_ours_total 6"));
        assert!(lines.contains(&"gaugewise_rejected_total{reason=\"not_json\"} 3"));
        assert!(lines.contains(&"gaugewise_rejected_total{reason=\"too_large\"} 0"));
        assert!(lines.contains(&"gaugewise_rejected_total{reason=\"some \\\"new\\\" reason\"} 1"));
        assert!(lines.contains(&"gaugewise_flags_raised_total{kind=\"bias\"} 4"));
        assert!(lines.contains(&"gaugewise_config_reloads_total{result=\"applied\"} 2"));
        assert!(lines.contains(&"gaugewise_channels_stale 1"));
        assert!(lines.contains(&"gaugewise_broker_connected 1"));
        assert!(lines.contains(&"gaugewise_processing_latency_seconds_bucket{le=\"0.0001\"} 5"));
        assert!(lines.contains(&"gaugewise_processing_latency_seconds_bucket{le=\"0.001\"} 7"));
        assert!(lines.contains(&"gaugewise_processing_latency_seconds_bucket{le=\"+Inf\"} 7"));
        assert!(lines.contains(&"gaugewise_processing_latency_seconds_count 7"));
        assert!(lines.contains(&"gaugewise_processing_latency_seconds_sum 0.0015"));
        // Every sample line belongs to the family declared just before it.
        let mut current = "";
        for line in &lines {
            if let Some(rest) = line.strip_prefix("# TYPE ") {
                current = rest.split(' ').next().unwrap();
            } else if !line.starts_with('#') {
                let name = line.split(['{', ' ']).next().unwrap();
                assert!(name.starts_with(current), "{line} outside {current}");
            }
        }
        assert!(text.ends_with('\n'));
    }

    #[test]
    fn health_names_each_problem() {
        let ok = HealthInputs {
            broker_connected: true,
            loop_tick_age_s: 0.5,
            stopping: false,
        };
        let (healthy, body) = health(&ok);
        assert!(healthy, "{body}");
        let doc: serde_json::Value = serde_json::from_str(&body).unwrap();
        assert_eq!(doc["status"], "ok");
        assert_eq!(doc["reasons"].as_array().unwrap().len(), 0);

        let (healthy, body) = health(&HealthInputs {
            broker_connected: false,
            loop_tick_age_s: 12.0,
            ..ok
        });
        assert!(!healthy);
        assert!(body.contains("not connected to the MQTT broker"), "{body}");
        assert!(body.contains("has not ticked for 12.0 s"), "{body}");
        let (healthy, _) = health(&HealthInputs {
            loop_tick_age_s: f64::NAN,
            ..ok
        });
        assert!(!healthy, "an unknown tick age is not healthy");
        let (healthy, body) = health(&HealthInputs {
            stopping: true,
            ..ok
        });
        assert!(!healthy && body.contains("shutting down"), "{body}");
    }
}
