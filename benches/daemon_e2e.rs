//! End-to-end benchmark of the daemon: the real `gaugewise run` process against a real broker, with a null relay
//! through the same broker as the reference.
//!
//! A null relay (`gaugewise::broker::null_relay`) subscribes and republishes every message unchanged: it costs
//! what the MQTT client library and the broker cost, and nothing else. Whatever the daemon adds on top of it
//! (routing, JSON parsing, the filter, the output JSON, the hand-over between tasks) is what this bench shows.
//! Both run side by side on their own input topics, so neither ever sees the other's traffic, and the cases take
//! turns through one broker, one publisher and one receiver in the same run.
//!
//! Cases (each can be switched off, every size can be changed by an environment variable, see `Params`):
//! - a) throughput at 1,000 channels, QoS 0: a closed loop keeps a fixed number of samples in flight, so the
//!   publisher runs as fast as the slowest stage lets it and nothing overflows; outputs/s and the CPU time per
//!   output of the daemon (whole process) against the relay (its one thread);
//! - b) latency at a fixed rate (20,000 samples/s over 1,000 channels for 10 s): p50/p99/max from the publish call
//!   to the receipt of the output (HDR histogram), and samples lost (sent minus received);
//! - c) memory: a fresh daemon gets one sample on each of 100,000 channels; its resident memory afterwards.
//!
//! The sample's time field carries its send time, read from one monotonic clock shifted to the epoch; the daemon
//! copies it into its output's `time`, the relay leaves the payload as it is, so the receiver reads the latency
//! off every message with no table of sent messages. The figures are printed with the targets of issue 3; the
//! bench never fails on a miss (timings on a shared machine are not a pass/fail matter).

#[allow(dead_code)]
#[path = "../tests/common/broker.rs"]
mod broker;

use broker::send_signal;
use gaugewise::broker::{null_relay, EmbeddedBroker, NullRelay, MAX_PACKET_SIZE};
use hdrhistogram::Histogram;
use rumqttc::{Client, Connection, Event, MqttOptions, NetworkOptions, Packet, QoS};
use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::str::FromStr;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{mpsc, Arc, Mutex};
use std::thread::{self, JoinHandle};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

/// Inputs of the daemon: `gwbench/in/<channel>`; its outputs: `gwbench/out/<channel>`.
const DAEMON_IN: &str = "gwbench/in";
const DAEMON_OUT_FILTER: &str = "gwbench/out/#";
/// Inputs of the null relay, and the prefix it republishes under (`gwbench/relay/gwbench/rin/<channel>`).
const RELAY_IN: &str = "gwbench/rin";
const RELAY_PREFIX: &str = "gwbench/relay/";
const RELAY_OUT_FILTER: &str = "gwbench/relay/#";
/// Retained online/offline messages of each daemon started here.
const STATUS_ROOT: &str = "gwbench/status";

/// How long to wait for stragglers after the publisher stops: until every sample is answered, no output for
/// `DRAIN_QUIET`, or `DRAIN_MAX` in all.
const DRAIN_QUIET: Duration = Duration::from_secs(1);
const DRAIN_MAX: Duration = Duration::from_secs(10);
/// Bound on waiting for a connection, a subscription or a daemon to come online.
const READY: Duration = Duration::from_secs(10);
/// A closed loop with no output for this long stops waiting for the samples it has outstanding.
const STALL: Duration = Duration::from_millis(250);

fn main() {
    // `cargo bench` passes `--bench`. `cargo test --all-targets` runs bench binaries without it: a minute of
    // broker traffic has no place in the tests.
    if !std::env::args().any(|a| a == "--bench") {
        println!("daemon_e2e: run it with `cargo bench --bench daemon_e2e`; skipped");
        return;
    }
    let params = match Params::from_env() {
        Ok(p) => p,
        Err(e) => {
            eprintln!("daemon_e2e: {e}");
            std::process::exit(2);
        }
    };
    if let Err(e) = run(&params) {
        eprintln!("daemon_e2e: {e}");
        std::process::exit(1);
    }
}

/// The sizes of the run. Environment variables, with their defaults (about a minute on a 2-core machine):
struct Params {
    /// GWBENCH_CASES=abc: which cases to run.
    cases: String,
    /// GWBENCH_BROKER=auto|mosquitto|embedded: auto takes Mosquitto when installed, else the embedded broker.
    broker: String,
    /// GWBENCH_CHANNELS=1000: channels of cases a and b.
    channels: usize,
    /// GWBENCH_ROUNDS=2: relay/daemon alternations in case a.
    rounds: usize,
    /// GWBENCH_WARMUP_S=1: not measured at the start of each case a/b run.
    warmup: Duration,
    /// GWBENCH_MAX_S=5: measured seconds per case a run.
    max_secs: Duration,
    /// GWBENCH_WINDOW=2000: samples in flight (sent, output not yet received) in case a.
    window: u64,
    /// GWBENCH_RATE=20000: samples/s of case b.
    rate: f64,
    /// GWBENCH_RATE_S=10: measured seconds of case b.
    rate_secs: Duration,
    /// GWBENCH_RATE_QOS=0: QoS of inputs and outputs in case b.
    rate_qos: QoS,
    /// GWBENCH_MEM_CHANNELS=100000: channels of case c.
    mem_channels: usize,
    /// GWBENCH_MEM_RATE=20000: samples/s while case c creates its channels.
    mem_rate: f64,
    /// GWBENCH_BROKER_NODELAY=1: Mosquitto's `set_tcp_nodelay` (0 leaves Nagle's algorithm on, its default).
    broker_nodelay: bool,
    /// GWBENCH_CLIENT_NODELAY=1: TCP_NODELAY on the bench's own publisher and receiver.
    client_nodelay: bool,
}

impl Params {
    fn from_env() -> Result<Params, String> {
        let p = Params {
            cases: env_or("GWBENCH_CASES", "abc".to_string())?,
            broker: env_or("GWBENCH_BROKER", "auto".to_string())?,
            channels: env_or("GWBENCH_CHANNELS", 1000)?,
            rounds: env_or("GWBENCH_ROUNDS", 2)?,
            warmup: Duration::from_secs_f64(env_or("GWBENCH_WARMUP_S", 1.0)?),
            max_secs: Duration::from_secs_f64(env_or("GWBENCH_MAX_S", 5.0)?),
            window: env_or("GWBENCH_WINDOW", 2000)?,
            rate: env_or("GWBENCH_RATE", 20_000.0)?,
            rate_secs: Duration::from_secs_f64(env_or("GWBENCH_RATE_S", 10.0)?),
            rate_qos: match env_or("GWBENCH_RATE_QOS", 0u8)? {
                0 => QoS::AtMostOnce,
                1 => QoS::AtLeastOnce,
                q => return Err(format!("GWBENCH_RATE_QOS must be 0 or 1, not {q}")),
            },
            mem_channels: env_or("GWBENCH_MEM_CHANNELS", 100_000)?,
            mem_rate: env_or("GWBENCH_MEM_RATE", 20_000.0)?,
            broker_nodelay: env_or("GWBENCH_BROKER_NODELAY", 1u8)? != 0,
            client_nodelay: env_or("GWBENCH_CLIENT_NODELAY", 1u8)? != 0,
        };
        if p.channels == 0 || p.mem_channels == 0 || p.rounds == 0 || p.window == 0 {
            return Err("channel counts, rounds and window must be at least 1".into());
        }
        if !(p.rate > 0.0 && p.mem_rate > 0.0) {
            return Err("rates must be positive".into());
        }
        if !["auto", "mosquitto", "embedded"].contains(&p.broker.as_str()) {
            return Err(format!(
                "GWBENCH_BROKER must be auto, mosquitto or embedded, not {:?}",
                p.broker
            ));
        }
        Ok(p)
    }

    fn case(&self, c: char) -> bool {
        self.cases.contains(c)
    }
}

/// An environment variable parsed as `T`, or the default when it is unset.
fn env_or<T: FromStr>(name: &str, default: T) -> Result<T, String> {
    match std::env::var(name) {
        Ok(v) => v
            .trim()
            .parse()
            .map_err(|_| format!("{name}={v:?} is not a valid value")),
        Err(_) => Ok(default),
    }
}

fn run(p: &Params) -> Result<(), String> {
    let ticks_per_s = clock_ticks();
    let mosquitto = match p.broker.as_str() {
        "embedded" => None,
        "mosquitto" => {
            Some(BenchMosquitto::start(p.broker_nodelay)?.ok_or("mosquitto is not installed")?)
        }
        _ => BenchMosquitto::start(p.broker_nodelay)?,
    };
    let broker = match mosquitto {
        Some(m) => Broker::Mosquitto(m),
        None => Broker::Embedded(EmbeddedBroker::start().map_err(|e| e.to_string())?),
    };
    let (port, broker_pid) = match &broker {
        Broker::Mosquitto(m) => (m.port, Some(m.child.id())),
        Broker::Embedded(b) => (b.port(), None),
    };
    let daemon_bin = daemon_binary()?;

    println!("gaugewise end-to-end benchmark (daemon_e2e)");
    println!(
        "  machine: {} CPUs, load average {}",
        thread::available_parallelism().map_or(0, |n| n.get()),
        std::fs::read_to_string("/proc/loadavg")
            .ok()
            .and_then(|s| s.split_whitespace().next().map(str::to_string))
            .unwrap_or_else(|| "?".into())
    );
    match &broker {
        Broker::Mosquitto(_) => println!(
            "  broker: {} on 127.0.0.1:{port}, set_tcp_nodelay {} (single-threaded: the ceiling for \
             everything here)",
            mosquitto_version(),
            p.broker_nodelay
        ),
        Broker::Embedded(_) => println!(
            "  broker: the embedded rumqttd on 127.0.0.1:{port} (Mosquitto is not installed or not chosen; \
             the targets assume Mosquitto, and this broker shares the bench's own process)"
        ),
    }
    println!("  daemon: {}", daemon_bin.display());
    println!(
        "  bench clients (publisher, receiver): TCP_NODELAY {}",
        p.client_nodelay
    );
    match ticks_per_s {
        Tick::Getconf(t) => println!("  CPU time: /proc utime+stime, CLK_TCK {t} (getconf)"),
        Tick::Assumed(t) => {
            println!("  CPU time: /proc utime+stime, CLK_TCK assumed {t} (getconf CLK_TCK failed)")
        }
    }
    println!();

    let clock = Clock::new();
    let receiver = Receiver::start(port, clock, p.client_nodelay)?;
    let publisher = Publisher::start(port, p.client_nodelay)?;
    let ctx = Ctx {
        port,
        clock,
        receiver: &receiver,
        publisher: &publisher,
        broker_pid,
        ticks_per_s: ticks_per_s.value(),
        daemon_bin: &daemon_bin,
    };
    let mut verdicts = Vec::new();

    if p.case('a') || p.case('b') {
        let mut pair = Pair::start(&ctx, QoS::AtMostOnce, p.channels)?;
        if p.case('a') {
            case_throughput(&ctx, p, &pair, &mut verdicts)?;
        }
        if p.case('b') {
            if p.rate_qos != QoS::AtMostOnce {
                pair.stop();
                pair = Pair::start(&ctx, p.rate_qos, p.channels)?;
            }
            case_latency(&ctx, p, &pair, &mut verdicts)?;
            let mem = memory(pair.daemon.pid());
            println!(
                "   daemon memory with {} channels: VmRSS {:.1} MB, VmHWM {:.1} MB",
                p.channels,
                mb(mem.rss_kb),
                mb(mem.hwm_kb)
            );
            println!();
        }
        pair.stop();
    }
    if p.case('c') {
        case_memory(&ctx, p, &mut verdicts)?;
    }

    println!("Targets (issue 3; informational: the bench never fails on a miss)");
    println!(
        "  {:<58} {:>12} {:>12}  result",
        "target", "measured", "target"
    );
    for v in &verdicts {
        println!(
            "  {:<58} {:>12} {:>12}  {}",
            v.what,
            v.measured,
            v.target,
            if v.pass { "pass" } else { "MISS" }
        );
    }
    if verdicts.is_empty() {
        println!("  (no case ran: GWBENCH_CASES={:?})", p.cases);
    }
    drop(publisher);
    drop(receiver);
    drop(broker);
    Ok(())
}

enum Broker {
    Mosquitto(BenchMosquitto),
    Embedded(EmbeddedBroker),
}

/// A Mosquitto of our own on a free loopback port, as `tests/common/broker.rs` starts one, with a configuration
/// for a benchmark: no persistence, quiet log, and `set_tcp_nodelay` as asked. Killed when dropped.
struct BenchMosquitto {
    port: u16,
    child: Child,
    _dir: tempfile::TempDir,
}

impl BenchMosquitto {
    /// `None` when Mosquitto is not installed.
    fn start(nodelay: bool) -> Result<Option<BenchMosquitto>, String> {
        let Some(binary) = broker::mosquitto_binary() else {
            return Ok(None);
        };
        let dir = tempfile::Builder::new()
            .prefix("gwbench-mosquitto-")
            .tempdir()
            .map_err(|e| format!("scratch directory: {e}"))?;
        let conf = dir.path().join("mosquitto.conf");
        let log = dir.path().join("mosquitto.log");
        let mut last = String::new();
        // The free port can be taken between the probe and Mosquitto's bind: try a few.
        for _ in 0..5 {
            let port = broker::free_port();
            let text = format!(
                "# Generated by benches/daemon_e2e.rs; loopback only, never the system's broker.\n\
                 listener {port} 127.0.0.1\n\
                 allow_anonymous true\n\
                 persistence false\n\
                 log_dest file {log}\n\
                 log_type error\n\
                 log_type warning\n\
                 max_packet_size {MAX_PACKET_SIZE}\n\
                 max_queued_messages 100000\n\
                 max_inflight_messages 1000\n\
                 set_tcp_nodelay {nodelay}\n\
                 # As root Mosquitto would switch to the user \"mosquitto\"; as any other user this has no effect.\n\
                 user root\n",
                log = log.display(),
            );
            std::fs::write(&conf, text).map_err(|e| format!("{}: {e}", conf.display()))?;
            let mut child = Command::new(&binary)
                .arg("-c")
                .arg(&conf)
                .stdin(Stdio::null())
                .stdout(Stdio::null())
                .stderr(Stdio::null())
                .spawn()
                .map_err(|e| format!("{}: {e}", binary.display()))?;
            let up = broker::wait_for_port(port, READY);
            // A failed bind exits at once: the listener that answered is ours only if the child still runs.
            thread::sleep(Duration::from_millis(20));
            match child.try_wait() {
                Ok(None) if up => {
                    return Ok(Some(BenchMosquitto {
                        port,
                        child,
                        _dir: dir,
                    }))
                }
                _ => {
                    let _ = child.kill();
                    let _ = child.wait();
                    last = std::fs::read_to_string(&log).unwrap_or_default();
                }
            }
        }
        Err(format!("mosquitto did not start; its log:\n{last}"))
    }
}

impl Drop for BenchMosquitto {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// What every case needs.
struct Ctx<'a> {
    port: u16,
    clock: Clock,
    receiver: &'a Receiver,
    publisher: &'a Publisher,
    broker_pid: Option<u32>,
    ticks_per_s: f64,
    daemon_bin: &'a Path,
}

struct Verdict {
    what: String,
    measured: String,
    target: String,
    pass: bool,
}

/// A daemon and a null relay at one QoS, both connected and idle until driven.
struct Pair {
    daemon: Daemon,
    relay: Relay,
}

impl Pair {
    fn start(ctx: &Ctx, qos: QoS, channels: usize) -> Result<Pair, String> {
        let relay = Relay::start(ctx.port, qos)?;
        let daemon = Daemon::start(ctx, qos, channels.max(1000))?;
        Ok(Pair { daemon, relay })
    }

    fn stop(self) {
        self.daemon.stop();
        self.relay.stop();
    }
}

/// Which process or thread a case measures the CPU time of.
#[derive(Clone, Copy)]
enum Subject {
    Daemon(u32),
    /// A thread of this process (the null relay's).
    Thread(u32),
}

impl Subject {
    fn ticks(self) -> u64 {
        match self {
            Subject::Daemon(pid) => stat_ticks(&format!("/proc/{pid}/stat")).unwrap_or(0),
            Subject::Thread(tid) => stat_ticks(&format!("/proc/self/task/{tid}/stat")).unwrap_or(0),
        }
    }
}

fn case_throughput(
    ctx: &Ctx,
    p: &Params,
    pair: &Pair,
    verdicts: &mut Vec<Verdict>,
) -> Result<(), String> {
    println!(
        "a) throughput: {} channels, QoS 0, closed loop with at most {} samples in flight, {} round(s) of \
         {:.0} s (+{:.0} s warm-up) per case",
        p.channels,
        p.window,
        p.rounds,
        p.max_secs.as_secs_f64(),
        p.warmup.as_secs_f64()
    );
    println!(
        "   {:<6} {:<7} {:>10} {:>14} {:>10} {:>10} {:>10} {:>6}",
        "round", "case", "outputs/s", "CPU µs/output", "CPU %", "broker %", "bench %", "lost"
    );
    let relay_topics = topics(RELAY_IN, p.channels);
    let daemon_topics = topics(DAEMON_IN, p.channels);
    let mut sums = [Totals::default(), Totals::default()];
    for round in 1..=p.rounds {
        for (i, (name, topics, subject)) in [
            ("relay", &relay_topics, Subject::Thread(pair.relay.tid)),
            ("daemon", &daemon_topics, Subject::Daemon(pair.daemon.pid())),
        ]
        .into_iter()
        .enumerate()
        {
            let r = drive(
                ctx,
                &Drive {
                    topics,
                    pace: Pace::Window(p.window),
                    qos: QoS::AtMostOnce,
                    warmup: p.warmup,
                    measure: Some(p.max_secs),
                    count: None,
                },
                subject,
            );
            let w = &r.window;
            println!(
                "   {:<6} {:<7} {:>10.0} {:>14.2} {:>10.0} {:>10} {:>10.0} {:>6}",
                round,
                name,
                w.outputs as f64 / w.secs,
                w.cpu_us_per_output(ctx.ticks_per_s),
                w.share(w.subject_ticks, ctx.ticks_per_s),
                w.broker_ticks.map_or("n/a".into(), |t| format!(
                    "{:.0}",
                    w.share(t, ctx.ticks_per_s)
                )),
                w.share(w.bench_ticks, ctx.ticks_per_s),
                r.lost()
            );
            if r.stalls > 0 {
                println!(
                    "   ({name}: the closed loop stalled {} time(s) on lost samples)",
                    r.stalls
                );
            }
            sums[i].add(w);
        }
    }
    let [relay, daemon] = sums;
    let relay_rate = relay.outputs as f64 / relay.secs;
    let daemon_rate = daemon.outputs as f64 / daemon.secs;
    let relay_cpu = relay.ticks as f64 / ctx.ticks_per_s * 1e6 / relay.outputs.max(1) as f64;
    let daemon_cpu = daemon.ticks as f64 / ctx.ticks_per_s * 1e6 / daemon.outputs.max(1) as f64;
    println!(
        "   all    relay   {relay_rate:>10.0} {relay_cpu:>14.2}\n   all    daemon  {daemon_rate:>10.0} {daemon_cpu:>14.2}"
    );
    println!(
        "   (CPU %: of one core, the relay's thread or the daemon process; broker %: the Mosquitto process; \
         bench %: this process, publisher and receiver)"
    );
    println!();
    let ratio = daemon_rate / relay_rate;
    verdicts.push(Verdict {
        what: format!("a) daemon/relay outputs/s, {} channels, QoS 0", p.channels),
        measured: format!("{ratio:.3}"),
        target: ">= 0.95".into(),
        pass: ratio >= 0.95,
    });
    let cpu_ratio = daemon_cpu / relay_cpu;
    verdicts.push(Verdict {
        what: format!("a) daemon/relay CPU per output ({daemon_cpu:.1} / {relay_cpu:.1} µs)"),
        measured: format!("{cpu_ratio:.2}"),
        target: "<= 1.5".into(),
        pass: cpu_ratio <= 1.5,
    });
    Ok(())
}

fn case_latency(
    ctx: &Ctx,
    p: &Params,
    pair: &Pair,
    verdicts: &mut Vec<Verdict>,
) -> Result<(), String> {
    let qos_n = qos_number(p.rate_qos);
    println!(
        "b) latency: {:.0} samples/s over {} channels for {:.0} s (+{:.0} s warm-up), QoS {qos_n}, publish call \
         to output received",
        p.rate,
        p.channels,
        p.rate_secs.as_secs_f64(),
        p.warmup.as_secs_f64()
    );
    println!(
        "   {:<7} {:>9} {:>9} {:>9} {:>9} {:>9} {:>9} {:>9} {:>7} {:>14}",
        "case",
        "sent/s",
        "sent",
        "received",
        "lost",
        "p50 ms",
        "p99 ms",
        "p99.9 ms",
        "max ms",
        "CPU µs/output"
    );
    let mut daemon_result = None;
    for (name, prefix, subject) in [
        ("relay", RELAY_IN, Subject::Thread(pair.relay.tid)),
        ("daemon", DAEMON_IN, Subject::Daemon(pair.daemon.pid())),
    ] {
        let topics = topics(prefix, p.channels);
        let r = drive(
            ctx,
            &Drive {
                topics: &topics,
                pace: Pace::Rate(p.rate),
                qos: p.rate_qos,
                warmup: p.warmup,
                measure: Some(p.rate_secs),
                count: None,
            },
            subject,
        );
        let h = &r.latency;
        let ms = |q: f64| h.value_at_quantile(q) as f64 / 1000.0;
        println!(
            "   {:<7} {:>9.0} {:>9} {:>9} {:>9} {:>9.3} {:>9.3} {:>9.3} {:>7.1} {:>14.2}",
            name,
            r.window.sent as f64 / r.window.secs,
            r.sent,
            r.received,
            r.lost(),
            ms(0.5),
            ms(0.99),
            ms(0.999),
            h.max() as f64 / 1000.0,
            r.window.cpu_us_per_output(ctx.ticks_per_s),
        );
        if r.not_ok > 0 || r.unreadable > 0 {
            println!(
                "   {name}: {} outputs with a status other than \"ok\", {} without a readable time",
                r.not_ok, r.unreadable
            );
        }
        if name == "daemon" {
            daemon_result = Some(r);
        }
    }
    println!("   (latency counts the measured seconds only; sent/received/lost count warm-up too)");
    let r = daemon_result.expect("the daemon ran");
    let p99 = r.latency.value_at_quantile(0.99) as f64 / 1000.0;
    verdicts.push(Verdict {
        what: format!(
            "b) p99 latency, {:.0}/s over {} channels, QoS {qos_n}",
            p.rate, p.channels
        ),
        measured: format!("{p99:.2} ms"),
        target: "< 5 ms".into(),
        pass: p99 < 5.0,
    });
    verdicts.push(Verdict {
        what: format!("b) samples lost at {:.0}/s (of {} sent)", p.rate, r.sent),
        measured: r.lost().to_string(),
        target: "0".into(),
        pass: r.lost() == 0,
    });
    Ok(())
}

fn case_memory(ctx: &Ctx, p: &Params, verdicts: &mut Vec<Verdict>) -> Result<(), String> {
    println!(
        "c) memory: a fresh daemon, one sample on each of {} channels at {:.0}/s, QoS 0",
        p.mem_channels, p.mem_rate
    );
    let daemon = Daemon::start(ctx, QoS::AtMostOnce, p.mem_channels)?;
    thread::sleep(Duration::from_millis(300));
    let before = memory(daemon.pid());
    let topics = topics(DAEMON_IN, p.mem_channels);
    let r = drive(
        ctx,
        &Drive {
            topics: &topics,
            pace: Pace::Rate(p.mem_rate),
            qos: QoS::AtMostOnce,
            warmup: Duration::ZERO,
            measure: None,
            count: Some(p.mem_channels as u64),
        },
        Subject::Daemon(daemon.pid()),
    );
    // Let the allocator and the workers settle before reading.
    thread::sleep(Duration::from_millis(500));
    let after = memory(daemon.pid());
    println!(
        "   sent {}, outputs received {} (channels with state), lost {}",
        r.sent,
        r.received,
        r.lost()
    );
    println!(
        "   VmRSS before {:.1} MB, after {:.1} MB ({:.0} bytes per channel); VmHWM {:.1} MB",
        mb(before.rss_kb),
        mb(after.rss_kb),
        after.rss_kb.saturating_sub(before.rss_kb) as f64 * 1024.0 / r.received.max(1) as f64,
        mb(after.hwm_kb)
    );
    println!();
    daemon.stop();
    let rss = mb(after.rss_kb);
    verdicts.push(Verdict {
        what: format!(
            "c) daemon VmRSS with {} channels ({} got a sample)",
            p.mem_channels, r.received
        ),
        measured: format!("{rss:.1} MB"),
        target: "< 200 MB".into(),
        pass: rss < 200.0 && after.rss_kb > 0,
    });
    Ok(())
}

/// Seconds since the Unix epoch, read from a monotonic clock: the wall clock at the start plus the elapsed time.
/// Sample times are strictly increasing per channel (the daemon drops a sample older than the last), and the
/// receiver's latency is `now - time` on the same clock. An f64 near 1.8e9 s resolves 0.24 µs.
#[derive(Clone, Copy)]
struct Clock {
    start: Instant,
    base: f64,
}

impl Clock {
    fn new() -> Clock {
        let base = SystemTime::now()
            .duration_since(UNIX_EPOCH)
            .map_or(0.0, |d| d.as_secs_f64());
        Clock {
            start: Instant::now(),
            base,
        }
    }

    fn now(&self) -> f64 {
        self.base + self.start.elapsed().as_secs_f64()
    }
}

/// What the receiver has seen since the last `take`.
struct Tally {
    latency: Histogram<u64>,
    not_ok: u64,
    unreadable: u64,
}

impl Tally {
    fn new() -> Tally {
        Tally {
            // Microseconds, 1 µs to 10 min, 3 significant digits.
            latency: Histogram::new_with_bounds(1, 600_000_000, 3).expect("histogram bounds"),
            not_ok: 0,
            unreadable: 0,
        }
    }
}

/// One MQTT client that subscribes to the outputs of the daemon and of the relay, and to the daemons' status.
struct Receiver {
    received: Arc<AtomicU64>,
    tally: Arc<Mutex<Tally>>,
    status: mpsc::Receiver<(String, String)>,
    client: Client,
    stop: Arc<AtomicBool>,
    thread: Option<JoinHandle<()>>,
}

impl Receiver {
    fn start(port: u16, clock: Clock, nodelay: bool) -> Result<Receiver, String> {
        let (client, mut connection) = Client::new(options("gwbench-receiver", port), 10_000);
        set_nodelay(&mut connection, nodelay);
        let received = Arc::new(AtomicU64::new(0));
        let tally = Arc::new(Mutex::new(Tally::new()));
        let (status_tx, status) = mpsc::channel();
        let stop = Arc::new(AtomicBool::new(false));
        let acks = Arc::new(AtomicU64::new(0));
        let thread = {
            let (received, tally, stop, acks) =
                (received.clone(), tally.clone(), stop.clone(), acks.clone());
            let status_prefix = format!("{STATUS_ROOT}/");
            thread::Builder::new()
                .name("gwbench-receiver".into())
                .spawn(move || {
                    while !stop.load(Ordering::Relaxed) {
                        match connection.recv_timeout(Duration::from_millis(100)) {
                            Ok(Ok(Event::Incoming(Packet::Publish(m)))) => {
                                if m.topic.starts_with(&status_prefix) {
                                    let text = String::from_utf8_lossy(&m.payload).into_owned();
                                    let _ = status_tx.send((m.topic, text));
                                    continue;
                                }
                                let now = clock.now();
                                received.fetch_add(1, Ordering::Relaxed);
                                let mut t = tally.lock().expect("tally lock");
                                match payload_time(&m.payload) {
                                    Some(sent) => {
                                        let us = ((now - sent) * 1e6).round().max(1.0) as u64;
                                        t.latency.saturating_record(us);
                                    }
                                    None => t.unreadable += 1,
                                }
                                if m.topic.starts_with("gwbench/out/")
                                    && !contains(&m.payload, b"\"status\":\"ok\"")
                                {
                                    t.not_ok += 1;
                                }
                            }
                            Ok(Ok(Event::Incoming(Packet::SubAck(_)))) => {
                                acks.fetch_add(1, Ordering::Relaxed);
                            }
                            Ok(Ok(_)) | Err(rumqttc::RecvTimeoutError::Timeout) => {}
                            Ok(Err(_)) => thread::sleep(Duration::from_millis(100)),
                            Err(_) => break,
                        }
                    }
                })
                .map_err(|e| format!("receiver thread: {e}"))?
        };
        let receiver = Receiver {
            received,
            tally,
            status,
            client,
            stop,
            thread: Some(thread),
        };
        for filter in [
            DAEMON_OUT_FILTER,
            RELAY_OUT_FILTER,
            &format!("{STATUS_ROOT}/#"),
        ] {
            // QoS 1 here only caps the delivery at the publisher's QoS: QoS 0 outputs still arrive at QoS 0.
            receiver
                .client
                .subscribe(filter, QoS::AtLeastOnce)
                .map_err(|e| format!("subscribe {filter}: {e}"))?;
        }
        if !wait_for(READY, || acks.load(Ordering::Relaxed) >= 3) {
            return Err(format!(
                "the receiver got no SUBACKs from 127.0.0.1:{port} within {READY:?}"
            ));
        }
        Ok(receiver)
    }

    fn received(&self) -> u64 {
        self.received.load(Ordering::Relaxed)
    }

    fn take(&self) -> Tally {
        std::mem::replace(&mut *self.tally.lock().expect("tally lock"), Tally::new())
    }

    /// Waits for a status message on `topic` whose payload contains `word`.
    fn wait_status(&self, topic: &str, word: &str, timeout: Duration) -> bool {
        let deadline = Instant::now() + timeout;
        loop {
            let left = deadline.saturating_duration_since(Instant::now());
            match self.status.recv_timeout(left) {
                Ok((t, text)) if t == topic && text.contains(word) => return true,
                Ok(_) => {}
                Err(_) => return false,
            }
        }
    }
}

impl Drop for Receiver {
    fn drop(&mut self) {
        let _ = self.client.try_disconnect();
        thread::sleep(Duration::from_millis(20));
        self.stop.store(true, Ordering::Relaxed);
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

/// The time a sample was sent: `time` in a daemon output, `t` in a relayed input.
fn payload_time(payload: &[u8]) -> Option<f64> {
    let rest = after(payload, b"\"time\":").or_else(|| after(payload, b"\"t\":"))?;
    let end = rest
        .iter()
        .position(|b| *b == b',' || *b == b'}')
        .unwrap_or(rest.len());
    std::str::from_utf8(&rest[..end]).ok()?.trim().parse().ok()
}

fn after<'a>(haystack: &'a [u8], needle: &[u8]) -> Option<&'a [u8]> {
    haystack
        .windows(needle.len())
        .position(|w| w == needle)
        .map(|i| &haystack[i + needle.len()..])
}

fn contains(haystack: &[u8], needle: &[u8]) -> bool {
    after(haystack, needle).is_some()
}

/// One MQTT client that publishes the samples; its event loop runs on a thread of its own.
struct Publisher {
    client: Client,
    stop: Arc<AtomicBool>,
    thread: Option<JoinHandle<()>>,
}

impl Publisher {
    fn start(port: u16, nodelay: bool) -> Result<Publisher, String> {
        let mut o = options("gwbench-publisher", port);
        // Enough QoS 1 publishes in flight that the broker's round trip does not pace a QoS 1 run.
        o.set_inflight(1000);
        let (client, mut connection) = Client::new(o, 10_000);
        set_nodelay(&mut connection, nodelay);
        let stop = Arc::new(AtomicBool::new(false));
        let connected = Arc::new(AtomicBool::new(false));
        let thread = {
            let (stop, connected) = (stop.clone(), connected.clone());
            thread::Builder::new()
                .name("gwbench-publisher".into())
                .spawn(move || {
                    while !stop.load(Ordering::Relaxed) {
                        match connection.recv_timeout(Duration::from_millis(100)) {
                            Ok(Ok(Event::Incoming(Packet::ConnAck(_)))) => {
                                connected.store(true, Ordering::Relaxed)
                            }
                            Ok(Ok(_)) | Err(rumqttc::RecvTimeoutError::Timeout) => {}
                            Ok(Err(_)) => thread::sleep(Duration::from_millis(100)),
                            Err(_) => break,
                        }
                    }
                })
                .map_err(|e| format!("publisher thread: {e}"))?
        };
        if !wait_for(READY, || connected.load(Ordering::Relaxed)) {
            return Err(format!("the publisher did not connect to 127.0.0.1:{port}"));
        }
        Ok(Publisher {
            client,
            stop,
            thread: Some(thread),
        })
    }
}

impl Drop for Publisher {
    fn drop(&mut self) {
        let _ = self.client.try_disconnect();
        thread::sleep(Duration::from_millis(20));
        self.stop.store(true, Ordering::Relaxed);
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

/// rumqttc leaves Nagle's algorithm on: a small publish may wait for the ACK of the previous one.
fn set_nodelay(connection: &mut Connection, nodelay: bool) {
    let mut n = NetworkOptions::new();
    n.set_tcp_nodelay(nodelay);
    connection.eventloop.set_network_options(n);
}

fn options(id: &str, port: u16) -> MqttOptions {
    let mut o = MqttOptions::new(format!("{id}-{}", std::process::id()), "127.0.0.1", port);
    o.set_keep_alive(Duration::from_secs(30))
        .set_clean_session(true)
        .set_max_packet_size(MAX_PACKET_SIZE, MAX_PACKET_SIZE);
    o
}

/// The null relay on `RELAY_IN`, and the id of its thread (whose CPU time is its cost).
struct Relay {
    relay: NullRelay,
    tid: u32,
}

impl Relay {
    fn start(port: u16, qos: QoS) -> Result<Relay, String> {
        let before = relay_threads();
        let relay = null_relay(
            "127.0.0.1",
            port,
            &format!("{RELAY_IN}/+"),
            RELAY_PREFIX,
            qos,
        )
        .map_err(|e| e.to_string())?;
        let tid = relay_threads()
            .into_iter()
            .find(|t| !before.contains(t))
            .ok_or("cannot find the null relay's thread in /proc/self/task")?;
        Ok(Relay { relay, tid })
    }

    fn stop(self) {
        self.relay.stop();
    }
}

/// Threads of this process named as the null relay's (the kernel keeps the first 15 bytes of a name).
fn relay_threads() -> Vec<u32> {
    let Ok(dir) = std::fs::read_dir("/proc/self/task") else {
        return Vec::new();
    };
    dir.filter_map(|e| e.ok())
        .filter_map(|e| {
            let comm = std::fs::read_to_string(e.path().join("comm")).ok()?;
            comm.starts_with("gaugewise-null")
                .then(|| e.file_name().to_str()?.parse().ok())
                .flatten()
        })
        .collect()
}

/// A `gaugewise run` process with a generated configuration in a scratch directory; killed if not stopped.
struct Daemon {
    child: Option<Child>,
    log: PathBuf,
    _dir: tempfile::TempDir,
}

impl Daemon {
    fn start(ctx: &Ctx, qos: QoS, max_channels: usize) -> Result<Daemon, String> {
        static NEXT: AtomicU64 = AtomicU64::new(0);
        let client_id = format!(
            "gwbench-daemon-{}-{}",
            std::process::id(),
            NEXT.fetch_add(1, Ordering::Relaxed)
        );
        let status = format!("{STATUS_ROOT}/{client_id}");
        let q = qos_number(qos);
        let config = format!(
            r#"# Generated by benches/daemon_e2e.rs: loopback broker, one JSON input per sample, no stale reports.
[broker]
host = "127.0.0.1"
port = {port}
client_id = "{client_id}"
clean_session = true
keep_alive_s = 30

[[inputs]]
topic = "{DAEMON_IN}/+"
channel = "{{2}}"
qos = {q}
payload = "json"
value = "/v"
time = "/t"
time_format = "epoch_s"

[output]
topic = "gwbench/out/{{channel}}"
qos = {q}

[status]
topic = "{status}"

[timing]
stale_after_s = 0

[limits]
max_channels = {max_channels}

[channels.default]
model = "level"
interval = 1.0
obs_var = 0.25
level_var = 0.01
"#,
            port = ctx.port
        );
        let dir = tempfile::Builder::new()
            .prefix("gwbench-daemon-")
            .tempdir()
            .map_err(|e| format!("scratch directory: {e}"))?;
        let path = dir.path().join("daemon.toml");
        std::fs::write(&path, config).map_err(|e| format!("{}: {e}", path.display()))?;
        let log = dir.path().join("daemon.log");
        let log_file =
            std::fs::File::create(&log).map_err(|e| format!("{}: {e}", log.display()))?;
        let mut command = Command::new(ctx.daemon_bin);
        command
            .args(["run", "--config"])
            .arg(&path)
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(log_file);
        // The daemon reads GAUGEWISE_* as configuration overrides: none of the caller's may leak in.
        for (key, _) in std::env::vars_os() {
            if key.to_string_lossy().starts_with("GAUGEWISE_") {
                command.env_remove(key);
            }
        }
        command.env("GAUGEWISE_LOG", "info").env_remove("RUST_LOG");
        let child = command
            .spawn()
            .map_err(|e| format!("{}: {e}", ctx.daemon_bin.display()))?;
        let daemon = Daemon {
            child: Some(child),
            log,
            _dir: dir,
        };
        if !ctx.receiver.wait_status(&status, "\"online\"", READY) {
            return Err(format!(
                "the daemon did not report online within {READY:?}; its log:\n{}",
                daemon.log()
            ));
        }
        Ok(daemon)
    }

    fn pid(&self) -> u32 {
        self.child.as_ref().map_or(0, |c| c.id())
    }

    fn log(&self) -> String {
        std::fs::read_to_string(&self.log).unwrap_or_default()
    }

    /// SIGTERM, then up to 6 s for a clean exit; prints the daemon's warnings and errors, if any.
    fn stop(mut self) {
        let Some(mut child) = self.child.take() else {
            return;
        };
        send_signal(child.id(), "TERM");
        let clean = wait_for(Duration::from_secs(6), || {
            matches!(child.try_wait(), Ok(Some(_)))
        });
        if !clean {
            let _ = child.kill();
            println!("   note: the daemon did not exit within 6 s of SIGTERM; killed");
        }
        let _ = child.wait();
        let log = self.log();
        let noteworthy: Vec<&str> = log
            .lines()
            .filter(|l| l.contains("WARN") || l.contains("ERROR"))
            .collect();
        if !noteworthy.is_empty() {
            println!("   daemon log, warnings and errors ({}):", noteworthy.len());
            for line in noteworthy.iter().take(5) {
                println!("     {line}");
            }
        }
    }
}

impl Drop for Daemon {
    fn drop(&mut self) {
        if let Some(mut child) = self.child.take() {
            let _ = child.kill();
            let _ = child.wait();
        }
    }
}

/// GWBENCH_DAEMON if set (to compare another build), else the `gaugewise` binary cargo built for this bench
/// (release profile), else target/release/gaugewise.
fn daemon_binary() -> Result<PathBuf, String> {
    if let Some(path) = std::env::var_os("GWBENCH_DAEMON") {
        let path = PathBuf::from(path);
        return if path.is_file() {
            Ok(path)
        } else {
            Err(format!("GWBENCH_DAEMON={}: no such file", path.display()))
        };
    }
    let built = PathBuf::from(env!("CARGO_BIN_EXE_gaugewise"));
    if built.is_file() {
        return Ok(built);
    }
    let fallback = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/release/gaugewise");
    if fallback.is_file() {
        return Ok(fallback);
    }
    Err("no gaugewise binary: run `cargo build --release` first".into())
}

enum Pace {
    /// Keep at most this many samples without their output, publishing as fast as that allows.
    Window(u64),
    /// Samples per second, spread evenly.
    Rate(f64),
}

struct Drive<'a> {
    /// Samples go round these topics, one after the other.
    topics: &'a [String],
    pace: Pace,
    qos: QoS,
    /// Not counted in the figures of the window.
    warmup: Duration,
    /// Measured seconds after the warm-up (None: until `count` samples are sent).
    measure: Option<Duration>,
    count: Option<u64>,
}

/// CPU and output counts over the measured window of a drive.
#[derive(Default)]
struct Window {
    secs: f64,
    sent: u64,
    outputs: u64,
    subject_ticks: u64,
    broker_ticks: Option<u64>,
    bench_ticks: u64,
}

impl Window {
    fn cpu_us_per_output(&self, ticks_per_s: f64) -> f64 {
        self.subject_ticks as f64 / ticks_per_s * 1e6 / self.outputs.max(1) as f64
    }

    /// Percent of one core.
    fn share(&self, ticks: u64, ticks_per_s: f64) -> f64 {
        ticks as f64 / ticks_per_s / self.secs.max(1e-9) * 100.0
    }
}

#[derive(Default)]
struct Totals {
    secs: f64,
    outputs: u64,
    ticks: u64,
}

impl Totals {
    fn add(&mut self, w: &Window) {
        self.secs += w.secs;
        self.outputs += w.outputs;
        self.ticks += w.subject_ticks;
    }
}

struct DriveResult {
    /// Over the whole drive, warm-up and drain included.
    sent: u64,
    received: u64,
    window: Window,
    /// Latency of the outputs received in the measured window and the drain.
    latency: Histogram<u64>,
    /// Times the closed loop gave up waiting for outstanding outputs.
    stalls: u64,
    not_ok: u64,
    unreadable: u64,
}

impl DriveResult {
    fn lost(&self) -> u64 {
        self.sent.saturating_sub(self.received)
    }
}

struct Probe {
    at: Instant,
    sent: u64,
    received: u64,
    subject: u64,
    broker: Option<u64>,
    bench: u64,
}

/// Publishes samples as `drive` says, waits for the outputs, and measures the window after the warm-up.
fn drive(ctx: &Ctx, d: &Drive, subject: Subject) -> DriveResult {
    let rx = ctx.receiver;
    let base = rx.received();
    let probe = |sent: u64| Probe {
        at: Instant::now(),
        sent,
        received: rx.received() - base,
        subject: subject.ticks(),
        broker: ctx
            .broker_pid
            .and_then(|pid| stat_ticks(&format!("/proc/{pid}/stat"))),
        bench: stat_ticks("/proc/self/stat").unwrap_or(0),
    };
    let _ = rx.take();
    let start = Instant::now();
    let measure_from = start + d.warmup;
    let end = d.measure.map(|m| measure_from + m);
    let mut sent: u64 = 0;
    let mut first: Option<Probe> = if d.warmup.is_zero() {
        Some(probe(0))
    } else {
        None
    };
    let mut payload = String::with_capacity(64);
    // A closed loop would stall for good on one lost sample: after a pause with no output it stops waiting for
    // what is outstanding (counted as `stalls`; the lost samples show in `lost`).
    let mut forgiven: u64 = 0;
    let mut stalls: u64 = 0;
    let mut progress = (rx.received(), Instant::now());
    loop {
        let now = Instant::now();
        if first.is_none() && now >= measure_from {
            first = Some(probe(sent));
            let _ = rx.take();
        }
        if end.is_some_and(|e| now >= e) || d.count.is_some_and(|c| sent >= c) {
            break;
        }
        let received = rx.received();
        if received != progress.0 {
            progress = (received, now);
        }
        let allowed = match d.pace {
            Pace::Window(w) => {
                if sent >= received - base + forgiven + w && now - progress.1 > STALL {
                    forgiven = sent - (received - base);
                    stalls += 1;
                    progress.1 = now;
                }
                received - base + forgiven + w
            }
            Pace::Rate(r) => ((now - start).as_secs_f64() * r) as u64 + 1,
        };
        let allowed = d.count.map_or(allowed, |c| allowed.min(c));
        if sent >= allowed {
            thread::sleep(Duration::from_micros(200));
            continue;
        }
        // A short burst, then back to the clock: at most ~1 ms of samples at a time.
        for _ in 0..(allowed - sent).min(64) {
            let topic = &d.topics[(sent % d.topics.len() as u64) as usize];
            payload.clear();
            let value = 50.0 + ((sent.wrapping_mul(2_654_435_761) % 1000) as f64) / 500.0;
            let _ = write!(payload, "{{\"v\":{value:.3},\"t\":{}}}", ctx.clock.now());
            if ctx
                .publisher
                .client
                .publish(topic.as_str(), d.qos, false, payload.as_bytes().to_vec())
                .is_err()
            {
                break;
            }
            sent += 1;
        }
    }
    let last = probe(sent);
    let first = first.unwrap_or_else(|| probe(0));

    // Stragglers: until everything is answered, nothing has come for DRAIN_QUIET, or DRAIN_MAX.
    let drain_end = Instant::now() + DRAIN_MAX;
    let mut seen = rx.received();
    let mut quiet_since = Instant::now();
    while rx.received() - base < sent && Instant::now() < drain_end {
        thread::sleep(Duration::from_millis(10));
        let now_seen = rx.received();
        if now_seen != seen {
            seen = now_seen;
            quiet_since = Instant::now();
        } else if quiet_since.elapsed() >= DRAIN_QUIET {
            break;
        }
    }
    let tally = rx.take();
    DriveResult {
        sent,
        received: rx.received() - base,
        window: Window {
            secs: (last.at - first.at).as_secs_f64(),
            sent: last.sent - first.sent,
            outputs: last.received - first.received,
            subject_ticks: last.subject.saturating_sub(first.subject),
            broker_ticks: last
                .broker
                .zip(first.broker)
                .map(|(l, f)| l.saturating_sub(f)),
            bench_ticks: last.bench.saturating_sub(first.bench),
        },
        latency: tally.latency,
        stalls,
        not_ok: tally.not_ok,
        unreadable: tally.unreadable,
    }
}

fn topics(prefix: &str, n: usize) -> Vec<String> {
    (0..n).map(|i| format!("{prefix}/ch{i:06}")).collect()
}

/// utime + stime, in clock ticks, from a /proc/.../stat file.
fn stat_ticks(path: &str) -> Option<u64> {
    let text = std::fs::read_to_string(path).ok()?;
    // The command name (field 2) may hold spaces; the fields after its closing parenthesis start at field 3.
    let rest = &text[text.rfind(')')? + 1..];
    let fields: Vec<&str> = rest.split_whitespace().collect();
    let utime: u64 = fields.get(11)?.parse().ok()?;
    let stime: u64 = fields.get(12)?.parse().ok()?;
    Some(utime + stime)
}

#[derive(Clone, Copy)]
enum Tick {
    Getconf(f64),
    Assumed(f64),
}

impl Tick {
    fn value(self) -> f64 {
        match self {
            Tick::Getconf(t) | Tick::Assumed(t) => t,
        }
    }
}

fn clock_ticks() -> Tick {
    Command::new("getconf")
        .arg("CLK_TCK")
        .output()
        .ok()
        .and_then(|o| String::from_utf8(o.stdout).ok())
        .and_then(|s| s.trim().parse::<f64>().ok())
        .filter(|t| *t > 0.0)
        .map_or(Tick::Assumed(100.0), Tick::Getconf)
}

#[derive(Default)]
struct Memory {
    rss_kb: u64,
    hwm_kb: u64,
}

/// VmRSS and VmHWM of a process, in kB (0 when unreadable).
fn memory(pid: u32) -> Memory {
    let text = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap_or_default();
    let field = |name: &str| {
        text.lines()
            .find_map(|l| l.strip_prefix(name))
            .and_then(|v| v.split_whitespace().next()?.parse().ok())
            .unwrap_or(0)
    };
    Memory {
        rss_kb: field("VmRSS:"),
        hwm_kb: field("VmHWM:"),
    }
}

fn mb(kb: u64) -> f64 {
    kb as f64 / 1024.0
}

fn qos_number(q: QoS) -> u8 {
    match q {
        QoS::AtMostOnce => 0,
        QoS::AtLeastOnce => 1,
        QoS::ExactlyOnce => 2,
    }
}

fn mosquitto_version() -> String {
    broker::mosquitto_binary()
        .and_then(|bin| Command::new(bin).arg("-h").output().ok())
        .and_then(|o| {
            let text = String::from_utf8_lossy(&o.stdout).into_owned();
            text.lines().next().map(|l| l.trim().to_string())
        })
        .filter(|l| !l.is_empty())
        .unwrap_or_else(|| "Mosquitto".into())
}

fn wait_for(timeout: Duration, mut done: impl FnMut() -> bool) -> bool {
    let deadline = Instant::now() + timeout;
    loop {
        if done() {
            return true;
        }
        if Instant::now() >= deadline {
            return false;
        }
        thread::sleep(Duration::from_millis(10));
    }
}
