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
//! - c) memory: a fresh daemon gets one sample on each of 100,000 channels; its resident memory afterwards;
//! - d) re-estimation (issue 5): the latency of case b at 20,000 samples/s over 1,000 channels through two daemons,
//!   one whose 1,000 channels refit their 2,000-sample windows every 60 s and one without re-estimation. By default
//!   (`GWBENCH_REEST_MODE=alternating`) both run for the whole case, each on its own input topics, and the publisher
//!   feeds one of them at a time in 60 s blocks (on, off, off, on, on, off after the warm-up): the machine carries
//!   one daemon's load at any moment and both are measured interleaved in time; p99 on / off per pair and pooled.
//!   Not in the default set (about nine minutes: windows take 100 s to fill). `paired` runs both daemons on the
//!   same inputs at once (twice the broker's load: it saturates a 2-core machine), `sequential` one daemon after
//!   the other (off, on, off). A comparison measured under saturation is no comparison: every case-d verdict is
//!   FAIL when samples were lost, the sent rate fell short or the median latency shows queueing.
//!
//! The sample's time field carries its send time, read from one monotonic clock shifted to the epoch; the daemon
//! copies it into its output's `time`, the relay leaves the payload as it is, so the receiver reads the latency
//! off every message with no table of sent messages. The publisher and the receiver are minimal MQTT clients of
//! the bench's own (`raw`), cheap enough to leave the CPU to what is measured. The figures are printed with the
//! targets of issues 3 and 5; the bench never fails on a miss (timings on a shared machine are not a pass/fail
//! matter).

#[allow(dead_code)]
#[path = "../tests/common/broker.rs"]
mod broker;

use broker::send_signal;
use gaugewise::broker::{null_relay, EmbeddedBroker, NullRelay, MAX_PACKET_SIZE};
use hdrhistogram::Histogram;
use rumqttc::QoS;
use std::cell::RefCell;
use std::fmt::Write as _;
use std::io::{self, Read, Write};
use std::net::TcpStream;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::str::FromStr;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{mpsc, Arc, Mutex};
use std::thread::{self, JoinHandle};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

/// Inputs of the daemon: `gwbench/in/<channel>`; its outputs: `gwbench/out/<channel>`.
const DAEMON_IN: &str = "gwbench/in";
/// Inputs of case d's two daemons, one without re-estimation and one with: both stay connected, and a daemon must
/// not filter the other's samples.
const OFF_IN: &str = "gwbench/in-off";
const ON_IN: &str = "gwbench/in-on";
const DAEMON_OUT: &str = "gwbench/out";
const DAEMON_OUT_FILTER: &str = "gwbench/out/#";
/// Case d, paired: both daemons subscribe to these inputs; each publishes under the output prefix of its slot.
/// Slot 0 is the daemon started (and subscribed) first.
const PAIR_IN: &str = "gwbench/in-pair";
const PAIR_OUT: [&str; 2] = ["gwbench/out/slot0", "gwbench/out/slot1"];
/// Case d, alternating: each daemon's own inputs and outputs, indexed by `ON` (the re-estimating daemon) and `OFF`.
/// Neither ever sees the other's samples, so the one not being fed idles.
const ALT_IN: [&str; 2] = ["gwbench/in/a", "gwbench/in/b"];
const ALT_OUT: [&str; 2] = ["gwbench/out/a", "gwbench/out/b"];
const ON: usize = 0;
const OFF: usize = 1;
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
    /// GWBENCH_CASES=abc: which cases to run (d, re-estimation, only when asked for).
    cases: String,
    /// GWBENCH_BROKER=auto|mosquitto|embedded: auto takes Mosquitto when installed, else the embedded broker.
    broker: String,
    /// GWBENCH_CHANNELS=1000: channels of cases a and b.
    channels: usize,
    /// GWBENCH_ROUNDS=3: relay/daemon alternations in case a.
    rounds: usize,
    /// GWBENCH_WARMUP_S=1: not measured at the start of each case a/b run.
    warmup: Duration,
    /// GWBENCH_MAX_S=4: measured seconds per case a run.
    max_secs: Duration,
    /// GWBENCH_WINDOW=5000: samples in flight (sent, output not yet received) in case a.
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
    /// GWBENCH_REEST_WINDOW=2000: samples in each channel's re-estimation window in case d.
    reest_window: usize,
    /// GWBENCH_REEST_EVERY_S=60: seconds between two re-estimations of one channel in case d.
    reest_every: f64,
    /// GWBENCH_REEST_ON_S=120: measured seconds with re-estimation on, once the windows are full (paired: of each
    /// repetition, both daemons). A whole number of periods (`reest_every`), so the measurement holds each channel's
    /// fits as often as a day of running would.
    reest_on_secs: Duration,
    /// GWBENCH_REEST_OFF_S=30: measured seconds of each of the two runs with re-estimation off (sequential only).
    reest_off_secs: Duration,
    /// GWBENCH_REEST_MODE=alternating|paired|sequential: case d feeds two daemons in turns, block by block
    /// (alternating), runs them at once on the same inputs (paired), or one after the other (off, on, off).
    reest_mode: ReestMode,
    /// GWBENCH_REEST_REPS=2: paired repetitions, each with fresh daemons; the second swaps the daemons' slots
    /// (start order, output prefix), the third swaps them back, and so on.
    reest_reps: usize,
    /// GWBENCH_REEST_BLOCK_S=60: alternating only: whole seconds each daemon is fed before the publisher switches.
    reest_block_s: u64,
    /// GWBENCH_REEST_PAIRS=3: alternating only: measured pairs of blocks (one on, one off) after the warm-up.
    reest_pairs: usize,
    /// GWBENCH_REEST_SKIP_S=0: alternating only: seconds at the start of every block left out of the measurement
    /// (0 by default: the on daemon's fit round starts with its block, and the target counts it).
    reest_skip: f64,
}

/// How case d runs its two daemons (`GWBENCH_REEST_MODE`).
#[derive(Clone, Copy, PartialEq)]
enum ReestMode {
    Alternating,
    Paired,
    Sequential,
}

impl Params {
    fn from_env() -> Result<Params, String> {
        let p = Params {
            cases: env_or("GWBENCH_CASES", "abc".to_string())?,
            broker: env_or("GWBENCH_BROKER", "auto".to_string())?,
            channels: env_or("GWBENCH_CHANNELS", 1000)?,
            rounds: env_or("GWBENCH_ROUNDS", 3)?,
            warmup: Duration::from_secs_f64(env_or("GWBENCH_WARMUP_S", 1.0)?),
            max_secs: Duration::from_secs_f64(env_or("GWBENCH_MAX_S", 4.0)?),
            window: env_or("GWBENCH_WINDOW", 5000)?,
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
            reest_window: env_or("GWBENCH_REEST_WINDOW", 2000)?,
            reest_every: env_or("GWBENCH_REEST_EVERY_S", 60.0)?,
            reest_on_secs: Duration::from_secs_f64(env_or("GWBENCH_REEST_ON_S", 120.0)?),
            reest_off_secs: Duration::from_secs_f64(env_or("GWBENCH_REEST_OFF_S", 30.0)?),
            reest_mode: match env_or("GWBENCH_REEST_MODE", "alternating".to_string())?.as_str() {
                "alternating" => ReestMode::Alternating,
                "paired" => ReestMode::Paired,
                "sequential" => ReestMode::Sequential,
                m => {
                    return Err(format!(
                        "GWBENCH_REEST_MODE must be alternating, paired or sequential, not {m:?}"
                    ))
                }
            },
            reest_reps: env_or("GWBENCH_REEST_REPS", 2)?,
            reest_block_s: env_or("GWBENCH_REEST_BLOCK_S", 60)?,
            reest_pairs: env_or("GWBENCH_REEST_PAIRS", 3)?,
            reest_skip: env_or("GWBENCH_REEST_SKIP_S", 0.0)?,
        };
        if !(1..=20).contains(&p.reest_reps) || !(1..=20).contains(&p.reest_pairs) {
            return Err("GWBENCH_REEST_REPS and GWBENCH_REEST_PAIRS must be 1..20".into());
        }
        if !(p.reest_skip.is_finite() && p.reest_skip >= 0.0)
            || p.reest_skip + 1.0 > p.reest_block_s as f64
        {
            return Err(
                "GWBENCH_REEST_SKIP_S must be >= 0 and leave at least 1 s of each GWBENCH_REEST_BLOCK_S".into(),
            );
        }
        // The daemon refuses a window shorter than `min_samples`, which the bench leaves at its default.
        let min_window = reest_min_samples().max(20);
        if !(min_window..=1_000_000).contains(&p.reest_window)
            || !p.reest_every.is_finite()
            || p.reest_every <= 0.0
        {
            return Err(format!(
                "GWBENCH_REEST_WINDOW must be {min_window}..1000000 and GWBENCH_REEST_EVERY_S positive"
            ));
        }
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
             the targets assume Mosquitto; this broker runs inside the bench, so its CPU counts in bench %)"
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
    let publisher = Mutex::new(Publisher::start(port, p.client_nodelay)?);
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
    if p.case('d') {
        match p.reest_mode {
            ReestMode::Alternating => case_reestimate_alternating(&ctx, p, &mut verdicts)?,
            ReestMode::Paired => case_reestimate_paired(&ctx, p, &mut verdicts)?,
            ReestMode::Sequential => case_reestimate(&ctx, p, &mut verdicts)?,
        }
    }

    println!(
        "Targets (issues 3 and 5; informational: the bench never fails on a miss. FAIL: the run was no valid \
         measurement of the target)"
    );
    println!(
        "  {:<58} {:>12} {:>12}  result",
        "target", "measured", "target"
    );
    for v in &verdicts {
        let result = match (&v.invalid, v.pass) {
            (Some(why), _) => format!("FAIL (invalid: {why})"),
            (None, true) => "pass".into(),
            (None, false) => "MISS".into(),
        };
        println!(
            "  {:<58} {:>12} {:>12}  {result}",
            v.what, v.measured, v.target,
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
    /// Behind a lock only because the driver needs it mutable through a shared context.
    publisher: &'a Mutex<Publisher>,
    broker_pid: Option<u32>,
    ticks_per_s: f64,
    daemon_bin: &'a Path,
}

struct Verdict {
    what: String,
    measured: String,
    target: String,
    pass: bool,
    /// Why the figure measures something else than the target (case d under saturation); printed as FAIL.
    invalid: Option<String>,
}

/// Case d's validity criteria (issue 5's review of the paired run, whose saturated repetition had p50 15 s yet
/// printed "pass" for p99 on / off 1.00). A comparison of tails means nothing once every sample queues: lost
/// samples, a publisher below 97% of the asked rate, or a median over 50 ms (case b's is about 0.13 ms on the
/// shared 2-core machine, benches/README.md) all say the machine, not the daemon, set the latency.
const VALID_RATE_SHARE: f64 = 0.97;
const VALID_P50_MS: f64 = 50.0;

/// The reasons a case-d run is no measurement, or None when it is one.
fn invalid_reason(
    lost: u64,
    sent_rate: f64,
    target_rate: f64,
    worst_p50_ms: f64,
) -> Option<String> {
    let mut why = Vec::new();
    if lost > 0 {
        why.push(format!("{lost} samples lost"));
    }
    if sent_rate < VALID_RATE_SHARE * target_rate {
        why.push(format!(
            "sent rate {sent_rate:.0}/s below {:.0}% of the target {target_rate:.0}/s",
            VALID_RATE_SHARE * 100.0
        ));
    }
    if worst_p50_ms > VALID_P50_MS || worst_p50_ms.is_nan() {
        why.push(format!(
            "p50 {worst_p50_ms:.1} ms over {VALID_P50_MS:.0} ms (queueing)"
        ));
    }
    (!why.is_empty()).then(|| why.join(", "))
}

/// The daemon's default `min_samples`, which the bench's configuration leaves as it is: no fit runs before a window
/// holds that many usable samples, and the daemon refuses a shorter window.
fn reest_min_samples() -> usize {
    gaugewise::reestimate::LearnSettings::default().min_samples
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

    /// Context switches (voluntary and not) so far: of every thread of the daemon, or of the one thread. Threads
    /// that have ended no longer count, which is fine for a daemon whose threads live as long as it does.
    fn switches(self) -> u64 {
        let tasks = match self {
            Subject::Daemon(pid) => std::fs::read_dir(format!("/proc/{pid}/task"))
                .map(|d| {
                    d.filter_map(|e| e.ok())
                        .map(|e| e.path().join("status"))
                        .collect()
                })
                .unwrap_or_default(),
            Subject::Thread(tid) => vec![PathBuf::from(format!("/proc/self/task/{tid}/status"))],
        };
        tasks
            .iter()
            .filter_map(|path| std::fs::read_to_string(path).ok())
            .map(|text| {
                text.lines()
                    .filter(|l| l.contains("ctxt_switches:"))
                    .filter_map(|l| l.split_whitespace().nth(1)?.parse::<u64>().ok())
                    .sum::<u64>()
            })
            .sum()
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
        "   {:<6} {:<7} {:>10} {:>14} {:>10} {:>5} {SHARES_HEADER}",
        "round", "case", "outputs/s", "CPU µs/output", "switch/out", "lost"
    );
    ctx.receiver.batch_reads(true);
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
                    signal: None,
                    at_measure: None,
                    fanout: 1,
                    watch: &[],
                },
                subject,
            );
            let w = &r.window;
            println!(
                "   {:<6} {:<7} {:>10.0} {:>14.2} {:>10.2} {:>5} {}",
                round,
                name,
                w.outputs as f64 / w.secs,
                w.cpu_us_per_output(ctx.ticks_per_s),
                w.switches_per_output(),
                r.lost(),
                w.shares(ctx.ticks_per_s),
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
    println!("{SHARES_NOTE}");
    println!();
    let ratio = daemon_rate / relay_rate;
    verdicts.push(Verdict {
        what: format!("a) daemon/relay outputs/s, {} channels, QoS 0", p.channels),
        measured: format!("{ratio:.3}"),
        target: ">= 0.95".into(),
        pass: ratio >= 0.95,
        invalid: None,
    });
    let cpu_ratio = daemon_cpu / relay_cpu;
    verdicts.push(Verdict {
        what: format!("a) daemon/relay CPU per output ({daemon_cpu:.1} / {relay_cpu:.1} µs)"),
        measured: format!("{cpu_ratio:.2}"),
        target: "<= 1.5".into(),
        pass: cpu_ratio <= 1.5,
        invalid: None,
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
        "   {:<7} {:>7} {:>7} {:>5} {:>7} {:>7} {:>8} {:>7} {:>10} {:>10} {SHARES_HEADER}",
        "case",
        "sent/s",
        "sent",
        "lost",
        "p50 ms",
        "p99 ms",
        "p99.9 ms",
        "max ms",
        "CPU µs/out",
        "switch/out"
    );
    ctx.receiver.batch_reads(false);
    let mut daemon_result = None;
    let mut slow = Vec::new();
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
                signal: None,
                at_measure: None,
                fanout: 1,
                watch: &[],
            },
            subject,
        );
        let h = &r.tally.latency;
        let ms = |q: f64| h.value_at_quantile(q) as f64 / 1000.0;
        let w = &r.window;
        println!(
            "   {:<7} {:>7.0} {:>7} {:>5} {:>7.3} {:>7.3} {:>8.3} {:>7.1} {:>10.2} {:>10.2} {}",
            name,
            w.sent as f64 / w.secs,
            r.sent,
            r.lost(),
            ms(0.5),
            ms(0.99),
            ms(0.999),
            h.max() as f64 / 1000.0,
            w.cpu_us_per_output(ctx.ticks_per_s),
            w.switches_per_output(),
            w.shares(ctx.ticks_per_s),
        );
        if r.tally.not_ok > 0 || r.tally.unreadable > 0 {
            println!(
                "   {name}: {} outputs with a status other than \"ok\", {} without a readable time",
                r.tally.not_ok, r.tally.unreadable
            );
        }
        slow.push((name, r.tally.slow_slots(5_000)));
        if name == "daemon" {
            daemon_result = Some(r);
        }
    }
    println!("   (latency counts the measured seconds only; sent and lost count the warm-up too)");
    println!("{SHARES_NOTE}");
    let r = daemon_result.expect("the daemon ran");
    for (name, (over, slots, worst)) in slow {
        if let Some((at, us)) = worst {
            println!(
                "   {name}: {over} of {slots} 100 ms slots had a sample over 5 ms; the worst, sent at +{at:.1} s, \
                 took {:.1} ms",
                us as f64 / 1000.0
            );
        }
    }
    let p99 = r.tally.latency.value_at_quantile(0.99) as f64 / 1000.0;
    verdicts.push(Verdict {
        what: format!(
            "b) p99 latency, {:.0}/s over {} channels, QoS {qos_n}",
            p.rate, p.channels
        ),
        measured: format!("{p99:.2} ms"),
        target: "< 5 ms".into(),
        pass: p99 < 5.0,
        invalid: None,
    });
    verdicts.push(Verdict {
        what: format!("b) samples lost at {:.0}/s (of {} sent)", p.rate, r.sent),
        measured: r.lost().to_string(),
        target: "0".into(),
        pass: r.lost() == 0,
        invalid: None,
    });
    Ok(())
}

fn case_memory(ctx: &Ctx, p: &Params, verdicts: &mut Vec<Verdict>) -> Result<(), String> {
    println!(
        "c) memory: a fresh daemon, one sample on each of {} channels at {:.0}/s, QoS 0",
        p.mem_channels, p.mem_rate
    );
    ctx.receiver.batch_reads(true);
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
            signal: None,
            at_measure: None,
            fanout: 1,
            watch: &[],
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
        invalid: None,
    });
    Ok(())
}

/// The configured noise variances of every channel the bench's daemons run (per nominal interval).
const DAEMON_OBS_VAR: f64 = 0.25;
const DAEMON_LEVEL_VAR: f64 = 0.01;

/// Case d's signal, per channel: a random-walk level plus white noise. The true variances differ from the
/// configured ones by channel: observation noise 0.5, 1, 2 or 4 times `DAEMON_OBS_VAR`, level steps 1 or 0.25 times
/// `DAEMON_LEVEL_VAR`. One channel in eight matches its configuration, so its fits gain nothing and are refused;
/// the others have something to learn, in steps of at most `max_factor`, so fits are accepted too. The fits then
/// cost what fits on live data cost, not what a fit that stops at its starting point costs.
struct Walk {
    noise: gaugewise::simulate::Noise,
    levels: Vec<f64>,
}

const WALK_OBS_FACTORS: [f64; 4] = [0.5, 1.0, 2.0, 4.0];
const WALK_LEVEL_FACTORS: [f64; 2] = [1.0, 0.25];
const WALK_SEED: u64 = 0x5eed_b0c5;

impl Walk {
    fn new(channels: usize, seed: u64) -> Walk {
        Walk {
            noise: gaugewise::simulate::Noise::new(seed),
            levels: (0..channels).map(|i| 40.0 + (i % 20) as f64).collect(),
        }
    }

    /// The next value of channel `index`: one step of its level, plus noise.
    fn next(&mut self, index: usize) -> f64 {
        let obs_sd = (DAEMON_OBS_VAR * WALK_OBS_FACTORS[index % 4]).sqrt();
        let level_sd = (DAEMON_LEVEL_VAR * WALK_LEVEL_FACTORS[(index / 4) % 2]).sqrt();
        let step = level_sd * self.noise.normal();
        let noise = obs_sd * self.noise.normal();
        match self.levels.get_mut(index) {
            Some(level) => {
                *level += step;
                *level + noise
            }
            None => 50.0 + noise,
        }
    }
}

/// What the daemon's metrics endpoint said at one moment: the re-estimation counters and its own processing-latency
/// histogram (receipt of a message to its output handed to the MQTT client).
#[derive(Default, Clone)]
struct Scrape {
    accepted: u64,
    refused: u64,
    /// (upper bound in s, cumulative count), in the endpoint's order; +Inf last.
    buckets: Vec<(f64, u64)>,
}

impl Scrape {
    /// What happened between `before` and `self`.
    fn since(&self, before: &Scrape) -> Scrape {
        Scrape {
            accepted: self.accepted.saturating_sub(before.accepted),
            refused: self.refused.saturating_sub(before.refused),
            buckets: self
                .buckets
                .iter()
                .zip(&before.buckets)
                .map(|(&(le, n), &(_, m))| (le, n.saturating_sub(m)))
                .collect(),
        }
    }

    /// `self` plus `other`, bucket by bucket (counts over two stretches pooled); `other` alone when `self` is
    /// empty.
    fn plus(&self, other: &Scrape) -> Scrape {
        if self.buckets.is_empty() {
            return other.clone();
        }
        Scrape {
            accepted: self.accepted + other.accepted,
            refused: self.refused + other.refused,
            buckets: self
                .buckets
                .iter()
                .zip(&other.buckets)
                .map(|(&(le, n), &(_, m))| (le, n + m))
                .collect(),
        }
    }

    fn total(&self) -> u64 {
        self.buckets.last().map_or(0, |&(_, n)| n)
    }

    /// Share of samples over `limit_s` (a bucket bound).
    fn share_over(&self, limit_s: f64) -> f64 {
        let within = self
            .buckets
            .iter()
            .find(|(le, _)| (*le - limit_s).abs() < 1e-12)
            .map_or(0, |&(_, n)| n);
        self.total().saturating_sub(within) as f64 / self.total().max(1) as f64
    }

    /// The smallest bucket bound that holds quantile `q` (infinite when only +Inf does).
    fn quantile_bound(&self, q: f64) -> f64 {
        let need = (q * self.total() as f64).ceil() as u64;
        self.buckets
            .iter()
            .find(|&&(_, n)| n >= need)
            .map_or(f64::INFINITY, |&(le, _)| le)
    }
}

/// GET /metrics from a daemon's endpoint on the loopback port; None when it does not answer within 2 s.
fn scrape(port: u16) -> Option<Scrape> {
    let addr = std::net::SocketAddr::from(([127, 0, 0, 1], port));
    let mut stream = TcpStream::connect_timeout(&addr, Duration::from_secs(2)).ok()?;
    stream.set_read_timeout(Some(Duration::from_secs(2))).ok()?;
    stream
        .write_all(b"GET /metrics HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n")
        .ok()?;
    let mut text = String::new();
    stream.read_to_string(&mut text).ok()?;
    let mut s = Scrape::default();
    let value = |line: &str| line.rsplit(' ').next()?.trim().parse::<u64>().ok();
    for line in text.lines() {
        if let Some(rest) = line.strip_prefix("gaugewise_reestimations_total{result=\"") {
            if rest.starts_with("accepted\"") {
                s.accepted = value(line)?;
            } else if rest.starts_with("refused\"") {
                s.refused = value(line)?;
            }
        } else if let Some(rest) =
            line.strip_prefix("gaugewise_processing_latency_seconds_bucket{le=\"")
        {
            let bound = rest.split('"').next()?;
            let le = if bound == "+Inf" {
                f64::INFINITY
            } else {
                bound.parse().ok()?
            };
            s.buckets.push((le, value(line)?));
        }
    }
    (!s.buckets.is_empty()).then_some(s)
}

/// How often `FitWatch` reads the daemon's counters.
const FIT_POLL: Duration = Duration::from_millis(200);

/// Reads a daemon's metrics every `FIT_POLL` on a thread of its own, to see when the fits ran (and, in the
/// alternating mode, to cut its latency histogram by block). It runs in every segment of case d, on and off alike,
/// so its own small cost (a few HTTP requests per second) is the same in both.
struct FitWatch {
    stop: Arc<AtomicBool>,
    thread: Option<JoinHandle<Vec<(f64, Scrape)>>>,
}

impl FitWatch {
    fn start(port: u16, clock: Clock) -> FitWatch {
        let stop = Arc::new(AtomicBool::new(false));
        let flag = stop.clone();
        let thread = thread::Builder::new()
            .name("gwbench-fitwatch".into())
            .spawn(move || {
                let mut polls = Vec::new();
                while !flag.load(Ordering::Relaxed) {
                    if let Some(s) = scrape(port) {
                        polls.push((clock.now(), s));
                    }
                    thread::sleep(FIT_POLL);
                }
                polls
            })
            .ok();
        FitWatch { stop, thread }
    }

    /// Stops; every answered poll: (clock time, what the endpoint said).
    fn finish_polls(mut self) -> Vec<(f64, Scrape)> {
        self.stop.store(true, Ordering::Relaxed);
        self.thread
            .take()
            .and_then(|t| t.join().ok())
            .unwrap_or_default()
    }

    /// Stops; the stretches in which re-estimations finished: (from, to, count), clock times, accurate to a poll.
    fn finish(self) -> Vec<(f64, f64, u64)> {
        bursts_of(&self.finish_polls())
    }
}

/// Re-estimations finished between consecutive polls: (previous poll, poll, count), for each pair whose count rose.
fn fit_steps(polls: &[(f64, Scrape)]) -> Vec<(f64, f64, u64)> {
    polls
        .windows(2)
        .filter_map(|pair| {
            let ((t0, a), (t1, b)) = (&pair[0], &pair[1]);
            let (n0, n1) = (a.accepted + a.refused, b.accepted + b.refused);
            (n1 > n0).then_some((*t0, *t1, n1 - n0))
        })
        .collect()
}

/// `fit_steps`, with steps one after the other joined into one burst.
fn bursts_of(polls: &[(f64, Scrape)]) -> Vec<(f64, f64, u64)> {
    let mut bursts: Vec<(f64, f64, u64)> = Vec::new();
    for (t0, t1, n) in fit_steps(polls) {
        match bursts.last_mut() {
            Some(last) if last.1 >= t0 - 1e-9 => {
                last.1 = t1;
                last.2 += n;
            }
            _ => bursts.push((t0, t1, n)),
        }
    }
    bursts
}

impl Drop for FitWatch {
    fn drop(&mut self) {
        self.stop.store(true, Ordering::Relaxed);
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

/// One measured stretch of case d.
struct Segment {
    name: &'static str,
    r: DriveResult,
    /// The daemon's counters over the measured window (None if the endpoint did not answer).
    metrics: Option<Scrape>,
    /// When re-estimations finished, from `FitWatch` (clock times).
    bursts: Vec<(f64, f64, u64)>,
}

/// Drives `daemon` at case b's rate with `walk`'s values: `warmup` not measured, then `secs` measured.
#[allow(clippy::too_many_arguments)]
fn reest_segment(
    ctx: &Ctx,
    p: &Params,
    name: &'static str,
    daemon: &Daemon,
    input: &str,
    metrics_port: u16,
    walk: &RefCell<Walk>,
    warmup: Duration,
    secs: Duration,
) -> Segment {
    let topics = topics(input, p.channels);
    let before = RefCell::new(None);
    let at_measure = || *before.borrow_mut() = scrape(metrics_port);
    let watch = FitWatch::start(metrics_port, ctx.clock);
    let r = drive(
        ctx,
        &Drive {
            topics: &topics,
            pace: Pace::Rate(p.rate),
            qos: QoS::AtMostOnce,
            warmup,
            measure: Some(secs),
            count: None,
            signal: Some(walk),
            at_measure: Some(&at_measure),
            fanout: 1,
            watch: &[],
        },
        Subject::Daemon(daemon.pid()),
    );
    let metrics = before
        .into_inner()
        .zip(scrape(metrics_port))
        .map(|(b, a)| a.since(&b));
    let bursts = watch.finish();
    Segment {
        name,
        r,
        metrics,
        bursts,
    }
}

/// Runs of consecutive 100 ms slots whose worst latency is over `limit_us`: (start s, end s, worst µs).
fn slow_runs(t: &Tally, limit_us: u64) -> Vec<(f64, f64, u64)> {
    let mut runs: Vec<(f64, f64, u64)> = Vec::new();
    let mut in_run = false;
    for (i, &us) in t.slots.iter().enumerate() {
        if us <= limit_us {
            in_run = false;
            continue;
        }
        let (start, end) = (i as f64 * SLOT, (i + 1) as f64 * SLOT);
        match runs.last_mut() {
            Some(last) if in_run => {
                last.1 = end;
                last.2 = last.2.max(us);
            }
            _ => runs.push((start, end, us)),
        }
        in_run = true;
    }
    runs
}

/// When the fits of the "on" segment ran, and the latency of the seconds with fits against those without.
fn report_bursts(on: &Segment, p99_off: f64) {
    let since = on.r.tally.since;
    if on.bursts.is_empty() {
        println!("   on: no re-estimation seen by the poller");
        return;
    }
    println!(
        "   on: re-estimations finished in (seconds from the start of the measured window, negative while the \
         windows filled; to {} ms): {}",
        FIT_POLL.as_millis(),
        burst_list(&on.bursts, since)
    );
    let seconds = &on.r.tally.seconds;
    let mut during: Option<Histogram<u64>> = None;
    let mut between: Option<Histogram<u64>> = None;
    let (mut n_during, mut n_between) = (0, 0);
    for (i, h) in seconds.iter().enumerate() {
        let (a, b) = (since + i as f64, since + i as f64 + 1.0);
        let busy = on.bursts.iter().any(|&(x, y, _)| x < b && y > a);
        let (slot, n) = if busy {
            (&mut during, &mut n_during)
        } else {
            (&mut between, &mut n_between)
        };
        *n += 1;
        match slot {
            Some(acc) => {
                let _ = acc.add(h);
            }
            None => *slot = Some(h.clone()),
        }
    }
    for (what, h, n) in [
        ("seconds with fits", &during, n_during),
        ("seconds without", &between, n_between),
    ] {
        if let Some(h) = h {
            let ms = |q: f64| h.value_at_quantile(q) as f64 / 1000.0;
            println!(
                "   on, {what}: {n} s, {} samples, p50 {:.3} ms, p99 {:.3} ms, p99.9 {:.3} ms, max {:.1} ms \
                 (p99 / p99 off {:.2})",
                h.len(),
                ms(0.5),
                ms(0.99),
                ms(0.999),
                h.max() as f64 / 1000.0,
                ms(0.99) / p99_off
            );
        }
    }
    println!("   on, p99 per second (ms), 20 s a row:");
    for (row, chunk) in seconds.chunks(20).enumerate() {
        let cells: Vec<String> = chunk
            .iter()
            .map(|h| format!("{:.1}", h.value_at_quantile(0.99) as f64 / 1000.0))
            .collect();
        println!("     +{:>3} s  {}", row * 20, cells.join(" "));
    }
}

/// The stretches in which fits finished (`FitWatch::finish`), in seconds from `since`.
fn burst_list(bursts: &[(f64, f64, u64)], since: f64) -> String {
    let list: Vec<String> = bursts
        .iter()
        .map(|&(a, b, n)| {
            format!(
                "{:+.1}..{:+.1} s: {n} fits, {:.1} ms each",
                a - since,
                b - since,
                (b - a) * 1000.0 / n.max(1) as f64
            )
        })
        .collect();
    if list.is_empty() {
        "none".into()
    } else {
        list.join("; ")
    }
}

/// When the re-estimating daemon's channels fall due, in seconds from the start of the measured window (after
/// `fill`). Every channel's first sample comes within one round of the channels (1 / per-channel rate), so all of
/// them fall due at once: k * every_s after the start, i.e. k * every_s - fill into the measured window.
fn due_times(p: &Params, fill: Duration) -> String {
    let due: Vec<String> = (1..)
        .map(|k| k as f64 * p.reest_every - fill.as_secs_f64())
        .take_while(|&at| at < p.reest_on_secs.as_secs_f64())
        .filter(|&at| at >= 0.0)
        .map(|at| format!("+{at:.1} s"))
        .collect();
    if due.is_empty() {
        "no time".into()
    } else {
        due.join(", ")
    }
}

/// A log line without the terminal colour codes `tracing` may put in.
fn plain(line: &str) -> String {
    let mut out = String::with_capacity(line.len());
    let mut chars = line.chars();
    while let Some(c) = chars.next() {
        if c == '\u{1b}' {
            for d in chars.by_ref() {
                if d.is_ascii_alphabetic() {
                    break;
                }
            }
        } else {
            out.push(c);
        }
    }
    out
}

fn case_reestimate(ctx: &Ctx, p: &Params, verdicts: &mut Vec<Verdict>) -> Result<(), String> {
    let per_channel = p.rate / p.channels as f64;
    let interval = 1.0 / per_channel;
    // The windows are full after `window` samples of each channel; a little more so that every channel's is.
    let fill = Duration::from_secs_f64(p.reest_window as f64 / per_channel + 2.0);
    let periods = p.reest_on_secs.as_secs_f64() / p.reest_every;
    println!(
        "d) re-estimation: {:.0} samples/s over {} channels ({per_channel:.1} per channel per s, interval \
         {interval} s), QoS 0, publish call to output received",
        p.rate, p.channels
    );
    println!(
        "   on: every channel refits its {}-sample window every {} s of its own time (= wall time: the payload \
         time is the send time); the windows fill in {:.0} s, not measured, then {:.0} s are measured ({periods:.2} \
         periods)",
        p.reest_window,
        p.reest_every,
        fill.as_secs_f64(),
        p.reest_on_secs.as_secs_f64()
    );
    if (periods - periods.round()).abs() > 1e-6 {
        println!(
            "   note: the measured time is not a whole number of periods, so the fits weigh more or less than \
             they do in steady running"
        );
    }
    println!(
        "   off: a daemon with the same configuration but no [reestimate], {:.0} s measured before and {:.0} s \
         after (+{:.0} s warm-up each)",
        p.reest_off_secs.as_secs_f64(),
        p.reest_off_secs.as_secs_f64(),
        p.warmup.as_secs_f64()
    );
    println!(
        "   signal: per channel a random walk plus noise, observation variance 0.5/1/2/4 x and level variance 1 or \
         0.25 x the configured {DAEMON_OBS_VAR} / {DAEMON_LEVEL_VAR} per interval"
    );
    println!(
        "   {:<10} {:>7} {:>8} {:>5} {:>7} {:>7} {:>8} {:>7} {:>10} {:>10} {:>9} {SHARES_HEADER}",
        "case",
        "sent/s",
        "sent",
        "lost",
        "p50 ms",
        "p99 ms",
        "p99.9 ms",
        "max ms",
        "CPU µs/out",
        "switch/out",
        "fits a/r"
    );
    ctx.receiver.batch_reads(false);
    ctx.receiver.per_second(true);
    let max_channels = p.channels.max(1000);
    let off_port = broker::free_port();
    let off_daemon = Daemon::start_tuned(
        ctx,
        QoS::AtMostOnce,
        max_channels,
        &Tuning {
            input: OFF_IN,
            output: DAEMON_OUT,
            interval,
            reestimate: None,
            metrics_port: Some(off_port),
        },
    )?;
    // One signal per daemon: each sees the same kind of data from its first sample.
    let off_walk = RefCell::new(Walk::new(p.channels, WALK_SEED));
    let on_walk = RefCell::new(Walk::new(p.channels, WALK_SEED));
    let mut segments = Vec::new();
    let print = |s: &Segment| {
        let h = &s.r.tally.latency;
        let ms = |q: f64| h.value_at_quantile(q) as f64 / 1000.0;
        let w = &s.r.window;
        let fits = s
            .metrics
            .as_ref()
            .map_or("n/a".into(), |m| format!("{}/{}", m.accepted, m.refused));
        println!(
            "   {:<10} {:>7.0} {:>8} {:>5} {:>7.3} {:>7.3} {:>8.3} {:>7.1} {:>10.2} {:>10.2} {:>9} {}",
            s.name,
            w.sent as f64 / w.secs,
            s.r.sent,
            s.r.lost(),
            ms(0.5),
            ms(0.99),
            ms(0.999),
            h.max() as f64 / 1000.0,
            w.cpu_us_per_output(ctx.ticks_per_s),
            w.switches_per_output(),
            fits,
            w.shares(ctx.ticks_per_s),
        );
    };
    let off1 = reest_segment(
        ctx,
        p,
        "off",
        &off_daemon,
        OFF_IN,
        off_port,
        &off_walk,
        p.warmup,
        p.reest_off_secs,
    );
    print(&off1);
    segments.push(off1);

    let on_port = broker::free_port();
    let on_daemon = Daemon::start_tuned(
        ctx,
        QoS::AtMostOnce,
        max_channels,
        &Tuning {
            input: ON_IN,
            output: DAEMON_OUT,
            interval,
            reestimate: Some((p.reest_window, p.reest_every)),
            metrics_port: Some(on_port),
        },
    )?;
    let on = reest_segment(
        ctx,
        p,
        "on",
        &on_daemon,
        ON_IN,
        on_port,
        &on_walk,
        fill,
        p.reest_on_secs,
    );
    print(&on);
    segments.push(on);
    // Stopped before the second "off" run, so it idles on nobody's cores.
    let on_log = on_daemon.stop();

    let off2 = reest_segment(
        ctx,
        p,
        "off again",
        &off_daemon,
        OFF_IN,
        off_port,
        &off_walk,
        p.warmup,
        p.reest_off_secs,
    );
    print(&off2);
    segments.push(off2);
    off_daemon.stop();

    let [off1, on, off2] = <[Segment; 3]>::try_from(segments).map_err(|_| "three segments")?;
    let mut off_h = off1.r.tally.latency.clone();
    off_h
        .add(&off2.r.tally.latency)
        .map_err(|e| format!("merging histograms: {e}"))?;
    let off_ticks = off1.r.window.subject_ticks + off2.r.window.subject_ticks;
    let off_outputs = off1.r.window.outputs + off2.r.window.outputs;
    let ms = |h: &Histogram<u64>, q: f64| h.value_at_quantile(q) as f64 / 1000.0;
    println!(
        "   {:<10} {:>7} {:>8} {:>5} {:>7.3} {:>7.3} {:>8.3} {:>7.1} {:>10.2}",
        "off, both",
        "",
        "",
        off1.r.lost() + off2.r.lost(),
        ms(&off_h, 0.5),
        ms(&off_h, 0.99),
        ms(&off_h, 0.999),
        off_h.max() as f64 / 1000.0,
        off_ticks as f64 / ctx.ticks_per_s * 1e6 / off_outputs.max(1) as f64,
    );
    println!(
        "   (latency counts the measured seconds only; sent and lost count the warm-up, and for \"on\" the \
         filling, too)"
    );
    println!(
        "   (fits a/r: re-estimations accepted / refused in the measured seconds, from the daemon's metrics \
         endpoint)"
    );
    println!("{SHARES_NOTE}");
    for s in [&off1, &on, &off2] {
        if s.r.tally.not_ok > 0 || s.r.tally.unreadable > 0 {
            println!(
                "   {}: {} outputs with a status other than \"ok\" (withheld outliers of the noisier channels), {} \
                 without a readable time",
                s.name, s.r.tally.not_ok, s.r.tally.unreadable
            );
        }
    }

    let p99_off = ms(&off_h, 0.99);
    let p99_on = ms(&on.r.tally.latency, 0.99);
    let ratio = p99_on / p99_off;
    let limit_us = (1.5 * p99_off * 1000.0).round() as u64;
    println!(
        "   on: every channel falls due at once (their first samples came within {:.0} ms), at about {} of the \
         measured window",
        1000.0 / per_channel,
        due_times(p, fill)
    );
    for s in [&off1, &on, &off2] {
        let mut runs = slow_runs(&s.r.tally, limit_us);
        let count = runs.len();
        // The six worst, in time order.
        runs.sort_by_key(|r| std::cmp::Reverse(r.2));
        runs.truncate(6);
        runs.sort_by(|a, b| a.0.total_cmp(&b.0));
        let (over, slots, _) = s.r.tally.slow_slots(limit_us);
        let list: Vec<String> = runs
            .iter()
            .map(|(a, b, us)| format!("+{a:.1}..+{b:.1} s ({:.1} ms)", *us as f64 / 1000.0))
            .collect();
        println!(
            "   {}: {over} of {slots} 100 ms slots had a sample over 1.5 x p99 off ({:.2} ms), in {count} run(s){}{}",
            s.name,
            limit_us as f64 / 1000.0,
            if list.is_empty() { "" } else { "; the worst: " },
            list.join(", ")
        );
    }
    let internal: Vec<String> = [&off1, &on, &off2]
        .iter()
        .filter_map(|s| {
            let m = s.metrics.as_ref()?;
            Some(format!(
                "{} p99 <= {} ms, over 1 ms {:.4}%, over 5 ms {:.4}%",
                s.name,
                m.quantile_bound(0.99) * 1000.0,
                m.share_over(0.001) * 100.0,
                m.share_over(0.005) * 100.0
            ))
        })
        .collect();
    if !internal.is_empty() {
        println!(
            "   the daemon's own latency (receipt to output handed to the client, its metrics histogram): {}",
            internal.join("; ")
        );
    }
    ctx.receiver.per_second(false);
    report_bursts(&on, p99_off);
    if let Some(line) = on_log.lines().rev().find(|l| l.contains("reestimated=")) {
        println!("   on daemon, last counter line: {}", plain(line).trim());
    }
    println!();

    let fits = on.metrics.as_ref().map_or(0, |m| m.accepted + m.refused);
    let expected = p.channels as u64 * periods.floor() as u64;
    let segments = [&off1, &on, &off2];
    let invalid = invalid_reason(
        segments.iter().map(|s| s.r.lost()).sum(),
        segments
            .iter()
            .map(|s| s.r.window.sent as f64 / s.r.window.secs.max(1e-9))
            .fold(f64::INFINITY, f64::min),
        p.rate,
        segments
            .iter()
            .map(|s| ms(&s.r.tally.latency, 0.5))
            .fold(0.0, f64::max),
    );
    if let Some(why) = &invalid {
        println!("   invalid as a measurement: {why}");
    }
    verdicts.push(Verdict {
        what: format!(
            "d) re-estimations in the measured {:.0} s (accepted {})",
            p.reest_on_secs.as_secs_f64(),
            on.metrics.as_ref().map_or(0, |m| m.accepted)
        ),
        measured: fits.to_string(),
        target: format!(">= {expected}"),
        pass: fits >= expected && on.metrics.is_some(),
        invalid: invalid.clone(),
    });
    verdicts.push(Verdict {
        what: format!("d) p99 on / off ({p99_on:.2} / {p99_off:.2} ms)"),
        measured: format!("{ratio:.2}"),
        target: "<= 1.5".into(),
        pass: ratio <= 1.5,
        invalid,
    });
    Ok(())
}

/// A quantile of a latency histogram (µs), in ms.
fn ms_at(h: &Histogram<u64>, q: f64) -> f64 {
    h.value_at_quantile(q) as f64 / 1000.0
}

/// One daemon of a paired repetition of case d.
struct PairedDaemon {
    on: bool,
    daemon: Daemon,
    metrics_port: u16,
}

/// What one paired repetition of case d measured. Per-slot arrays are indexed by slot (0: started first).
struct PairedRep {
    /// The slot whose daemon re-estimates; the other one does not.
    on_slot: usize,
    r: DriveResult,
    /// Each daemon's counters over the measured window (None if its endpoint did not answer).
    measured: [Option<Scrape>; 2],
    /// Each daemon's counters since it started: the fits of the filling too.
    total: [Option<Scrape>; 2],
    /// When the re-estimating daemon's fits finished (`FitWatch`, clock times).
    bursts: Vec<(f64, f64, u64)>,
    /// Fits the other daemon's poller saw finish (0 unless something is wrong).
    off_fits: u64,
    on_log: String,
}

impl PairedRep {
    /// The tallies of the re-estimating daemon and of the other, in that order.
    fn lanes(&self) -> Result<(&Tally, &Tally), String> {
        let lanes = &self.r.tally.lanes;
        match (lanes.get(self.on_slot), lanes.get(1 - self.on_slot)) {
            (Some(on), Some(off)) => Ok((on, off)),
            _ => Err("the receiver kept no per-daemon tally".into()),
        }
    }
}

/// Which seconds of a tally (`Tally::seconds`, counted from `since`) overlap a stretch in which fits finished.
fn fit_seconds(bursts: &[(f64, f64, u64)], since: f64, n: usize) -> Vec<bool> {
    (0..n)
        .map(|i| {
            let (a, b) = (since + i as f64, since + i as f64 + 1.0);
            bursts.iter().any(|&(x, y, _)| x < b && y > a)
        })
        .collect()
}

/// The seconds of paired repetitions compared one by one, the daemons' latencies having been measured on the same
/// samples: split into the seconds in which the re-estimating daemon's fits finished and the others.
#[derive(Default)]
struct SecondsSplit {
    /// [with fits, without][on, off]: the latencies of those seconds, merged.
    hists: [[Option<Histogram<u64>>; 2]; 2],
    /// [with fits, without]: seconds, and those whose p99 was higher on the re-estimating daemon, and lower.
    seconds: [usize; 2],
    on_higher: [usize; 2],
    on_lower: [usize; 2],
}

impl SecondsSplit {
    fn add(&mut self, rep: &PairedRep) -> Result<(), String> {
        let (on, off) = rep.lanes()?;
        let marks = fit_seconds(&rep.bursts, on.since, on.seconds.len());
        for ((a, b), &busy) in on.seconds.iter().zip(&off.seconds).zip(&marks) {
            // A second one daemon answered nothing of (it stalled, or the run ended) has no pair to compare.
            if a.is_empty() || b.is_empty() {
                continue;
            }
            let k = if busy { 0 } else { 1 };
            for (acc, h) in self.hists[k].iter_mut().zip([a, b]) {
                merge_into(acc, h)?;
            }
            self.seconds[k] += 1;
            let (pa, pb) = (a.value_at_quantile(0.99), b.value_at_quantile(0.99));
            if pa > pb {
                self.on_higher[k] += 1;
            } else if pa < pb {
                self.on_lower[k] += 1;
            }
        }
        Ok(())
    }

    /// One line each for the seconds with fits and those without, after `lead`.
    fn print(&self, lead: &str) {
        for (k, what) in [(0, "seconds with fits"), (1, "seconds without fits")] {
            let [Some(on), Some(off)] = &self.hists[k] else {
                println!("{lead}{what}: none");
                continue;
            };
            println!(
                "{lead}{what}: {} s; on p50 {:.3} p99 {:.3} p99.9 {:.3} max {:.1} ms; off p50 {:.3} p99 {:.3} \
                 p99.9 {:.3} max {:.1} ms; p99 on / off {:.2}; p99 higher on in {} s, lower in {} s",
                self.seconds[k],
                ms_at(on, 0.5),
                ms_at(on, 0.99),
                ms_at(on, 0.999),
                on.max() as f64 / 1000.0,
                ms_at(off, 0.5),
                ms_at(off, 0.99),
                ms_at(off, 0.999),
                off.max() as f64 / 1000.0,
                ms_at(on, 0.99) / ms_at(off, 0.99),
                self.on_higher[k],
                self.on_lower[k],
            );
        }
    }
}

/// Case d, paired: two daemons at once on the same inputs, one re-estimating and one not, so every sample's
/// latency is measured through both and the machine's noise falls on both alike. Each repetition starts fresh
/// daemons, fills their windows (not measured) and measures `reest_on_secs`; each repetition after the first swaps
/// the daemons' slots (start order, and with it the order of the broker's subscriptions, client id and output
/// prefix).
fn case_reestimate_paired(
    ctx: &Ctx,
    p: &Params,
    verdicts: &mut Vec<Verdict>,
) -> Result<(), String> {
    let per_channel = p.rate / p.channels as f64;
    let interval = 1.0 / per_channel;
    // The windows are full after `window` samples of each channel; a little more so that every channel's is.
    let fill = Duration::from_secs_f64(p.reest_window as f64 / per_channel + 2.0);
    let periods = p.reest_on_secs.as_secs_f64() / p.reest_every;
    let minutes =
        p.reest_reps as f64 * (fill.as_secs_f64() + p.reest_on_secs.as_secs_f64() + 8.0) / 60.0;
    println!(
        "d) re-estimation, paired: two daemons at once on the same {} input topics, {:.0} samples/s ({per_channel:.1} \
         per channel per s, interval {interval} s), QoS 0, publish call to output received; {} repetition(s), \
         about {minutes:.1} min",
        p.channels, p.rate, p.reest_reps
    );
    println!(
        "   the same configuration for both, except [reestimate] on one: every channel refits its {}-sample window \
         every {} s of its own time (= wall time: the payload time is the send time)",
        p.reest_window, p.reest_every
    );
    println!(
        "   each repetition: fresh daemons; {:.0} s while the windows fill (not measured), then {:.0} s measured \
         ({periods:.2} periods); fits due at about {} of the measured window",
        fill.as_secs_f64(),
        p.reest_on_secs.as_secs_f64(),
        due_times(p, fill)
    );
    if (periods - periods.round()).abs() > 1e-6 {
        println!(
            "   note: the measured time is not a whole number of periods, so the fits weigh more or less than \
             they do in steady running"
        );
    }
    println!(
        "   slots: slot 0 is started (and subscribes) first and publishes on {}/, slot 1 on {}/; the re-estimating \
         daemon takes slot 0 in odd repetitions, slot 1 in even ones",
        PAIR_OUT[0], PAIR_OUT[1]
    );
    println!(
        "   signal: per channel a random walk plus noise, observation variance 0.5/1/2/4 x and level variance 1 or \
         0.25 x the configured {DAEMON_OBS_VAR} / {DAEMON_LEVEL_VAR} per interval (the same in every repetition)"
    );
    println!(
        "   {:<3} {:<4} {:>4} {:>8} {:>8} {:>5} {:>7} {:>7} {:>8} {:>7} {:>10} {:>6} {:>9} {:>11} {:>7}",
        "rep",
        "role",
        "slot",
        "sent",
        "outputs",
        "lost",
        "p50 ms",
        "p99 ms",
        "p99.9 ms",
        "max ms",
        "CPU µs/out",
        "CPU %",
        "fits a/r",
        "all fits a/r",
        "not ok"
    );
    ctx.receiver.batch_reads(false);
    ctx.receiver.per_second(true);
    let mut reps = Vec::with_capacity(p.reest_reps);
    for rep in 0..p.reest_reps {
        let x = paired_rep(ctx, p, rep, fill, interval)?;
        print_paired_rep(ctx, rep, &x)?;
        reps.push(x);
    }
    ctx.receiver.per_second(false);
    println!(
        "   (latency counts the measured seconds only; sent, outputs and lost count the filling too. CPU µs/out and CPU %: \
         the daemon process, whole. fits a/r: re-estimations accepted / refused in the measured seconds; all fits: \
         since the daemon started. not ok: outputs whose status is not \"ok\", mostly withheld outliers of the \
         noisier channels)"
    );

    let mut on_all: Option<Histogram<u64>> = None;
    let mut off_all: Option<Histogram<u64>> = None;
    let mut split = SecondsSplit::default();
    let mut per_rep = Vec::new();
    for x in &reps {
        let (on, off) = x.lanes()?;
        for (acc, h) in [(&mut on_all, &on.latency), (&mut off_all, &off.latency)] {
            merge_into(acc, h)?;
        }
        split.add(x)?;
        per_rep.push(format!(
            "{:.2}",
            ms_at(&on.latency, 0.99) / ms_at(&off.latency, 0.99)
        ));
    }
    let (Some(on_all), Some(off_all)) = (on_all, off_all) else {
        return Err("case d ran no repetition".into());
    };
    let (p99_on, p99_off) = (ms_at(&on_all, 0.99), ms_at(&off_all, 0.99));
    let ratio = p99_on / p99_off;
    let count = |f: fn(&Scrape) -> u64, total: bool| -> u64 {
        reps.iter()
            .filter_map(|x| {
                let s = if total { &x.total } else { &x.measured };
                s[x.on_slot].as_ref().map(f)
            })
            .sum()
    };
    let (accepted, refused) = (count(|s| s.accepted, false), count(|s| s.refused, false));
    let (all_accepted, all_refused) = (count(|s| s.accepted, true), count(|s| s.refused, true));
    let lost: u64 = reps.iter().map(|x| x.r.lost()).sum();
    println!(
        "   all {} repetition(s): on p50 {:.3} p99 {p99_on:.3} p99.9 {:.3} max {:.1} ms; off p50 {:.3} p99 \
         {p99_off:.3} p99.9 {:.3} max {:.1} ms; p99 on / off {ratio:.2} (per repetition: {}); lost {lost}",
        reps.len(),
        ms_at(&on_all, 0.5),
        ms_at(&on_all, 0.999),
        on_all.max() as f64 / 1000.0,
        ms_at(&off_all, 0.5),
        ms_at(&off_all, 0.999),
        off_all.max() as f64 / 1000.0,
        per_rep.join(", ")
    );
    split.print("   all repetitions, ");
    println!(
        "   re-estimations: {} in the measured seconds ({accepted} accepted, {refused} refused), {} in all \
         ({all_accepted} accepted, {all_refused} refused; the filling's included); on the daemon without \
         [reestimate]: {}",
        accepted + refused,
        all_accepted + all_refused,
        reps.iter().map(|x| x.off_fits).sum::<u64>()
    );
    println!();

    let fits = accepted + refused;
    let expected = p.channels as u64 * periods.floor() as u64 * reps.len() as u64;
    let scraped = reps.iter().all(|x| x.measured[x.on_slot].is_some());
    // Judged per repetition: one saturated repetition spoils the pooled figure.
    let mut worst_p50: f64 = 0.0;
    for x in &reps {
        let (on, off) = x.lanes()?;
        worst_p50 = worst_p50
            .max(ms_at(&on.latency, 0.5))
            .max(ms_at(&off.latency, 0.5));
    }
    let invalid = invalid_reason(
        lost,
        reps.iter()
            .map(|x| x.r.window.sent as f64 / x.r.window.secs.max(1e-9))
            .fold(f64::INFINITY, f64::min),
        p.rate,
        worst_p50,
    );
    if let Some(why) = &invalid {
        println!("   invalid as a measurement: {why}");
        println!();
    }
    verdicts.push(Verdict {
        what: format!(
            "d) re-estimations in {} x {:.0} s measured (accepted {accepted})",
            reps.len(),
            p.reest_on_secs.as_secs_f64()
        ),
        measured: fits.to_string(),
        target: format!(">= {expected}"),
        pass: fits >= expected && scraped,
        invalid: invalid.clone(),
    });
    verdicts.push(Verdict {
        what: format!("d) p99 on / off, paired ({p99_on:.2} / {p99_off:.2} ms)"),
        measured: format!("{ratio:.2}"),
        target: "<= 1.5".into(),
        pass: ratio <= 1.5,
        invalid,
    });
    Ok(())
}

/// One paired repetition: starts both daemons, drives them through the filling and the measured window, stops them.
fn paired_rep(
    ctx: &Ctx,
    p: &Params,
    rep: usize,
    fill: Duration,
    interval: f64,
) -> Result<PairedRep, String> {
    let on_slot = rep % 2;
    let max_channels = p.channels.max(1000);
    let mut daemons: Vec<PairedDaemon> = Vec::with_capacity(2);
    for (slot, output) in PAIR_OUT.into_iter().enumerate() {
        let on = slot == on_slot;
        let metrics_port = broker::free_port();
        let daemon = Daemon::start_tuned(
            ctx,
            QoS::AtMostOnce,
            max_channels,
            &Tuning {
                input: PAIR_IN,
                output,
                interval,
                reestimate: on.then_some((p.reest_window, p.reest_every)),
                metrics_port: Some(metrics_port),
            },
        )?;
        daemons.push(PairedDaemon {
            on,
            daemon,
            metrics_port,
        });
    }
    let ports = [daemons[0].metrics_port, daemons[1].metrics_port];
    let pids = [daemons[0].daemon.pid(), daemons[1].daemon.pid()];
    ctx.receiver.set_lanes(&PAIR_OUT.map(|o| format!("{o}/")));
    // Both daemons are polled alike, so the pollers' small cost falls on both.
    let watches = ports.map(|port| FitWatch::start(port, ctx.clock));
    let before = RefCell::new([None, None]);
    let at_measure = || *before.borrow_mut() = ports.map(scrape);
    let topics = topics(PAIR_IN, p.channels);
    // The same values in every repetition.
    let walk = RefCell::new(Walk::new(p.channels, WALK_SEED));
    let r = drive(
        ctx,
        &Drive {
            topics: &topics,
            pace: Pace::Rate(p.rate),
            qos: QoS::AtMostOnce,
            warmup: fill,
            measure: Some(p.reest_on_secs),
            count: None,
            signal: Some(&walk),
            at_measure: Some(&at_measure),
            fanout: 2,
            watch: &pids,
        },
        Subject::Daemon(pids[0]),
    );
    let after = ports.map(scrape);
    let before = before.into_inner();
    let measured = [0, 1].map(|i| {
        before[i]
            .as_ref()
            .zip(after[i].as_ref())
            .map(|(b, a)| a.since(b))
    });
    let [w0, w1] = watches;
    let mut bursts = [w0.finish(), w1.finish()];
    ctx.receiver.set_lanes(&[]);
    let mut on_log = String::new();
    for d in daemons {
        let log = d.daemon.stop();
        if d.on {
            on_log = log;
        }
    }
    let off_fits = bursts[1 - on_slot].iter().map(|b| b.2).sum();
    Ok(PairedRep {
        on_slot,
        r,
        measured,
        total: after,
        bursts: std::mem::take(&mut bursts[on_slot]),
        off_fits,
        on_log,
    })
}

/// The table rows of one paired repetition, then where its latency went.
fn print_paired_rep(ctx: &Ctx, rep: usize, x: &PairedRep) -> Result<(), String> {
    let w = &x.r.window;
    let (on, off) = x.lanes()?;
    let fits = |s: &Option<Scrape>| {
        s.as_ref()
            .map_or("n/a".into(), |m| format!("{}/{}", m.accepted, m.refused))
    };
    for (slot, t) in [(x.on_slot, on), (1 - x.on_slot, off)] {
        let h = &t.latency;
        let ticks = w.watched_ticks.get(slot).copied().unwrap_or(0);
        let outputs = w.lane_outputs.get(slot).copied().unwrap_or(0);
        println!(
            "   {:<3} {:<4} {:>4} {:>8} {:>8} {:>5} {:>7.3} {:>7.3} {:>8.3} {:>7.1} {:>10.2} {:>6.0} {:>9} {:>11} {:>7}",
            rep + 1,
            if slot == x.on_slot { "on" } else { "off" },
            slot,
            x.r.sent,
            x.r.lane_received.get(slot).copied().unwrap_or(0),
            x.r.lane_lost(slot),
            ms_at(h, 0.5),
            ms_at(h, 0.99),
            ms_at(h, 0.999),
            h.max() as f64 / 1000.0,
            ticks as f64 / ctx.ticks_per_s * 1e6 / outputs.max(1) as f64,
            w.share(ticks, ctx.ticks_per_s),
            fits(&x.measured[slot]),
            fits(&x.total[slot]),
            t.not_ok,
        );
    }
    let pct = |t: u64| w.share(t, ctx.ticks_per_s);
    let daemons: u64 = w.watched_ticks.iter().sum();
    let ours = daemons + w.bench_ticks + w.broker_ticks.unwrap_or(0);
    println!(
        "   {:<3} sent {:.0}/s; CPU, percent of one core: both daemons {:.0}, broker {}, bench {:.0}, other {:.0}; \
         p99 on / off {:.2}",
        "",
        w.sent as f64 / w.secs.max(1e-9),
        pct(daemons),
        w.broker_ticks
            .map_or("n/a".into(), |t| format!("{:.0}", pct(t))),
        pct(w.bench_ticks),
        pct(w.machine_ticks.saturating_sub(ours)),
        ms_at(&on.latency, 0.99) / ms_at(&off.latency, 0.99),
    );
    println!(
        "   {:<3} fits finished (s from the start of the measured window, negative while the windows filled; to {} \
         ms): {}",
        "",
        FIT_POLL.as_millis(),
        burst_list(&x.bursts, on.since)
    );
    let mut split = SecondsSplit::default();
    split.add(x)?;
    split.print(&format!("   {:<3} ", ""));
    let internal: Vec<String> = [(x.on_slot, "on"), (1 - x.on_slot, "off")]
        .iter()
        .filter_map(|&(slot, name)| {
            let m = x.measured[slot].as_ref()?;
            Some(format!(
                "{name} p99 <= {} ms, over 1 ms {:.4}%, over 5 ms {:.4}%",
                m.quantile_bound(0.99) * 1000.0,
                m.share_over(0.001) * 100.0,
                m.share_over(0.005) * 100.0
            ))
        })
        .collect();
    if !internal.is_empty() {
        println!(
            "   {:<3} the daemons' own latency (receipt to output handed to the client, metrics histogram): {}",
            "",
            internal.join("; ")
        );
    }
    println!(
        "   {:<3} p99 per second (ms), on above off, 20 s a row:",
        ""
    );
    for (row, (a, b)) in on
        .seconds
        .chunks(20)
        .zip(off.seconds.chunks(20))
        .enumerate()
    {
        let cells = |c: &[Histogram<u64>]| {
            c.iter()
                .map(|h| format!("{:>4.1}", ms_at(h, 0.99)))
                .collect::<Vec<_>>()
                .join(" ")
        };
        println!("     +{:>3} s on   {}", row * 20, cells(a));
        println!("            off  {}", cells(b));
    }
    if let Some(line) = x.on_log.lines().rev().find(|l| l.contains("reestimated=")) {
        println!(
            "   {:<3} on daemon, last counter line: {}",
            "",
            plain(line).trim()
        );
    }
    Ok(())
}

/// One block of case d's alternating mode: the daemon fed, and when, in seconds from the schedule's start.
#[derive(Clone, Copy)]
struct AltBlock {
    /// `ON` or `OFF`.
    daemon: usize,
    /// The measured pair it belongs to; None in the warm-up.
    pair: Option<usize>,
    start: f64,
    end: f64,
}

/// The blocks of the alternating mode, as (daemon, pair). The warm-up comes first: on and off in turn, from on,
/// until the re-estimating daemon has had `window` samples per channel (its window is full at its first measured
/// fit), and the other at least one block. Then `pairs` pairs: the first opens with the daemon the warm-up did not
/// end with, and each next pair runs in the reverse order of the one before (ABBAAB), so that a drift of the
/// machine over the run falls on both roles alike.
fn alt_order(p: &Params, per_channel: f64) -> Vec<(usize, Option<usize>)> {
    let per_block = per_channel * p.reest_block_s as f64;
    let on_warm = ((p.reest_window as f64 / per_block).ceil() as usize).max(1);
    let mut order = Vec::new();
    for i in 0..on_warm {
        order.push((ON, None));
        if i + 1 < on_warm {
            order.push((OFF, None));
        }
    }
    if on_warm == 1 {
        order.push((OFF, None));
    }
    let mut first = 1 - order.last().map_or(OFF, |b| b.0);
    for pair in 0..p.reest_pairs {
        order.push((first, Some(pair)));
        order.push((1 - first, Some(pair)));
        // The next pair opens with the daemon this one closed with.
        first = 1 - first;
    }
    order
}

/// Fit rounds the re-estimating daemon should run in each block, by its own rule (`reestimate::Window::due`): a
/// channel's clock starts at its first sample; a fit falls due `every` after the last one started and runs on the
/// first sample from then on whose window holds `min_samples`. Only a sample triggers it, so a fit that falls due
/// while the other daemon is fed runs at the start of this daemon's next block. All channels start within one
/// round of samples and fall due together: one round is one fit per channel. Block times are whole seconds from
/// the schedule's start, so the comparisons are exact.
fn alt_rounds(blocks: &[AltBlock], every: f64, per_channel: f64, min_samples: f64) -> Vec<usize> {
    let mut last_run: Option<f64> = None;
    let mut fed = 0.0;
    blocks
        .iter()
        .map(|b| {
            if b.daemon != ON {
                return 0;
            }
            let mut last = *last_run.get_or_insert(b.start);
            let ready = b.start + (min_samples - fed).max(0.0) / per_channel;
            let mut rounds = 0;
            loop {
                let at = (last + every).max(b.start).max(ready);
                // A channel's last sample of the block comes before `end`, and its due time is at or after it.
                if at >= b.end - 1e-9 {
                    break;
                }
                rounds += 1;
                last = at;
            }
            last_run = Some(last);
            fed += (b.end - b.start) * per_channel;
            rounds
        })
        .collect()
}

/// CPU counters read at one moment of the alternating mode, in clock ticks.
#[derive(Clone)]
struct AltTicks {
    at: f64,
    /// Indexed by `ON` / `OFF`.
    daemons: [u64; 2],
    broker: Option<u64>,
    bench: u64,
    machine: u64,
}

fn alt_ticks(ctx: &Ctx, pids: [u32; 2]) -> AltTicks {
    AltTicks {
        at: ctx.clock.now(),
        daemons: pids.map(|pid| stat_ticks(&format!("/proc/{pid}/stat")).unwrap_or(0)),
        broker: ctx
            .broker_pid
            .and_then(|pid| stat_ticks(&format!("/proc/{pid}/stat"))),
        bench: stat_ticks("/proc/self/stat").unwrap_or(0),
        machine: machine_ticks().unwrap_or(0),
    }
}

/// What the alternating publisher did.
struct AltRun {
    sent: u64,
    /// Samples sent in each part between the cuts: two per block, its skipped start and its measured rest.
    sent_parts: Vec<u64>,
    /// CPU counters at the start and at the end of each block's measured part.
    ticks: Vec<(AltTicks, AltTicks)>,
}

/// Publishes at `p.rate` from `cuts[0]` to the last cut, each sample to the daemon whose block its send time falls
/// in: block k runs from `cuts[2k]` to `cuts[2k + 2]` and is measured from `cuts[2k + 1]`. The block is decided by
/// the very time written into the payload, so the receiver files every output under the block it was sent in.
/// Channel `n % channels` gets sample `n`, whichever daemon is fed: a channel's samples stay 1 / per-channel-rate
/// apart across a switch, and `walk` runs on through the other daemon's blocks as the process would.
fn alt_publish(
    ctx: &Ctx,
    p: &Params,
    cuts: &[f64],
    fed: &[usize],
    topics: &[Vec<String>; 2],
    walk: &RefCell<Walk>,
    pids: [u32; 2],
) -> Result<AltRun, String> {
    let n = fed.len();
    if cuts.len() != 2 * n + 1 || topics.iter().any(|t| t.is_empty()) {
        return Err("alternating schedule: cuts, blocks and topics disagree".into());
    }
    let t0 = cuts[0];
    let mut publisher = ctx.publisher.lock().expect("publisher lock");
    while ctx.clock.now() < t0 {
        thread::sleep(Duration::from_millis(1));
    }
    let mut sent: u64 = 0;
    let mut sent_parts = vec![0u64; 2 * n];
    let mut from: Option<AltTicks> = None;
    let mut ticks = Vec::with_capacity(n);
    let mut payload = String::with_capacity(64);
    let mut burst = Vec::with_capacity(64 * 128);
    let channels = topics[ON].len().min(topics[OFF].len()) as u64;
    let mut k = 0;
    while k < n {
        let now = ctx.clock.now();
        if now >= cuts[2 * k + 2] {
            let to = alt_ticks(ctx, pids);
            ticks.push((from.take().unwrap_or_else(|| to.clone()), to));
            k += 1;
            continue;
        }
        if from.is_none() && now >= cuts[2 * k + 1] {
            from = Some(alt_ticks(ctx, pids));
        }
        let allowed = ((now - t0) * p.rate) as u64 + 1;
        if sent >= allowed {
            thread::sleep(Duration::from_micros(200));
            continue;
        }
        // A short burst in one write, then back to the clock, as `drive` does.
        burst.clear();
        for _ in 0..(allowed - sent).min(64) {
            let t = ctx.clock.now();
            if t >= cuts[2 * k + 2] {
                break;
            }
            let index = (sent % channels) as usize;
            let value = walk.borrow_mut().next(index);
            payload.clear();
            let _ = write!(payload, "{{\"v\":{value:.3},\"t\":{t}}}");
            publisher.encode(
                &mut burst,
                &topics[fed[k]][index],
                payload.as_bytes(),
                QoS::AtMostOnce,
            );
            sent_parts[2 * k + usize::from(t >= cuts[2 * k + 1])] += 1;
            sent += 1;
        }
        if !burst.is_empty() {
            publisher
                .write(&burst)
                .map_err(|e| format!("the publisher lost its connection: {e}"))?;
        }
    }
    Ok(AltRun {
        sent,
        sent_parts,
        ticks,
    })
}

/// The figures of one block of the alternating mode.
struct AltRow {
    block: AltBlock,
    /// The latencies of its measured part, and of the whole block.
    measured: Histogram<u64>,
    whole: Histogram<u64>,
    sent: u64,
    sent_measured: u64,
    /// Outputs of its samples from the daemon fed (whole block), and those it did not answer.
    outputs: u64,
    lost: u64,
    /// Outputs of its samples from the other daemon: none unless a daemon took the other's inputs.
    strays: u64,
    /// Re-estimations the on daemon finished in the block (to a poll), those finished within the skipped start,
    /// and when (seconds from the block's start, first and last poll that saw them).
    fits: u64,
    fits_skipped: u64,
    fits_span: Option<(f64, f64)>,
    /// Re-estimations the off daemon finished in the block (0 unless something is wrong).
    off_fits: u64,
    /// The fed daemon's own latency histogram over the measured part (its metrics endpoint, to a poll).
    own: Option<Scrape>,
    /// CPU counters at the start and the end of the measured part.
    ticks: (AltTicks, AltTicks),
}

impl AltRow {
    /// Percent of one core over the measured part.
    fn share(&self, ticks: u64, ticks_per_s: f64) -> f64 {
        ticks as f64 / ticks_per_s / (self.ticks.1.at - self.ticks.0.at).max(1e-9) * 100.0
    }
}

/// The steps of `fit_steps` whose later poll falls in [from, to).
fn fits_in(
    steps: &[(f64, f64, u64)],
    from: f64,
    to: f64,
) -> impl Iterator<Item = &(f64, f64, u64)> {
    steps.iter().filter(move |s| s.1 >= from && s.1 < to)
}

/// A daemon's own latency histogram between the first poll at or after `from` and the last at or before `to`.
fn own_between(polls: &[(f64, Scrape)], from: f64, to: f64) -> Option<Scrape> {
    let first = polls.iter().find(|(t, _)| *t >= from)?;
    let last = polls.iter().rev().find(|(t, _)| *t <= to)?;
    (last.0 > first.0).then(|| last.1.since(&first.1))
}

/// `acc` plus `h` (a copy of `h` when `acc` is empty).
fn merge_into(acc: &mut Option<Histogram<u64>>, h: &Histogram<u64>) -> Result<(), String> {
    match acc {
        Some(acc) => acc.add(h).map_err(|e| format!("merging histograms: {e}")),
        None => {
            *acc = Some(h.clone());
            Ok(())
        }
    }
}

/// "p50 .. p99 .. p99.9 .. max .. ms" of a histogram.
fn quantiles(h: &Histogram<u64>) -> String {
    format!(
        "p50 {:.3} p99 {:.3} p99.9 {:.3} max {:.1} ms",
        ms_at(h, 0.5),
        ms_at(h, 0.99),
        ms_at(h, 0.999),
        h.max() as f64 / 1000.0
    )
}

/// "p99 <= .. ms, over 1 ms ..%, over 5 ms ..%" of a daemon's own latency histogram.
fn own_summary(m: &Scrape) -> String {
    format!(
        "p99 <= {} ms, over 1 ms {:.4}%, over 5 ms {:.4}% ({} samples)",
        m.quantile_bound(0.99) * 1000.0,
        m.share_over(0.001) * 100.0,
        m.share_over(0.005) * 100.0,
        m.total()
    )
}

/// Case d, alternating: two daemons for the whole case on one broker, each on its own input topics, the same but
/// for `[reestimate]` on one; the publisher feeds one of them at a time, in blocks. The machine carries exactly one
/// daemon's load at any moment (the load of the single-daemon cases), and both are measured interleaved in time, so
/// a drift of the machine falls on both roles. Payload time is send time, so a channel's time runs on through the
/// other daemon's blocks: with blocks as long as `every_s`, the re-estimating daemon's fits come as one round at the
/// start of each of its blocks, one round per `every_s` of its streaming, as the target has it.
fn case_reestimate_alternating(
    ctx: &Ctx,
    p: &Params,
    verdicts: &mut Vec<Verdict>,
) -> Result<(), String> {
    let per_channel = p.rate / p.channels as f64;
    let interval = 1.0 / per_channel;
    let block_s = p.reest_block_s as f64;
    let blocks: Vec<AltBlock> = alt_order(p, per_channel)
        .into_iter()
        .enumerate()
        .map(|(i, (daemon, pair))| AltBlock {
            daemon,
            pair,
            start: i as f64 * block_s,
            end: (i + 1) as f64 * block_s,
        })
        .collect();
    let total_s = blocks.len() as f64 * block_s;
    // The receiver's per-second tallies and slots stop at an hour.
    if total_s > 3000.0 {
        return Err(format!(
            "case d, alternating: {} blocks of {block_s} s make {total_s} s, more than the 3,000 s allowed; shorten \
             GWBENCH_REEST_BLOCK_S or GWBENCH_REEST_PAIRS",
            blocks.len()
        ));
    }
    let min_samples = reest_min_samples();
    let rounds = alt_rounds(&blocks, p.reest_every, per_channel, min_samples as f64);
    let role = |d: usize| if d == ON { "on" } else { "off" };
    let sequence = |warm: bool| {
        let mut text = String::new();
        let mut last_pair = None;
        for b in blocks.iter().filter(|b| b.pair.is_none() == warm) {
            if !text.is_empty() {
                text.push_str(if b.pair != last_pair { " | " } else { " " });
            }
            text.push_str(role(b.daemon));
            last_pair = b.pair;
        }
        text
    };
    // Daemon starts, the drain and the stops: about 15 s besides the blocks.
    println!(
        "d) re-estimation, alternating: {} blocks of {block_s:.0} s, {total_s:.0} s of streaming, about {:.1} min \
         in all",
        blocks.len(),
        (total_s + 15.0) / 60.0
    );
    println!(
        "   two daemons for the whole case on one broker, each on its own {} input topics; {:.0} samples/s \
         ({per_channel:.1} per channel per s, interval {interval} s) to one of them at a time, QoS 0, publish call \
         to output received",
        p.channels, p.rate
    );
    println!(
        "   on: inputs {}/+, outputs {}/, [reestimate] window {}, every {} s of its channels' own time (= wall \
         time: the payload time is the send time, so a channel's time runs on through the other daemon's blocks); \
         off: inputs {}/+, outputs {}/, no [reestimate]; otherwise the same configuration, each with its own client \
         id and metrics port",
        ALT_IN[ON], ALT_OUT[ON], p.reest_window, p.reest_every, ALT_IN[OFF], ALT_OUT[OFF]
    );
    let warm_on = blocks
        .iter()
        .filter(|b| b.pair.is_none() && b.daemon == ON)
        .count();
    println!(
        "   warm-up, not measured: {} (the on daemon gets {:.0} samples per channel, its window holds {}); \
         measured: {} pair(s): {}",
        sequence(true),
        warm_on as f64 * block_s * per_channel,
        p.reest_window,
        p.reest_pairs,
        sequence(false)
    );
    let expected: Vec<String> = blocks
        .iter()
        .zip(&rounds)
        .filter(|(b, _)| b.pair.is_some() && b.daemon == ON)
        .map(|(_, r)| r.to_string())
        .collect();
    println!(
        "   fit rounds expected in the measured on blocks (one round = one fit per channel, at the block's start \
         when blocks are as long as every_s): {}",
        expected.join(", ")
    );
    println!(
        "   the first {} s of every block are not measured (switch-over: the daemon fed wakes, its channels resume \
         after a gap). The on daemon's fit round also starts there, so the same figures over whole blocks follow \
         as a cross-check",
        p.reest_skip
    );
    println!(
        "   signal: per channel a random walk plus noise, observation variance 0.5/1/2/4 x and level variance 1 or \
         0.25 x the configured {DAEMON_OBS_VAR} / {DAEMON_LEVEL_VAR} per interval, one walk for both daemons"
    );

    ctx.receiver.batch_reads(false);
    ctx.receiver.per_second(true);
    let max_channels = p.channels.max(1000);
    let mut daemons = Vec::with_capacity(2);
    for d in [ON, OFF] {
        let metrics_port = broker::free_port();
        let daemon = Daemon::start_tuned(
            ctx,
            QoS::AtMostOnce,
            max_channels,
            &Tuning {
                input: ALT_IN[d],
                output: ALT_OUT[d],
                interval,
                reestimate: (d == ON).then_some((p.reest_window, p.reest_every)),
                metrics_port: Some(metrics_port),
            },
        )?;
        daemons.push((daemon, metrics_port));
    }
    let pids = [daemons[ON].0.pid(), daemons[OFF].0.pid()];
    // Both daemons are polled alike, so the pollers' small cost falls on both.
    let watches = [ON, OFF].map(|d| FitWatch::start(daemons[d].1, ctx.clock));
    // Time for the pollers' first reading before the first block.
    let t0 = ctx.clock.now() + 0.5;
    let mut cuts = Vec::with_capacity(2 * blocks.len() + 1);
    for b in &blocks {
        cuts.push(t0 + b.start);
        cuts.push(t0 + b.start + p.reest_skip);
    }
    cuts.push(t0 + total_s);
    ctx.receiver
        .set_lanes_cut(&ALT_OUT.map(|o| format!("{o}/")), t0, &cuts);
    let topics = [
        topics(ALT_IN[ON], p.channels),
        topics(ALT_IN[OFF], p.channels),
    ];
    let walk = RefCell::new(Walk::new(p.channels, WALK_SEED));
    let fed: Vec<usize> = blocks.iter().map(|b| b.daemon).collect();
    let run = alt_publish(ctx, p, &cuts, &fed, &topics, &walk, pids)?;

    // Stragglers: until everything is answered, nothing has come for DRAIN_QUIET, or DRAIN_MAX.
    let answered = || ctx.receiver.lane_received().iter().sum::<u64>();
    let drain_end = Instant::now() + DRAIN_MAX;
    let (mut seen, mut quiet_since) = (answered(), Instant::now());
    while answered() < run.sent && Instant::now() < drain_end {
        thread::sleep(Duration::from_millis(10));
        let now_seen = answered();
        if now_seen != seen {
            (seen, quiet_since) = (now_seen, Instant::now());
        } else if quiet_since.elapsed() >= DRAIN_QUIET {
            break;
        }
    }
    let tally = ctx.receiver.take();
    ctx.receiver.set_lanes(&[]);
    ctx.receiver.per_second(false);
    let polls = watches.map(FitWatch::finish_polls);
    let mut on_log = String::new();
    for (d, (daemon, _)) in daemons.into_iter().enumerate().rev() {
        let log = daemon.stop();
        if d == ON {
            on_log = log;
        }
    }
    let [Some(on_lane), Some(off_lane)] = [0, 1].map(|i| tally.lanes.get(i)) else {
        return Err("the receiver kept no per-daemon tally".into());
    };
    let lanes = [on_lane, off_lane];
    let steps = [fit_steps(&polls[ON]), fit_steps(&polls[OFF])];

    let mut rows = Vec::with_capacity(blocks.len());
    for ((k, b), ticks) in blocks.iter().enumerate().zip(run.ticks) {
        let lane = lanes[b.daemon];
        let (Some(skipped), Some(measured)) = (lane.parts.get(2 * k), lane.parts.get(2 * k + 1))
        else {
            return Err("the receiver kept no tally per block".into());
        };
        let mut whole = skipped.clone();
        whole
            .add(measured)
            .map_err(|e| format!("merging histograms: {e}"))?;
        let strays = lanes[1 - b.daemon]
            .parts
            .iter()
            .skip(2 * k)
            .take(2)
            .map(|h| h.len())
            .sum();
        let sent = run.sent_parts[2 * k] + run.sent_parts[2 * k + 1];
        let (start, from, end) = (cuts[2 * k], cuts[2 * k + 1], cuts[2 * k + 2]);
        let fits: Vec<&(f64, f64, u64)> = fits_in(&steps[ON], start, end).collect();
        rows.push(AltRow {
            block: *b,
            measured: measured.clone(),
            sent,
            sent_measured: run.sent_parts[2 * k + 1],
            outputs: whole.len(),
            lost: sent.saturating_sub(whole.len()),
            whole,
            strays,
            fits: fits.iter().map(|s| s.2).sum(),
            fits_skipped: fits.iter().filter(|s| s.1 <= from).map(|s| s.2).sum(),
            fits_span: fits
                .first()
                .zip(fits.last())
                // The first poll that saw a fit says it finished after the poll before, which may precede the block.
                .map(|(a, z)| ((a.0 - start).max(0.0), z.1 - start)),
            off_fits: fits_in(&steps[OFF], start, end).map(|s| s.2).sum(),
            own: own_between(&polls[b.daemon], from, end),
            ticks,
        });
    }

    println!(
        "   {:>3} {:>4} {:<4} {:>8} {:>8} {:>5} {:>7} {:>7} {:>8} {:>7} {:>10} {:>6} {:>6} {:>8} {:>7} {:>7} {:>6}  fits at (s)",
        "blk",
        "pair",
        "role",
        "sent",
        "outputs",
        "lost",
        "p50 ms",
        "p99 ms",
        "p99.9 ms",
        "max ms",
        "CPU µs/out",
        "CPU %",
        "idle %",
        "broker %",
        "bench %",
        "other %",
        "fits"
    );
    let tps = ctx.ticks_per_s;
    for (k, r) in rows.iter().enumerate() {
        let (a, z) = (&r.ticks.0, &r.ticks.1);
        let d = r.block.daemon;
        let active = z.daemons[d].saturating_sub(a.daemons[d]);
        let idle = z.daemons[1 - d].saturating_sub(a.daemons[1 - d]);
        let broker = z.broker.zip(a.broker).map(|(z, a)| z.saturating_sub(a));
        let bench = z.bench.saturating_sub(a.bench);
        let ours = active + idle + broker.unwrap_or(0) + bench;
        let h = &r.measured;
        println!(
            "   {:>3} {:>4} {:<4} {:>8} {:>8} {:>5} {:>7.3} {:>7.3} {:>8.3} {:>7.1} {:>10.2} {:>6.0} {:>6.0} {:>8} {:>7.0} {:>7.0} {:>6}  {}",
            k + 1,
            r.block.pair.map_or("warm".into(), |i| (i + 1).to_string()),
            role(d),
            r.sent,
            r.outputs,
            r.lost,
            ms_at(h, 0.5),
            ms_at(h, 0.99),
            ms_at(h, 0.999),
            h.max() as f64 / 1000.0,
            active as f64 / tps * 1e6 / h.len().max(1) as f64,
            r.share(active, tps),
            r.share(idle, tps),
            broker.map_or("n/a".into(), |t| format!("{:.0}", r.share(t, tps))),
            r.share(bench, tps),
            r.share(z.machine.saturating_sub(a.machine).saturating_sub(ours), tps),
            r.fits,
            r.fits_span.map_or("-".into(), |(x, y)| format!(
                "+{x:.1}..+{y:.1}, {} by +{}",
                r.fits_skipped, p.reest_skip
            )),
        );
    }
    println!(
        "   (latency and CPU over each block's measured part (its first {} s left out); sent, outputs and lost over \
         the whole block. CPU µs/out and CPU %: the daemon fed; idle %: the other; percent of one core. fits: \
         re-estimations the on daemon finished in the block, seen by a poll every {} ms, and how many of them by \
         the end of the skipped start)",
        p.reest_skip,
        FIT_POLL.as_millis()
    );
    let strays: u64 = rows.iter().map(|r| r.strays).sum();
    let off_fits: u64 = rows.iter().map(|r| r.off_fits).sum();
    let not_ok = lanes.map(|l| l.not_ok);
    let unreadable: u64 = lanes.iter().map(|l| l.unreadable).sum();
    println!(
        "   outputs not \"ok\" (withheld outliers, mostly against a wrong variance): on {}, off {}; outputs without a \
         readable time {unreadable}; outputs from the daemon not fed {strays}; fits on the daemon without \
         [reestimate] {off_fits}",
        not_ok[ON], not_ok[OFF]
    );

    // Pairs and pooled figures, measured blocks only.
    let measured: Vec<&AltRow> = rows.iter().filter(|r| r.block.pair.is_some()).collect();
    let mut per_pair = Vec::new();
    for i in 0..p.reest_pairs {
        let of = |d: usize| {
            measured
                .iter()
                .find(|r| r.block.pair == Some(i) && r.block.daemon == d)
        };
        if let (Some(on), Some(off)) = (of(ON), of(OFF)) {
            let (a, b) = (ms_at(&on.measured, 0.99), ms_at(&off.measured, 0.99));
            per_pair.push(format!(
                "{} ({}: {a:.3} / {b:.3} ms) {:.2}",
                i + 1,
                if on.block.start < off.block.start {
                    "on first"
                } else {
                    "off first"
                },
                a / b
            ));
        }
    }
    println!("   p99 on / off per pair: {}", per_pair.join("; "));
    let mut pooled: [[Option<Histogram<u64>>; 2]; 2] = Default::default();
    let mut own: [Scrape; 2] = Default::default();
    let mut cpu: [(u64, f64); 2] = [(0, 0.0); 2];
    for r in &measured {
        let d = r.block.daemon;
        merge_into(&mut pooled[0][d], &r.measured)?;
        merge_into(&mut pooled[1][d], &r.whole)?;
        if let Some(m) = &r.own {
            own[d] = own[d].plus(m);
        }
        cpu[d].0 += r.ticks.1.daemons[d].saturating_sub(r.ticks.0.daemons[d]);
        cpu[d].1 += r.ticks.1.at - r.ticks.0.at;
    }
    let [[Some(on_m), Some(off_m)], [Some(on_w), Some(off_w)]] = &pooled else {
        return Err("case d measured no block of one of the daemons".into());
    };
    let (p99_on, p99_off) = (ms_at(on_m, 0.99), ms_at(off_m, 0.99));
    let ratio = p99_on / p99_off;
    let (p99_on_w, p99_off_w) = (ms_at(on_w, 0.99), ms_at(off_w, 0.99));
    let ratio_w = p99_on_w / p99_off_w;
    println!(
        "   pooled, measured parts: on {}; off {}; p99 on / off {ratio:.2}",
        quantiles(on_m),
        quantiles(off_m)
    );
    println!(
        "   pooled, whole blocks (nothing skipped): on {}; off {}; p99 on / off {ratio_w:.2}",
        quantiles(on_w),
        quantiles(off_w)
    );
    let fits_total: u64 = measured.iter().map(|r| r.fits).sum();
    let fits_skipped: u64 = measured.iter().map(|r| r.fits_skipped).sum();
    if fits_total > 0 {
        println!(
            "   of the {fits_total} fits in the measured on blocks, {fits_skipped} ({:.0}%) finished by the end of \
             the skipped first {} s",
            fits_skipped as f64 * 100.0 / fits_total as f64,
            p.reest_skip
        );
    }

    // The on blocks' seconds with fits against those without, whole blocks, next to the off blocks.
    let marks = fit_seconds(&bursts_of(&polls[ON]), t0, on_lane.seconds.len());
    let mut split: [Option<Histogram<u64>>; 2] = Default::default();
    let mut split_n = [0usize; 2];
    for r in measured.iter().filter(|r| r.block.daemon == ON) {
        for i in r.block.start as usize..r.block.end as usize {
            let (Some(h), Some(&busy)) = (on_lane.seconds.get(i), marks.get(i)) else {
                continue;
            };
            let k = usize::from(!busy);
            merge_into(&mut split[k], h)?;
            split_n[k] += 1;
        }
    }
    for (k, what) in [
        (0, "seconds in which fits finished"),
        (1, "seconds without fits"),
    ] {
        if let Some(h) = &split[k] {
            println!(
                "   on blocks, {what}: {} s, {} (2 significant digits), p99 / p99 off (whole blocks) {:.2}",
                split_n[k],
                quantiles(h),
                ms_at(h, 0.99) / p99_off_w
            );
        }
    }
    let own_line: Vec<String> = [ON, OFF]
        .iter()
        .filter(|&&d| own[d].total() > 0)
        .map(|&d| format!("{} {}", role(d), own_summary(&own[d])))
        .collect();
    if !own_line.is_empty() {
        println!(
            "   the daemons' own latency (receipt to output handed to the client, metrics histogram), measured \
             parts pooled: {}",
            own_line.join("; ")
        );
    }
    let sum_role = |d: usize, f: &dyn Fn(&AltRow) -> u64| -> u64 {
        measured
            .iter()
            .filter(|r| r.block.daemon == d)
            .map(|r| f(r))
            .sum()
    };
    let shares: Vec<String> = [ON, OFF]
        .iter()
        .map(|&d| {
            let secs = cpu[d].1.max(1e-9);
            let pct = |t: u64| t as f64 / tps / secs * 100.0;
            let broker = sum_role(d, &|r| {
                r.ticks
                    .1
                    .broker
                    .zip(r.ticks.0.broker)
                    .map_or(0, |(z, a)| z.saturating_sub(a))
            });
            let idle = sum_role(d, &|r| {
                r.ticks.1.daemons[1 - d].saturating_sub(r.ticks.0.daemons[1 - d])
            });
            let bench = sum_role(d, &|r| r.ticks.1.bench.saturating_sub(r.ticks.0.bench));
            let machine = sum_role(d, &|r| r.ticks.1.machine.saturating_sub(r.ticks.0.machine));
            let other = machine.saturating_sub(cpu[d].0 + idle + broker + bench);
            format!(
                "{} blocks: daemon fed {:.0}, idle daemon {:.0}, broker {}, bench {:.0}, other {:.0}",
                role(d),
                pct(cpu[d].0),
                pct(idle),
                if ctx.broker_pid.is_some() {
                    format!("{:.0}", pct(broker))
                } else {
                    "n/a".into()
                },
                pct(bench),
                pct(other)
            )
        })
        .collect();
    println!(
        "   CPU, percent of one core over the measured parts: {}",
        shares.join("; ")
    );
    println!(
        "   p99 per second (ms) of the measured blocks, 20 s a row (2 significant digits; the first {} s are the \
         skipped start):",
        p.reest_skip
    );
    for (k, r) in rows
        .iter()
        .enumerate()
        .filter(|(_, r)| r.block.pair.is_some())
    {
        let lane = lanes[r.block.daemon];
        let cells: Vec<String> = (r.block.start as usize..r.block.end as usize)
            .map(|i| {
                lane.seconds
                    .get(i)
                    .filter(|h| !h.is_empty())
                    .map_or("   -".into(), |h| format!("{:>4.1}", ms_at(h, 0.99)))
            })
            .collect();
        for (row, chunk) in cells.chunks(20).enumerate() {
            let lead = if row == 0 {
                format!("{:>3} {:<3}", k + 1, role(r.block.daemon))
            } else {
                String::new()
            };
            println!("     {lead:<7} +{:>3} s  {}", row * 20, chunk.join(" "));
        }
    }
    if let Some(line) = on_log.lines().rev().find(|l| l.contains("reestimated=")) {
        println!("   on daemon, last counter line: {}", plain(line).trim());
    }

    // Validity: the whole run (a loss in the warm-up is overload too), the rate and median of every measured block.
    let lost: u64 = rows.iter().map(|r| r.lost).sum();
    let min_rate = measured
        .iter()
        .map(|r| r.sent_measured as f64 / (block_s - p.reest_skip))
        .fold(f64::INFINITY, f64::min);
    let worst_p50 = measured
        .iter()
        .map(|r| ms_at(&r.measured, 0.5))
        .fold(0.0, f64::max);
    let invalid = invalid_reason(lost, min_rate, p.rate, worst_p50);
    if let Some(why) = &invalid {
        println!("   invalid as a measurement: {why}");
    }
    println!();

    let on_blocks: Vec<(u64, u64)> = rows
        .iter()
        .zip(&rounds)
        .filter(|(r, _)| r.block.pair.is_some() && r.block.daemon == ON)
        .map(|(r, &n)| (r.fits, p.channels as u64 * n as u64))
        .collect();
    let min_fits = on_blocks.iter().map(|x| x.0).min().unwrap_or(0);
    let all_expected: Vec<u64> = on_blocks.iter().map(|x| x.1).collect();
    let target = match all_expected.iter().max() {
        Some(&max) if all_expected.iter().all(|&e| e == max) => format!(">= {max}"),
        _ => "see rounds".into(),
    };
    verdicts.push(Verdict {
        what: format!(
            "d) fits in each of the {} measured on blocks (fewest)",
            on_blocks.len()
        ),
        measured: min_fits.to_string(),
        target,
        pass: !on_blocks.is_empty()
            && on_blocks.iter().all(|&(n, e)| n >= e)
            && polls[ON].len() > 1,
        invalid: invalid.clone(),
    });
    verdicts.push(Verdict {
        what: format!(
            "d) p99 on / off, alternating, {} pairs ({p99_on:.2} / {p99_off:.2} ms)",
            p.reest_pairs
        ),
        measured: format!("{ratio:.2}"),
        target: "<= 1.5".into(),
        pass: ratio <= 1.5,
        invalid: invalid.clone(),
    });
    verdicts.push(Verdict {
        what: format!("d) the same over whole blocks ({p99_on_w:.2} / {p99_off_w:.2} ms)"),
        measured: format!("{ratio_w:.2}"),
        target: "<= 1.5".into(),
        pass: ratio_w <= 1.5,
        invalid,
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
    /// Clock time the tally started.
    since: f64,
    /// Worst latency (µs) of the samples sent in each `SLOT` after `since`: tells one hiccup from a steady tail.
    slots: Vec<u64>,
    /// Keep `seconds` (see `Receiver::per_second`).
    per_second: bool,
    /// The latencies of the samples sent in each second after `since` (2 significant digits), when `per_second`.
    seconds: Vec<Histogram<u64>>,
    /// The same, per lane (`Receiver::set_lanes`), in the lanes' order; filled by `Receiver::take`.
    lanes: Vec<Tally>,
    /// Clock times that cut the run into parts, ascending: part i holds the samples sent in [cuts[i], cuts[i+1])
    /// (`Receiver::set_lanes_cut`; case d, alternating: the blocks and their skipped starts). Empty: no parts.
    cuts: Vec<f64>,
    /// The latencies of each part's samples, at full precision (3 significant digits).
    parts: Vec<Histogram<u64>>,
}

/// Width of a slot of `Tally::slots`, in seconds.
const SLOT: f64 = 0.1;

/// An empty latency histogram: microseconds, 1 µs to 10 min, 3 significant digits.
fn latency_histogram() -> Histogram<u64> {
    Histogram::new_with_bounds(1, 600_000_000, 3).expect("histogram bounds")
}

impl Tally {
    fn new(since: f64) -> Tally {
        Tally {
            latency: latency_histogram(),
            not_ok: 0,
            unreadable: 0,
            since,
            slots: Vec::new(),
            per_second: false,
            seconds: Vec::new(),
            lanes: Vec::new(),
            cuts: Vec::new(),
            parts: Vec::new(),
        }
    }

    /// A tally that also keeps the parts between `cuts` (ascending clock times).
    fn with_cuts(since: f64, per_second: bool, cuts: &[f64]) -> Tally {
        let mut t = Tally::new(since);
        t.per_second = per_second;
        t.cuts = cuts.to_vec();
        t.parts = (1..cuts.len()).map(|_| latency_histogram()).collect();
        t
    }

    fn record(&mut self, sent: f64, now: f64) {
        let us = ((now - sent) * 1e6).round().max(1.0) as u64;
        self.latency.saturating_record(us);
        let slot = (sent - self.since) / SLOT;
        // Bounded: an hour of slots at most, whatever a payload claims.
        if (0.0..36_000.0).contains(&slot) {
            let i = slot as usize;
            if self.slots.len() <= i {
                self.slots.resize(i + 1, 0);
            }
            self.slots[i] = self.slots[i].max(us);
        }
        let second = sent - self.since;
        if self.per_second && (0.0..3600.0).contains(&second) {
            let i = second as usize;
            while self.seconds.len() <= i {
                let h = Histogram::new_with_bounds(1, 600_000_000, 2).expect("histogram bounds");
                self.seconds.push(h);
            }
            self.seconds[i].saturating_record(us);
        }
        // The last cut at or before the send time names the part; none before the first or from the last on.
        let part = self.cuts.partition_point(|&c| c <= sent);
        if let Some(h) = part.checked_sub(1).and_then(|i| self.parts.get_mut(i)) {
            h.saturating_record(us);
        }
    }

    /// Slots whose worst latency is over `limit_us`, the slot count, and the worst slot (start in s, µs).
    fn slow_slots(&self, limit_us: u64) -> (usize, usize, Option<(f64, u64)>) {
        let over = self.slots.iter().filter(|&&us| us > limit_us).count();
        let worst = self
            .slots
            .iter()
            .enumerate()
            .max_by_key(|(_, &us)| us)
            .map(|(i, &us)| (i as f64 * SLOT, us));
        (over, self.slots.len(), worst)
    }
}

/// One MQTT connection of the bench's own: MQTT 3.1.1 over a plain socket, written by hand.
///
/// The publisher and the receiver stand in for many field gateways and a SCADA client; they are not what is
/// measured, but on two cores they share the CPU with what is. A rumqttc client writes one packet per system call
/// and wakes a thread per message, which costs about as much as the relay under test. These write a whole burst
/// of packets per call and parse everything a read returns, so most of the machine is left to the broker, the
/// daemon and the relay.
mod raw {
    use std::io::{self, Read, Write};
    use std::net::TcpStream;
    use std::time::Duration;

    /// Keep-alive announced at connect; each side sends a PINGREQ well within it.
    pub const KEEP_ALIVE_S: u16 = 60;
    pub const PING_EVERY: Duration = Duration::from_secs(20);

    /// Connects with a clean session and waits for a successful CONNACK.
    pub fn connect(port: u16, client_id: &str, nodelay: bool) -> io::Result<TcpStream> {
        let mut stream = TcpStream::connect(("127.0.0.1", port))?;
        stream.set_nodelay(nodelay)?;
        let mut body = Vec::new();
        put_str(&mut body, "MQTT");
        body.push(4); // protocol level 3.1.1
        body.push(0x02); // clean session
        body.extend_from_slice(&KEEP_ALIVE_S.to_be_bytes());
        put_str(&mut body, client_id);
        let mut packet = Vec::new();
        frame(&mut packet, 0x10, &body);
        stream.write_all(&packet)?;
        stream.set_read_timeout(Some(Duration::from_secs(5)))?;
        let mut ack = [0u8; 4];
        stream.read_exact(&mut ack)?;
        if ack[0] != 0x20 || ack[3] != 0 {
            return Err(io::Error::other(format!("CONNACK refused: {ack:?}")));
        }
        Ok(stream)
    }

    /// A SUBSCRIBE packet for `filters` at QoS 1.
    pub fn subscribe(out: &mut Vec<u8>, packet_id: u16, filters: &[&str]) {
        let mut body = packet_id.to_be_bytes().to_vec();
        for f in filters {
            put_str(&mut body, f);
            body.push(1);
        }
        frame(out, 0x82, &body);
    }

    /// Appends a PUBLISH packet (QoS 0 or 1; `packet_id` is used at QoS 1 only).
    pub fn publish(out: &mut Vec<u8>, topic: &str, payload: &[u8], qos: u8, packet_id: u16) {
        let id_len = if qos > 0 { 2 } else { 0 };
        out.push(0x30 | (qos << 1));
        put_len(out, 2 + topic.len() + id_len + payload.len());
        put_str(out, topic);
        if qos > 0 {
            out.extend_from_slice(&packet_id.to_be_bytes());
        }
        out.extend_from_slice(payload);
    }

    pub fn puback(out: &mut Vec<u8>, packet_id: u16) {
        out.push(0x40);
        out.push(2);
        out.extend_from_slice(&packet_id.to_be_bytes());
    }

    pub fn pingreq(out: &mut Vec<u8>) {
        out.extend_from_slice(&[0xC0, 0]);
    }

    pub fn disconnect(out: &mut Vec<u8>) {
        out.extend_from_slice(&[0xE0, 0]);
    }

    fn frame(out: &mut Vec<u8>, header: u8, body: &[u8]) {
        out.push(header);
        put_len(out, body.len());
        out.extend_from_slice(body);
    }

    fn put_str(out: &mut Vec<u8>, s: &str) {
        out.extend_from_slice(&(s.len() as u16).to_be_bytes());
        out.extend_from_slice(s.as_bytes());
    }

    /// MQTT's variable-length "remaining length".
    fn put_len(out: &mut Vec<u8>, mut n: usize) {
        loop {
            let mut byte = (n % 128) as u8;
            n /= 128;
            if n > 0 {
                byte |= 0x80;
            }
            out.push(byte);
            if n == 0 {
                break;
            }
        }
    }

    /// One packet from the broker.
    pub enum Incoming<'a> {
        Publish {
            topic: &'a str,
            payload: &'a [u8],
            /// Set at QoS 1: the id to acknowledge.
            packet_id: Option<u16>,
        },
        SubAck,
        Other,
    }

    /// Splits whole packets off the front of `buf`; returns how many bytes they took (the rest is a partial
    /// packet to complete with the next read), or an error for bytes that are not MQTT.
    pub fn parse<'a>(buf: &'a [u8], mut each: impl FnMut(Incoming<'a>)) -> io::Result<usize> {
        let mut at = 0;
        loop {
            let rest = &buf[at..];
            let Some((len, header_len)) = remaining_length(rest)? else {
                return Ok(at);
            };
            if rest.len() < header_len + len {
                return Ok(at);
            }
            let body = &rest[header_len..header_len + len];
            let kind = rest[0] >> 4;
            let packet = match kind {
                3 => {
                    let qos = (rest[0] >> 1) & 3;
                    let bad = || io::Error::other("malformed PUBLISH");
                    let topic_len = u16::from_be_bytes([
                        *body.first().ok_or_else(bad)?,
                        *body.get(1).ok_or_else(bad)?,
                    ]) as usize;
                    let topic = body.get(2..2 + topic_len).ok_or_else(bad)?;
                    let topic = std::str::from_utf8(topic).map_err(|_| bad())?;
                    let mut p = 2 + topic_len;
                    let packet_id = if qos > 0 {
                        let id = body.get(p..p + 2).ok_or_else(bad)?;
                        p += 2;
                        Some(u16::from_be_bytes([id[0], id[1]]))
                    } else {
                        None
                    };
                    Incoming::Publish {
                        topic,
                        payload: &body[p..],
                        packet_id,
                    }
                }
                9 => Incoming::SubAck,
                _ => Incoming::Other,
            };
            each(packet);
            at += header_len + len;
        }
    }

    /// (remaining length, bytes of fixed header), or None if the header is not complete yet.
    fn remaining_length(buf: &[u8]) -> io::Result<Option<(usize, usize)>> {
        let mut n = 0usize;
        for i in 0..4 {
            let Some(&byte) = buf.get(1 + i) else {
                return Ok(None);
            };
            n |= ((byte & 0x7F) as usize) << (7 * i);
            if byte & 0x80 == 0 {
                return Ok(Some((n, 2 + i)));
            }
        }
        Err(io::Error::other("remaining length longer than 4 bytes"))
    }
}

/// Subscribes to the outputs of the daemon and of the relay, and to the daemons' status; measures every output.
struct Receiver {
    clock: Clock,
    received: Arc<AtomicU64>,
    /// See `Receiver::batch_reads`.
    batch: Arc<AtomicBool>,
    /// See `Receiver::per_second`.
    per_second: AtomicBool,
    tally: Arc<Mutex<Tally>>,
    /// See `Receiver::set_lanes`. Locked after `tally`, never before it.
    lanes: Arc<Mutex<Lanes>>,
    status: mpsc::Receiver<(String, String)>,
    stop: Arc<AtomicBool>,
    thread: Option<JoinHandle<()>>,
}

/// Outputs told apart by topic prefix, so that two daemons answering the same inputs are measured side by side.
#[derive(Default)]
struct Lanes {
    prefixes: Vec<String>,
    /// Outputs received per lane since `set_lanes`.
    received: Vec<u64>,
    tallies: Vec<Tally>,
    /// `Tally::cuts` of every lane's tally.
    cuts: Vec<f64>,
}

impl Receiver {
    fn start(port: u16, clock: Clock, nodelay: bool) -> Result<Receiver, String> {
        let id = format!("gwbench-receiver-{}", std::process::id());
        let mut stream = raw::connect(port, &id, nodelay).map_err(|e| format!("receiver: {e}"))?;
        let mut out = Vec::new();
        // QoS 1 here only caps the delivery at the publisher's QoS: QoS 0 outputs still arrive at QoS 0.
        raw::subscribe(
            &mut out,
            1,
            &[
                DAEMON_OUT_FILTER,
                RELAY_OUT_FILTER,
                &format!("{STATUS_ROOT}/#"),
            ],
        );
        stream
            .write_all(&out)
            .and_then(|()| stream.set_read_timeout(Some(Duration::from_millis(100))))
            .map_err(|e| format!("receiver: {e}"))?;
        let received = Arc::new(AtomicU64::new(0));
        let tally = Arc::new(Mutex::new(Tally::new(clock.now())));
        let lanes = Arc::new(Mutex::new(Lanes::default()));
        let (status_tx, status) = mpsc::channel();
        let stop = Arc::new(AtomicBool::new(false));
        let subscribed = Arc::new(AtomicBool::new(false));
        let batch = Arc::new(AtomicBool::new(false));
        let thread = {
            let (received, tally, lanes, stop, subscribed, batch) = (
                received.clone(),
                tally.clone(),
                lanes.clone(),
                stop.clone(),
                subscribed.clone(),
                batch.clone(),
            );
            thread::Builder::new()
                .name("gwbench-receiver".into())
                .spawn(move || {
                    receive_loop(
                        stream,
                        clock,
                        &received,
                        &tally,
                        &lanes,
                        &status_tx,
                        &stop,
                        &subscribed,
                        &batch,
                    )
                })
                .map_err(|e| format!("receiver thread: {e}"))?
        };
        let receiver = Receiver {
            clock,
            received,
            batch,
            per_second: AtomicBool::new(false),
            tally,
            lanes,
            status,
            stop,
            thread: Some(thread),
        };
        if !wait_for(READY, || subscribed.load(Ordering::Relaxed)) {
            return Err(format!(
                "the receiver got no SUBACK from 127.0.0.1:{port} within {READY:?}"
            ));
        }
        Ok(receiver)
    }

    fn received(&self) -> u64 {
        self.received.load(Ordering::Relaxed)
    }

    /// On: the receiver pauses 1 ms after each read, so one read takes many outputs. Waking for every output
    /// costs about as much CPU as the relay under test; the pause adds up to 1 ms to the measured latency, so
    /// it is for the throughput and memory cases only.
    fn batch_reads(&self, on: bool) {
        self.batch.store(on, Ordering::Relaxed);
    }

    /// On: the tallies taken from now on keep a histogram per second, to tell stretches of a run apart.
    fn per_second(&self, on: bool) {
        self.per_second.store(on, Ordering::Relaxed);
    }

    fn take(&self) -> Tally {
        let now = self.clock.now();
        let per_second = self.per_second.load(Ordering::Relaxed);
        let mut tally = self.tally.lock().expect("tally lock");
        let mut lanes = self.lanes.lock().expect("lanes lock");
        let mut taken = std::mem::replace(&mut *tally, Tally::with_cuts(now, per_second, &[]));
        let Lanes { tallies, cuts, .. } = &mut *lanes;
        taken.lanes = tallies
            .iter_mut()
            .map(|t| std::mem::replace(t, Tally::with_cuts(now, per_second, cuts)))
            .collect();
        taken
    }

    /// From now on, outputs whose topic starts with one of `prefixes` are also tallied for that lane
    /// (`Tally::lanes`) and counted (`lane_received`). An empty list ends it.
    fn set_lanes(&self, prefixes: &[String]) {
        self.set_lanes_cut(prefixes, self.clock.now(), &[]);
    }

    /// `set_lanes`, with lane tallies that count their seconds from `since` and keep the parts between `cuts`.
    fn set_lanes_cut(&self, prefixes: &[String], since: f64, cuts: &[f64]) {
        let _tally = self.tally.lock().expect("tally lock");
        let mut lanes = self.lanes.lock().expect("lanes lock");
        let per_second = self.per_second.load(Ordering::Relaxed);
        *lanes = Lanes {
            prefixes: prefixes.to_vec(),
            received: vec![0; prefixes.len()],
            tallies: prefixes
                .iter()
                .map(|_| Tally::with_cuts(since, per_second, cuts))
                .collect(),
            cuts: cuts.to_vec(),
        };
    }

    /// Outputs received per lane since `set_lanes`.
    fn lane_received(&self) -> Vec<u64> {
        self.lanes.lock().expect("lanes lock").received.clone()
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
        self.stop.store(true, Ordering::Relaxed);
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

/// The receiver's thread: read whatever has arrived, measure every output in it, acknowledge QoS 1 deliveries.
#[allow(clippy::too_many_arguments)]
fn receive_loop(
    mut stream: TcpStream,
    clock: Clock,
    received: &AtomicU64,
    tally: &Mutex<Tally>,
    lanes: &Mutex<Lanes>,
    status: &mpsc::Sender<(String, String)>,
    stop: &AtomicBool,
    subscribed: &AtomicBool,
    batch: &AtomicBool,
) {
    let status_prefix = format!("{STATUS_ROOT}/");
    let mut buf = vec![0u8; 1 << 20];
    let mut filled = 0;
    let mut acks = Vec::new();
    let mut last_ping = Instant::now();
    while !stop.load(Ordering::Relaxed) {
        if last_ping.elapsed() >= raw::PING_EVERY {
            raw::pingreq(&mut acks);
            last_ping = Instant::now();
        }
        if !acks.is_empty() {
            if stream.write_all(&acks).is_err() {
                eprintln!("daemon_e2e: the receiver lost its connection");
                return;
            }
            acks.clear();
        }
        if filled == buf.len() {
            buf.resize(buf.len() * 2, 0);
        }
        let n = match stream.read(&mut buf[filled..]) {
            Ok(0) => {
                eprintln!("daemon_e2e: the broker closed the receiver's connection");
                return;
            }
            Ok(n) => n,
            // A read with a timeout is not restarted after a signal, such as the one a daemon child's exit sends.
            Err(e)
                if matches!(
                    e.kind(),
                    io::ErrorKind::WouldBlock
                        | io::ErrorKind::TimedOut
                        | io::ErrorKind::Interrupted
                ) =>
            {
                continue
            }
            Err(e) => {
                eprintln!("daemon_e2e: receiver: {e}");
                return;
            }
        };
        filled += n;
        let now = clock.now();
        let mut count = 0;
        let mut t = tally.lock().expect("tally lock");
        let mut l = lanes.lock().expect("lanes lock");
        let parsed = raw::parse(&buf[..filled], |packet| match packet {
            raw::Incoming::Publish {
                topic,
                payload,
                packet_id,
            } => {
                if let Some(id) = packet_id {
                    raw::puback(&mut acks, id);
                }
                if topic.starts_with(&status_prefix) {
                    let text = String::from_utf8_lossy(payload).into_owned();
                    let _ = status.send((topic.to_string(), text));
                    return;
                }
                count += 1;
                let sent = payload_time(payload);
                let not_ok =
                    topic.starts_with("gwbench/out/") && !contains(payload, b"\"status\":\"ok\"");
                let note = |t: &mut Tally| {
                    match sent {
                        Some(sent) => t.record(sent, now),
                        None => t.unreadable += 1,
                    }
                    if not_ok {
                        t.not_ok += 1;
                    }
                };
                note(&mut t);
                if let Some(i) = l
                    .prefixes
                    .iter()
                    .position(|p| topic.starts_with(p.as_str()))
                {
                    if let Some(n) = l.received.get_mut(i) {
                        *n += 1;
                    }
                    if let Some(lane) = l.tallies.get_mut(i) {
                        note(lane);
                    }
                }
            }
            raw::Incoming::SubAck => subscribed.store(true, Ordering::Relaxed),
            raw::Incoming::Other => {}
        });
        drop(l);
        drop(t);
        received.fetch_add(count, Ordering::Relaxed);
        match parsed {
            Ok(used) => {
                buf.copy_within(used..filled, 0);
                filled -= used;
            }
            Err(e) => {
                eprintln!("daemon_e2e: receiver: {e}");
                return;
            }
        }
        if batch.load(Ordering::Relaxed) {
            thread::sleep(Duration::from_millis(1));
        }
    }
    let mut bye = Vec::new();
    raw::disconnect(&mut bye);
    let _ = stream.write_all(&bye);
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

/// Publishes the samples: the driver encodes a burst into a buffer and writes it with one call. A thread reads
/// (and drops) what the broker sends back, PUBACKs at QoS 1, and keeps the connection alive while idle.
struct Publisher {
    stream: Arc<Mutex<TcpStream>>,
    last_write: Arc<Mutex<Instant>>,
    next_id: u16,
    stop: Arc<AtomicBool>,
    thread: Option<JoinHandle<()>>,
}

impl Publisher {
    fn start(port: u16, nodelay: bool) -> Result<Publisher, String> {
        let id = format!("gwbench-publisher-{}", std::process::id());
        let stream = raw::connect(port, &id, nodelay).map_err(|e| format!("publisher: {e}"))?;
        let mut reader = stream.try_clone().map_err(|e| format!("publisher: {e}"))?;
        reader
            .set_read_timeout(Some(Duration::from_millis(100)))
            .map_err(|e| format!("publisher: {e}"))?;
        let stream = Arc::new(Mutex::new(stream));
        let last_write = Arc::new(Mutex::new(Instant::now()));
        let stop = Arc::new(AtomicBool::new(false));
        let thread = {
            let (stream, last_write, stop) = (stream.clone(), last_write.clone(), stop.clone());
            thread::Builder::new()
                .name("gwbench-publisher".into())
                .spawn(move || {
                    let mut sink = vec![0u8; 64 * 1024];
                    while !stop.load(Ordering::Relaxed) {
                        match reader.read(&mut sink) {
                            Ok(0) => return,
                            Ok(_) => {}
                            Err(e)
                                if matches!(
                                    e.kind(),
                                    io::ErrorKind::WouldBlock
                                        | io::ErrorKind::TimedOut
                                        | io::ErrorKind::Interrupted
                                ) => {}
                            Err(_) => return,
                        }
                        let idle = last_write.lock().expect("lock").elapsed();
                        if idle >= raw::PING_EVERY {
                            let mut ping = Vec::new();
                            raw::pingreq(&mut ping);
                            let _ = stream.lock().expect("lock").write_all(&ping);
                            *last_write.lock().expect("lock") = Instant::now();
                        }
                    }
                })
                .map_err(|e| format!("publisher thread: {e}"))?
        };
        Ok(Publisher {
            stream,
            last_write,
            next_id: 0,
            stop,
            thread: Some(thread),
        })
    }

    /// Appends one PUBLISH to `out`.
    fn encode(&mut self, out: &mut Vec<u8>, topic: &str, payload: &[u8], qos: QoS) {
        let q = qos_number(qos);
        // Packet ids run 1..=65535 (0 is not allowed).
        self.next_id = self.next_id.checked_add(1).unwrap_or(1);
        raw::publish(out, topic, payload, q, self.next_id);
    }

    fn write(&self, bytes: &[u8]) -> io::Result<()> {
        self.stream.lock().expect("lock").write_all(bytes)?;
        *self.last_write.lock().expect("lock") = Instant::now();
        Ok(())
    }
}

impl Drop for Publisher {
    fn drop(&mut self) {
        let mut bye = Vec::new();
        raw::disconnect(&mut bye);
        let _ = self.write(&bye);
        self.stop.store(true, Ordering::Relaxed);
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
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

/// What case d changes in the daemon's configuration; the default is what cases a to c run.
struct Tuning {
    /// The input topics are `<input>/<channel>`.
    input: &'static str,
    /// The output topics are `<output>/<channel>`; under `gwbench/out/`, where the receiver listens.
    output: &'static str,
    /// The channels' nominal sample interval, s (the variances are per interval).
    interval: f64,
    /// Re-estimation on with this window (samples) and period (s); None: off.
    reestimate: Option<(usize, f64)>,
    /// The metrics endpoint on this loopback port; None: off.
    metrics_port: Option<u16>,
}

impl Default for Tuning {
    fn default() -> Self {
        Tuning {
            input: DAEMON_IN,
            output: DAEMON_OUT,
            interval: 1.0,
            reestimate: None,
            metrics_port: None,
        }
    }
}

impl Daemon {
    fn start(ctx: &Ctx, qos: QoS, max_channels: usize) -> Result<Daemon, String> {
        Daemon::start_tuned(ctx, qos, max_channels, &Tuning::default())
    }

    fn start_tuned(
        ctx: &Ctx,
        qos: QoS,
        max_channels: usize,
        tuning: &Tuning,
    ) -> Result<Daemon, String> {
        static NEXT: AtomicU64 = AtomicU64::new(0);
        let client_id = format!(
            "gwbench-daemon-{}-{}",
            std::process::id(),
            NEXT.fetch_add(1, Ordering::Relaxed)
        );
        let status = format!("{STATUS_ROOT}/{client_id}");
        let q = qos_number(qos);
        let mut config = format!(
            r#"# Generated by benches/daemon_e2e.rs: loopback broker, one JSON input per sample, no stale reports.
[broker]
host = "127.0.0.1"
port = {port}
client_id = "{client_id}"
clean_session = true
keep_alive_s = 30

[[inputs]]
topic = "{input}/+"
channel = "{{{level}}}"
qos = {q}
payload = "json"
value = "/v"
time = "/t"
time_format = "epoch_s"

[output]
topic = "{output}/{{channel}}"
qos = {q}

[status]
topic = "{status}"

[timing]
stale_after_s = 0

[limits]
max_channels = {max_channels}

[channels.default]
model = "level"
interval = {interval:?}
obs_var = {DAEMON_OBS_VAR:?}
level_var = {DAEMON_LEVEL_VAR:?}
"#,
            port = ctx.port,
            interval = tuning.interval,
            input = tuning.input,
            output = tuning.output,
            // The channel is the level after the input prefix (levels count from 0).
            level = tuning.input.split('/').count(),
        );
        if let Some((window, every_s)) = tuning.reestimate {
            let _ = write!(
                config,
                "\n[reestimate]\nenabled = true\nwindow = {window}\nevery_s = {every_s:?}\n"
            );
        }
        if let Some(port) = tuning.metrics_port {
            let _ = write!(config, "\n[metrics]\nlisten = \"127.0.0.1:{port}\"\n");
        }
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

    /// SIGTERM, then up to 6 s for a clean exit; prints the daemon's warnings and errors, if any, and returns its
    /// log.
    fn stop(mut self) -> String {
        let Some(mut child) = self.child.take() else {
            return String::new();
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
        log
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
    /// The values to send, per channel (None: a fixed pattern around 50, which is all the filter needs for speed).
    signal: Option<&'a RefCell<Walk>>,
    /// Called once, as the measured window begins (case d reads the daemon's counters there).
    at_measure: Option<&'a dyn Fn()>,
    /// Outputs per sample: 1, or 2 when two daemons answer the same inputs (case d, paired).
    fanout: u64,
    /// Processes whose CPU time the window reports one by one (`Window::watched_ticks`), besides the subject.
    watch: &'a [u32],
}

/// CPU and output counts over the measured window of a drive.
#[derive(Default)]
struct Window {
    secs: f64,
    sent: u64,
    outputs: u64,
    subject_ticks: u64,
    /// Context switches of the subject.
    switches: u64,
    broker_ticks: Option<u64>,
    /// This process: publisher, receiver, driver (and the relay's thread when `subject_in_bench`).
    bench_ticks: u64,
    /// Every CPU of the machine, busy (steal included).
    machine_ticks: u64,
    subject_in_bench: bool,
    /// CPU ticks of each of `Drive::watch`, in its order.
    watched_ticks: Vec<u64>,
    /// Outputs received per lane (`Receiver::set_lanes`).
    lane_outputs: Vec<u64>,
}

impl Window {
    fn cpu_us_per_output(&self, ticks_per_s: f64) -> f64 {
        self.subject_ticks as f64 / ticks_per_s * 1e6 / self.outputs.max(1) as f64
    }

    /// The subject's context switches per output: a thread going to sleep and being woken again, which on a
    /// virtual machine costs more than most of the work on a sample.
    fn switches_per_output(&self) -> f64 {
        self.switches as f64 / self.outputs.max(1) as f64
    }

    /// Percent of one core.
    fn share(&self, ticks: u64, ticks_per_s: f64) -> f64 {
        ticks as f64 / ticks_per_s / self.secs.max(1e-9) * 100.0
    }

    /// Where the CPU went, in percent of one core: the subject, the broker, the bench's own clients, and every
    /// other process on the machine (other engineers' builds, other VMs' steal).
    fn shares(&self, ticks_per_s: f64) -> String {
        let pct = |t: u64| self.share(t, ticks_per_s);
        let driver = if self.subject_in_bench {
            self.bench_ticks.saturating_sub(self.subject_ticks)
        } else {
            self.bench_ticks
        };
        let ours = self.subject_ticks + driver + self.broker_ticks.unwrap_or(0);
        format!(
            "{:>6.0} {:>8} {:>7.0} {:>7.0}",
            pct(self.subject_ticks),
            self.broker_ticks
                .map_or("n/a".into(), |t| format!("{:.0}", pct(t))),
            pct(driver),
            pct(self.machine_ticks.saturating_sub(ours)),
        )
    }
}

const SHARES_NOTE: &str = "   (percent of one core: CPU % the relay's thread or the daemon process; broker % the Mosquitto \
     process; bench % this bench's publisher, receiver and driver; other % everything else on the machine)";

/// Header of the columns `Window::shares` prints.
const SHARES_HEADER: &str = " CPU %  broker %  bench %  other %";

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
    /// The outputs of the samples sent in the measured window (latency, status), received by the end of the drain.
    tally: Tally,
    /// Times the closed loop gave up waiting for outstanding outputs.
    stalls: u64,
    /// `Drive::fanout`.
    fanout: u64,
    /// Over the whole drive, per lane (`Receiver::set_lanes`).
    lane_received: Vec<u64>,
}

impl DriveResult {
    fn lost(&self) -> u64 {
        (self.sent * self.fanout).saturating_sub(self.received)
    }

    /// Samples lane `i` did not answer.
    fn lane_lost(&self, i: usize) -> u64 {
        self.sent
            .saturating_sub(self.lane_received.get(i).copied().unwrap_or(0))
    }
}

struct Probe {
    at: Instant,
    sent: u64,
    received: u64,
    subject: u64,
    switches: u64,
    broker: Option<u64>,
    bench: u64,
    machine: u64,
    watched: Vec<u64>,
    lanes: Vec<u64>,
}

/// Publishes samples as `drive` says, waits for the outputs, and measures the window after the warm-up.
fn drive(ctx: &Ctx, d: &Drive, subject: Subject) -> DriveResult {
    let rx = ctx.receiver;
    let base = rx.received();
    let lane_base = rx.lane_received();
    let probe = |sent: u64| Probe {
        at: Instant::now(),
        sent,
        received: rx.received() - base,
        subject: subject.ticks(),
        switches: subject.switches(),
        broker: ctx
            .broker_pid
            .and_then(|pid| stat_ticks(&format!("/proc/{pid}/stat"))),
        bench: stat_ticks("/proc/self/stat").unwrap_or(0),
        machine: machine_ticks().unwrap_or(0),
        watched: d
            .watch
            .iter()
            .map(|pid| stat_ticks(&format!("/proc/{pid}/stat")).unwrap_or(0))
            .collect(),
        lanes: rx.lane_received(),
    };
    let _ = rx.take();
    let start = Instant::now();
    let measure_from = start + d.warmup;
    let end = d.measure.map(|m| measure_from + m);
    let mut sent: u64 = 0;
    let mut first: Option<Probe> = if d.warmup.is_zero() {
        if let Some(hook) = d.at_measure {
            hook();
        }
        Some(probe(0))
    } else {
        None
    };
    let mut payload = String::with_capacity(64);
    let mut burst = Vec::with_capacity(64 * 128);
    let mut publisher = ctx.publisher.lock().expect("publisher lock");
    // A closed loop would stall for good on one lost sample: after a pause with no output it stops waiting for
    // what is outstanding (counted as `stalls`; the lost samples show in `lost`).
    let mut forgiven: u64 = 0;
    let mut stalls: u64 = 0;
    let mut progress = (rx.received(), Instant::now());
    loop {
        let now = Instant::now();
        if first.is_none() && now >= measure_from {
            first = Some(probe(sent));
            if let Some(hook) = d.at_measure {
                hook();
            }
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
        // A short burst in one write, then back to the clock: at most ~1 ms of samples at a time.
        burst.clear();
        for _ in 0..(allowed - sent).min(64) {
            let index = (sent % d.topics.len() as u64) as usize;
            let topic = &d.topics[index];
            payload.clear();
            let value = match d.signal {
                Some(walk) => walk.borrow_mut().next(index),
                // Hash noise per channel and sample: the round number `sent / topics` must enter, or every
                // channel would see one constant value (and be flagged stuck).
                None => {
                    let n = sent / d.topics.len() as u64;
                    let h = n.wrapping_mul(2_654_435_761) ^ (index as u64).wrapping_mul(40_503);
                    50.0 + ((h.wrapping_mul(2_654_435_761) >> 7) % 1000) as f64 / 500.0
                }
            };
            let _ = write!(payload, "{{\"v\":{value:.3},\"t\":{}}}", ctx.clock.now());
            publisher.encode(&mut burst, topic, payload.as_bytes(), d.qos);
            sent += 1;
        }
        if let Err(e) = publisher.write(&burst) {
            eprintln!("daemon_e2e: the publisher lost its connection: {e}");
            break;
        }
    }
    let last = probe(sent);
    let first = first.unwrap_or_else(|| probe(0));

    // Stragglers: until everything is answered, nothing has come for DRAIN_QUIET, or DRAIN_MAX.
    let drain_end = Instant::now() + DRAIN_MAX;
    let mut seen = rx.received();
    let mut quiet_since = Instant::now();
    while rx.received() - base < sent * d.fanout && Instant::now() < drain_end {
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
            switches: last.switches.saturating_sub(first.switches),
            broker_ticks: last
                .broker
                .zip(first.broker)
                .map(|(l, f)| l.saturating_sub(f)),
            bench_ticks: last.bench.saturating_sub(first.bench),
            machine_ticks: last.machine.saturating_sub(first.machine),
            subject_in_bench: matches!(subject, Subject::Thread(_)),
            watched_ticks: differences(&last.watched, &first.watched),
            lane_outputs: differences(&last.lanes, &first.lanes),
        },
        tally,
        stalls,
        fanout: d.fanout,
        lane_received: differences(&rx.lane_received(), &lane_base),
    }
}

/// `later - earlier`, element by element (counters read twice).
fn differences(later: &[u64], earlier: &[u64]) -> Vec<u64> {
    later
        .iter()
        .zip(earlier)
        .map(|(l, e)| l.saturating_sub(*e))
        .collect()
}

fn topics(prefix: &str, n: usize) -> Vec<String> {
    (0..n).map(|i| format!("{prefix}/ch{i:06}")).collect()
}

/// Busy time of all CPUs (user, nice, system, irq, softirq, steal), in clock ticks, from /proc/stat.
fn machine_ticks() -> Option<u64> {
    let text = std::fs::read_to_string("/proc/stat").ok()?;
    let line = text.lines().find(|l| l.starts_with("cpu "))?;
    let f: Vec<u64> = line
        .split_whitespace()
        .skip(1)
        .map(|x| x.parse().unwrap_or(0))
        .collect();
    // user nice system idle iowait irq softirq steal
    Some([0, 1, 2, 5, 6, 7].iter().filter_map(|&i| f.get(i)).sum())
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
