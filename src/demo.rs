//! `gaugewise demo`: the whole daemon on one machine with nothing installed and nothing configured.
//!
//! It starts the embedded broker on a free loopback port, the simulated Brackenfield Works plant (`simulate`)
//! publishing raw samples as a gateway would (with dropouts, spike bursts on the vessel temperature, a feed flow
//! transmitter that sticks, and one tank transmitter that falls silent for ten seconds every minute so the stale
//! predictions show), the daemon itself (`runtime::run`, the same code as `gaugewise run`) against that broker, and a
//! subscriber that watches the outputs for the live view. The configuration is generated here in the same TOML
//! format an engineer would write, and parsed by `config`.
//!
//! The live view shows per channel the latest output, its flags and a sparkline of the estimate, and a footer of
//! rates. It sees the daemon only through its outputs, as any subscriber would: "rejects" are the samples the
//! gateway sent that came back with no output (refused messages) or as late or duplicate. On a terminal the view
//! is redrawn in place; otherwise (a pipe, a test) the same blocks follow one another, and flag changes are printed
//! as lines, so the output stays readable. At the end, the session's outputs become a replay-style HTML report
//! ([`DemoReport::report_html`]), with flag spans from the changes of each output's active flags.

use crate::broker::{BrokerError, EmbeddedBroker};
use crate::config::{model_to_toml, Config, ConfigError};
use crate::detect::{DesignError, FlagSet, FlagSettings};
use crate::html_report::{self, ChannelTrace};
use crate::publish::OutputMessage;
use crate::replay::{flag_kind, TraceBuilder};
use crate::runtime::{self, CounterSnapshot, RuntimeError};
use crate::simulate::{Plant, Reading, BRACKENFIELD_FAULTS};
use rumqttc::{AsyncClient, Event, MqttOptions, Packet, QoS};
use std::collections::{BTreeMap, VecDeque};
use std::fmt::Write as _;
use std::future::Future;
use std::io::Write;
use std::path::PathBuf;
use std::sync::{Arc, Mutex};
use std::time::Duration;
use thiserror::Error;

/// Topic prefix of the simulated gateway's raw samples; the channel is the last level.
pub const RAW_PREFIX: &str = "brackenfield/raw";
/// Where the daemon publishes, `{channel}` being the tag.
pub const CLEAN_TEMPLATE: &str = "brackenfield/clean/{channel}";
/// The tank transmitter that goes silent, and when: seconds 30 to 40 of every minute of the demo.
const SILENT_TAG: &str = "LT-301";
const SILENT_FROM_S: f64 = 30.0;
const SILENT_TO_S: f64 = 40.0;
/// Sparkline: this many characters, each the mean estimate over this many seconds (one minute in all).
const SPARK_WIDTH: usize = 30;
const SPARK_BUCKET_S: f64 = 2.0;
const BLOCKS: [char; 8] = ['▁', '▂', '▃', '▄', '▅', '▆', '▇', '█'];
/// Rates are averaged over the last few seconds, so they neither jump with each refresh nor lag for long.
const RATE_WINDOW: Duration = Duration::from_secs(5);
/// Flag changes listed under the table on a terminal.
const RECENT_EVENTS: usize = 5;
/// Samples kept per channel for the report (about six days of the fastest tag): memory stays bounded however long
/// the demo runs. Flags are kept beyond it.
const MAX_TRACE_SAMPLES: usize = 1_000_000;
/// Published samples awaiting their output, per channel; beyond this the oldest are forgotten, not counted.
const MAX_PENDING: usize = 10_000;

#[derive(Debug, Error)]
pub enum DemoError {
    #[error("embedded broker: {0}")]
    Broker(#[from] BrokerError),
    #[error("generated demo configuration is invalid (a bug): {0}")]
    Config(#[from] ConfigError),
    #[error("generated demo flag design is invalid (a bug): {0}")]
    Flags(#[from] DesignError),
    #[error(transparent)]
    Runtime(#[from] RuntimeError),
    #[error("cannot write the table: {0}")]
    Output(#[from] std::io::Error),
}

/// What the demo did, for its closing line and its report.
#[derive(Debug, Clone)]
pub struct DemoReport {
    pub published: u64,
    pub outputs: u64,
    /// The daemon's counters; None if it did not stop within its 5 s budget.
    pub counters: Option<CounterSnapshot>,
    /// Wall-clock start (epoch seconds) and length of the session.
    pub started: f64,
    pub seconds: f64,
    /// Per channel, the outputs received, for [`DemoReport::report_html`].
    pub traces: Vec<ChannelTrace>,
    /// Whether a channel reached [`MAX_TRACE_SAMPLES`], so the traces hold only the start of the session.
    pub truncated: bool,
}

impl DemoReport {
    /// The session as a replay-style report: per channel the raw values, the estimate with its band and the
    /// flags, and the table of flags.
    pub fn report_html(&self) -> String {
        let mut title = format!(
            "gaugewise demo: simulated Brackenfield Works, {:.0} s from {}",
            self.seconds,
            chrono::DateTime::from_timestamp(self.started as i64, 0).map_or_else(
                || "?".to_string(),
                |t| t.format("%Y-%m-%d %H:%M:%S UTC").to_string()
            )
        );
        if self.truncated {
            let _ = write!(title, " (first {MAX_TRACE_SAMPLES} samples per channel)");
        }
        html_report::replay_report(&self.traces, &title)
    }
}

/// Where the report goes without `--report`: the temporary directory, named by the start time, so a run never
/// litters the working copy and never overwrites an earlier run's report.
pub fn default_report_path() -> PathBuf {
    let now = chrono::Utc::now().format("%Y%m%d-%H%M%S");
    std::env::temp_dir().join(format!("gaugewise-demo-{now}-{}.html", std::process::id()))
}

/// The mean estimate per [`SPARK_BUCKET_S`] seconds over the last minute.
#[derive(Debug, Default)]
struct Spark {
    /// (bucket number since the start, sum, count), ascending.
    buckets: VecDeque<(i64, f64, u32)>,
}

impl Spark {
    fn push(&mut self, elapsed: f64, value: f64) {
        if !(value.is_finite() && elapsed.is_finite()) {
            return;
        }
        let b = (elapsed / SPARK_BUCKET_S).floor() as i64;
        match self.buckets.back_mut() {
            Some(last) if last.0 == b => {
                last.1 += value;
                last.2 += 1;
            }
            // Outputs of a channel arrive in time order; an older one (late) is left out of the picture.
            Some(last) if last.0 > b => {}
            _ => self.buckets.push_back((b, value, 1)),
        }
        while self.buckets.len() > SPARK_WIDTH {
            self.buckets.pop_front();
        }
    }

    /// The last minute up to `elapsed` seconds, oldest left; a blank where the channel sent nothing.
    fn render(&self, elapsed: f64) -> String {
        let now = (elapsed / SPARK_BUCKET_S).floor() as i64;
        let first = now - SPARK_WIDTH as i64 + 1;
        let shown: Vec<(i64, f64)> = self
            .buckets
            .iter()
            .filter(|(b, _, _)| *b >= first && *b <= now)
            .map(|(b, sum, n)| (*b, sum / f64::from(*n)))
            .collect();
        let lo = shown.iter().map(|x| x.1).fold(f64::INFINITY, f64::min);
        let hi = shown.iter().map(|x| x.1).fold(f64::NEG_INFINITY, f64::max);
        let mut out = String::with_capacity(SPARK_WIDTH * 3);
        for b in first..=now {
            match shown.iter().find(|x| x.0 == b) {
                Some((_, v)) => {
                    // A flat line sits mid-height rather than on the floor, so it does not read as "low".
                    let level = if hi - lo > 1e-12 * hi.abs().max(1.0) {
                        (((v - lo) / (hi - lo)) * (BLOCKS.len() - 1) as f64).round() as usize
                    } else {
                        BLOCKS.len() / 2 - 1
                    };
                    out.push(BLOCKS[level.min(BLOCKS.len() - 1)]);
                }
                None => out.push(' '),
            }
        }
        out
    }
}

/// One channel as the viewer sees it.
#[derive(Debug)]
struct Lane {
    unit: &'static str,
    latest: Option<OutputMessage>,
    count: u64,
    spark: Spark,
    trace: TraceBuilder,
    settings: FlagSettings,
    /// Times of the samples published on this channel whose output has not come back yet.
    pending: VecDeque<f64>,
}

/// What the viewer has seen, shared by the subscriber (writes) and the drawing loop (reads).
#[derive(Debug)]
struct Board {
    start: f64,
    lanes: BTreeMap<String, Lane>,
    outputs: u64,
    /// Samples published that came back late or duplicate, or not at all (refused by the daemon).
    rejects: u64,
    withheld: u64,
    flags_raised: u64,
    truncated: bool,
    /// Flag changes, newest last: the last few for the terminal, and those not yet printed for plain output.
    recent: VecDeque<String>,
    unprinted: Vec<String>,
}

impl Board {
    fn new(start: f64, lanes: BTreeMap<String, Lane>) -> Self {
        Board {
            start,
            lanes,
            outputs: 0,
            rejects: 0,
            withheld: 0,
            flags_raised: 0,
            truncated: false,
            recent: VecDeque::new(),
            unprinted: Vec::new(),
        }
    }

    /// The gateway published a sample of `channel` at `time`.
    fn published(&mut self, channel: &str, time: f64) {
        if let Some(lane) = self.lanes.get_mut(channel) {
            if lane.pending.len() >= MAX_PENDING {
                lane.pending.pop_front();
            }
            lane.pending.push_back(time);
        }
    }

    fn output(&mut self, msg: OutputMessage) {
        self.outputs += 1;
        let start = self.start;
        let Some(lane) = self.lanes.get_mut(&msg.channel) else {
            return;
        };
        // Samples sent before a channel's first output may have gone out before the daemon (or this viewer) had
        // subscribed: lost at the start, not refused, so they are not counted.
        let counting = lane.count > 0;
        lane.count += 1;
        let status = msg.status.as_str();
        // A channel's outputs come back in the order its samples went out, so a published sample older than this
        // output's has been refused. Stale outputs carry the forecast time, not a sample's.
        if status != "stale" {
            while let Some(&t) = lane.pending.front() {
                if t < msg.time - 1e-6 {
                    self.rejects += u64::from(counting);
                    lane.pending.pop_front();
                } else {
                    if (t - msg.time).abs() <= 1e-6 {
                        lane.pending.pop_front();
                    }
                    break;
                }
            }
        }
        match status {
            "late" | "duplicate" | "rejected" => self.rejects += 1,
            _ => {
                if status == "withheld" {
                    self.withheld += 1;
                }
                let estimate = msg.estimate.unwrap_or(f64::NAN);
                // JSON has no infinity: a null std beside an estimate is a model still diffuse.
                let std = match (msg.estimate, msg.std) {
                    (_, Some(s)) => s,
                    (Some(_), None) => f64::INFINITY,
                    (None, None) => f64::NAN,
                };
                if lane.trace.len() < MAX_TRACE_SAMPLES {
                    lane.trace
                        .sample(msg.time, msg.raw.unwrap_or(f64::NAN), estimate, std);
                } else {
                    self.truncated = true;
                }
                lane.spark.push(msg.time - start, estimate);
            }
        }
        let active: FlagSet = msg.flags.iter().filter_map(|f| flag_kind(f)).collect();
        let before = lane.trace.active();
        let clock = clock_text(msg.time - start);
        let mut events = Vec::new();
        for k in active.iter().filter(|k| !before.contains(*k)) {
            self.flags_raised += 1;
            events.push(format!(
                "{clock}  {:<8} {} raised ({})",
                msg.channel,
                k.as_str(),
                lane.settings.severity(k).as_str()
            ));
        }
        for k in before.iter().filter(|k| !active.contains(*k)) {
            events.push(format!(
                "{clock}  {:<8} {} cleared",
                msg.channel,
                k.as_str()
            ));
        }
        lane.trace.follow(msg.time, active);
        lane.latest = Some(msg);
        for e in events {
            self.event(e);
        }
    }

    fn event(&mut self, text: String) {
        if self.recent.len() >= RECENT_EVENTS {
            self.recent.pop_front();
        }
        self.recent.push_back(text.clone());
        // Bounded: a view that is never drawn (it always is) must not grow without end.
        if self.unprinted.len() < 1000 {
            self.unprinted.push(text);
        }
    }
}

/// `mm:ss` since the start (`h:mm:ss` after an hour).
fn clock_text(elapsed: f64) -> String {
    let s = elapsed.max(0.0).floor() as u64;
    if s >= 3600 {
        format!("{}:{:02}:{:02}", s / 3600, s / 60 % 60, s % 60)
    } else {
        format!("{:02}:{:02}", s / 60, s % 60)
    }
}

/// Samples per second in and outputs per second out, over the last [`RATE_WINDOW`].
#[derive(Debug, Default)]
struct Rates {
    history: VecDeque<(tokio::time::Instant, u64, u64)>,
}

impl Rates {
    fn update(&mut self, now: tokio::time::Instant, published: u64, outputs: u64) -> (f64, f64) {
        self.history.push_back((now, published, outputs));
        while self.history.len() > 2 && now.duration_since(self.history[1].0) >= RATE_WINDOW {
            self.history.pop_front();
        }
        let (t0, p0, o0) = self.history[0];
        let dt = now.duration_since(t0).as_secs_f64();
        if dt <= 0.0 {
            return (0.0, 0.0);
        }
        ((published - p0) as f64 / dt, (outputs - o0) as f64 / dt)
    }
}

/// The configuration the demo runs: what an engineer would write for this plant.
pub fn config_text(port: u16, plant: &Plant) -> String {
    let mut text = format!(
        "# Generated by `gaugewise demo` for the simulated Brackenfield Works.\n\
         [broker]\nhost = \"127.0.0.1\"\nport = {port}\nclient_id = \"gaugewise-demo\"\nclean_session = true\n\
         reconnect_min_s = 0.2\nreconnect_max_s = 2.0\n\n\
         [[inputs]]\ntopic = \"{RAW_PREFIX}/+\"\nchannel = \"{{2}}\"\nqos = 0\npayload = \"json\"\n\
         value = \"/v\"\ntime = \"/t\"\n\n\
         [output]\ntopic = \"{CLEAN_TEMPLATE}\"\nqos = 0\n\n\
         [status]\ntopic = \"gaugewise/demo/status\"\n\n\
         [timing]\nstale_after_s = 5.0\nstale_every_s = 1.0\n\n"
    );
    text.push_str(&model_to_toml(
        &crate::model::ModelSpec {
            interval: 1.0,
            params: crate::model::ModelParams::Level {
                obs_var: 1.0,
                level_var: 0.01,
            },
        },
        "[channels.default]",
        None,
    ));
    for tag in &plant.tags {
        text.push('\n');
        text.push_str(&model_to_toml(
            &tag.model,
            "channels.override",
            Some(tag.name),
        ));
    }
    text
}

/// Runs the demo until `stop` completes, redrawing the view on `out` every `refresh`.
/// `clear` redraws in place (a terminal); otherwise each view is printed after the previous one, with flag changes
/// as lines of their own. A last view is drawn after the daemon has stopped.
pub async fn run(
    stop: impl Future<Output = ()>,
    out: &mut (impl Write + Send),
    refresh: Duration,
    clear: bool,
) -> Result<DemoReport, DemoError> {
    let broker = EmbeddedBroker::start()?;
    let port = broker.port();
    let start = runtime::wall_clock();
    let mut plant = Plant::brackenfield(start, 0x6761_7567).with_faults(&BRACKENFIELD_FAULTS);
    let config = Config::from_str(&config_text(port, &plant), "gaugewise demo (generated)")?;
    let daemon = config.daemon()?;
    let mut lanes = BTreeMap::new();
    for t in &plant.tags {
        let settings = daemon
            .channels
            .flags_for(t.name)
            .resolve(daemon.channels.model_for(t.name).interval)?;
        lanes.insert(
            t.name.to_string(),
            Lane {
                unit: t.unit,
                latest: None,
                count: 0,
                spark: Spark::default(),
                trace: TraceBuilder::new(t.name, &settings),
                settings,
                pending: VecDeque::new(),
            },
        );
    }
    let legend = legend(&plant);
    let (settings, pipeline) = runtime::from_config(&daemon, start)?;
    let channels = Arc::new(daemon.channels.clone());

    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let daemon_task = tokio::spawn(runtime::run(settings, channels, pipeline, async {
        let _ = stop_rx.await;
    }));

    // The view's subscriber.
    let board = Arc::new(Mutex::new(Board::new(start, lanes)));
    let mut opts = MqttOptions::new("gaugewise-demo-view", "127.0.0.1", port);
    opts.set_max_packet_size(64 * 1024, 64 * 1024);
    opts.set_keep_alive(Duration::from_secs(30));
    let (viewer, mut view_loop) = AsyncClient::new(opts, 1024);
    let view_board = board.clone();
    let view_task = tokio::spawn(async move {
        loop {
            match view_loop.poll().await {
                Ok(Event::Incoming(Packet::ConnAck(_))) => {
                    let _ = viewer
                        .subscribe(CLEAN_TEMPLATE.replace("{channel}", "+"), QoS::AtMostOnce)
                        .await;
                }
                Ok(Event::Incoming(Packet::Publish(p))) => {
                    if let Ok(msg) = OutputMessage::parse(&p.payload) {
                        lock(&view_board).output(msg);
                    }
                }
                Ok(_) => {}
                // Our own loop's backoff: the embedded broker is local, so a short pause suffices.
                Err(_) => tokio::time::sleep(Duration::from_millis(200)).await,
            }
        }
    });

    // The simulated gateway.
    let mut gw_opts = MqttOptions::new("brackenfield-sim-gateway", "127.0.0.1", port);
    gw_opts.set_max_packet_size(64 * 1024, 64 * 1024);
    let (gateway, mut gw_loop) = AsyncClient::new(gw_opts, 4096);
    let gw_task = tokio::spawn(async move {
        loop {
            if gw_loop.poll().await.is_err() {
                tokio::time::sleep(Duration::from_millis(200)).await;
            }
        }
    });

    if !clear {
        // Plain output: the legend once, not with every block.
        out.write_all(legend.as_bytes())?;
        writeln!(out)?;
        out.flush()?;
    }
    tokio::pin!(stop);
    let mut tick = tokio::time::interval(Duration::from_millis(100));
    let mut last_draw = tokio::time::Instant::now();
    let mut rates = Rates::default();
    let mut due: Vec<(usize, Reading)> = Vec::new();
    let mut published = 0u64;
    loop {
        tokio::select! {
            _ = &mut stop => break,
            _ = tick.tick() => {}
        }
        let now = runtime::wall_clock();
        plant.advance(now, &mut due);
        for (i, reading) in &due {
            let tag = plant.tags[*i].name;
            let phase = (reading.time - start).rem_euclid(60.0);
            if tag == SILENT_TAG && (SILENT_FROM_S..SILENT_TO_S).contains(&phase) {
                continue;
            }
            let payload = match reading.value {
                Some(v) => format!("{{\"v\":{v},\"t\":{}}}", reading.time),
                None => format!("{{\"v\":null,\"t\":{}}}", reading.time),
            };
            if gateway
                .try_publish(
                    format!("{RAW_PREFIX}/{tag}"),
                    QoS::AtMostOnce,
                    false,
                    payload,
                )
                .is_ok()
            {
                published += 1;
                lock(&board).published(tag, reading.time);
            }
        }
        if last_draw.elapsed() >= refresh {
            last_draw = tokio::time::Instant::now();
            let outputs = lock(&board).outputs;
            let (rate_in, rate_out) = rates.update(last_draw, published, outputs);
            draw(
                out,
                &mut lock(&board),
                &View {
                    port,
                    elapsed: now - start,
                    rate_in,
                    rate_out,
                    clear,
                    legend: &legend,
                },
            )?;
        }
    }

    let _ = stop_tx.send(());
    let counters = match tokio::time::timeout(Duration::from_secs(5), daemon_task).await {
        Ok(Ok(result)) => Some(result?.counters),
        // The daemon task panicked or overran its own 5 s budget: report what we know.
        _ => None,
    };
    // The daemon has flushed its outputs; give the local broker a moment to hand the last ones to the viewer.
    tokio::time::sleep(Duration::from_millis(200)).await;
    gw_task.abort();
    view_task.abort();
    broker.shutdown();
    let seconds = runtime::wall_clock() - start;
    let mut b = lock(&board);
    let (rate_in, rate_out) = rates.update(tokio::time::Instant::now(), published, b.outputs);
    draw(
        out,
        &mut b,
        &View {
            port,
            elapsed: seconds,
            rate_in,
            rate_out,
            clear,
            legend: &legend,
        },
    )?;
    let outputs = b.outputs;
    let truncated = b.truncated;
    let lanes = std::mem::take(&mut b.lanes);
    drop(b);
    Ok(DemoReport {
        published,
        outputs,
        counters,
        started: start,
        seconds,
        traces: lanes.into_values().map(|l| l.trace.finish()).collect(),
        truncated,
    })
}

/// The board, even if a holder panicked: it is only counters and display state, always consistent enough to draw.
fn lock(board: &Mutex<Board>) -> std::sync::MutexGuard<'_, Board> {
    board.lock().unwrap_or_else(|e| e.into_inner())
}

/// What one drawing needs besides the board.
struct View<'a> {
    port: u16,
    elapsed: f64,
    rate_in: f64,
    rate_out: f64,
    clear: bool,
    legend: &'a str,
}

fn draw(out: &mut impl Write, board: &mut Board, view: &View) -> Result<(), DemoError> {
    let text = render(board, view);
    if view.clear {
        // Cursor home and clear: redraw in place.
        write!(out, "\x1b[H\x1b[2J")?;
    } else {
        for line in board.unprinted.iter() {
            writeln!(out, "flag: {line}")?;
        }
    }
    board.unprinted.clear();
    out.write_all(text.as_bytes())?;
    if !view.clear {
        writeln!(out)?;
    }
    out.flush()?;
    Ok(())
}

/// What the view explains below the table: the tags and their simulated faults, the words used.
fn legend(plant: &Plant) -> String {
    let mut s = String::new();
    for t in &plant.tags {
        let mut faults: Vec<String> = plant
            .faults()
            .filter(|f| f.tag == t.name)
            .map(|f| f.describe(t.unit))
            .collect();
        if t.name == SILENT_TAG {
            faults.push(format!(
                "silent for {} s at 0:{SILENT_FROM_S:02}, every 60 s",
                SILENT_TO_S - SILENT_FROM_S
            ));
        }
        let _ = writeln!(
            s,
            "{} {} ({}): {}",
            t.name,
            t.description,
            t.unit,
            if faults.is_empty() {
                "healthy".to_string()
            } else {
                faults.join("; ")
            }
        );
    }
    s.push_str(
        "status: ok = filtered, missing = dropout bridged by prediction, withheld = value not used (spike,\n\
         stuck), stale = no sample for a while (a forecast whose std grows). rejects = samples not used.\n\
         Simulated data. Flags are advisory: gaugewise is not a safety function.\n",
    );
    s
}

/// One view: header, a row per channel, the footer of rates, and on a terminal the recent flag changes and the
/// legend.
fn render(board: &Board, view: &View) -> String {
    let mut s = format!(
        "gaugewise demo: simulated Brackenfield Works, embedded broker on 127.0.0.1:{}, {:.0} s. Ctrl-C stops.\n",
        view.port, view.elapsed
    );
    if view.clear {
        s.push('\n');
    }
    let _ = writeln!(
        s,
        "{:<8} {:>9} {:>20} {:<5} {:<8} {:<12} estimate, last {:.0} s",
        "channel",
        "raw",
        "estimate ± std",
        "unit",
        "status",
        "flags",
        SPARK_WIDTH as f64 * SPARK_BUCKET_S
    );
    for (name, lane) in &board.lanes {
        let (raw, est, status) = match &lane.latest {
            Some(m) => (
                m.raw.map_or("-".to_string(), |v| format!("{v:.3}")),
                match (m.estimate, m.std) {
                    (Some(e), Some(sd)) => format!("{e:.3} ± {sd:.3}"),
                    (Some(e), None) => format!("{e:.3} ± ∞"),
                    _ => "-".to_string(),
                },
                m.status.clone(),
            ),
            None => ("-".into(), "waiting".into(), "-".into()),
        };
        let active = lane.trace.active();
        let flags = if active.is_empty() {
            "-".to_string()
        } else {
            active.to_string().replace('|', ",")
        };
        let _ = writeln!(
            s,
            "{name:<8} {raw:>9} {est:>20} {:<5} {status:<8} {flags:<12} {}",
            lane.unit,
            lane.spark.render(view.elapsed)
        );
    }
    let _ = writeln!(
        s,
        "{}in {:.1} samples/s   out {:.1} outputs/s   rejects {}   withheld {}   flags raised {}",
        if view.clear { "\n" } else { "" },
        view.rate_in,
        view.rate_out,
        board.rejects,
        board.withheld,
        board.flags_raised
    );
    if view.clear {
        s.push_str("\nrecent flag changes:\n");
        if board.recent.is_empty() {
            s.push_str("  none yet\n");
        }
        for e in &board.recent {
            let _ = writeln!(s, "  {e}");
        }
        s.push('\n');
        s.push_str(view.legend);
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::channel::Channel;
    use crate::detect::FlagKind;

    /// The faulty plant through the demo's own channel configuration, without MQTT: the first time each tag
    /// raises each flag kind, in seconds from the start.
    fn first_raises(seconds: f64) -> BTreeMap<(&'static str, &'static str), f64> {
        let plant = Plant::brackenfield(0.0, 0x6761_7567).with_faults(&BRACKENFIELD_FAULTS);
        let config = Config::from_str(&config_text(1883, &plant), "demo").unwrap();
        let daemon = config.daemon().unwrap();
        let mut channels: Vec<Channel> = plant
            .tags
            .iter()
            .map(|t| {
                Channel::with_flags(
                    daemon.channels.model_for(t.name),
                    daemon.channels.flags_for(t.name),
                )
                .unwrap()
            })
            .collect();
        let mut plant = plant;
        let mut due = Vec::new();
        plant.advance(seconds, &mut due);
        let mut first = BTreeMap::new();
        for (i, r) in &due {
            let o = channels[*i].on_sample(r.time, r.value.or(Some(f64::NAN)));
            for k in o.flags.raised.iter() {
                first
                    .entry((plant.tags[*i].name, k.as_str()))
                    .or_insert(r.time);
            }
        }
        first
    }

    #[test]
    fn the_demo_plant_shows_spike_and_stuck_flags_within_a_minute() {
        let first = first_raises(60.0);
        let spike = first.get(&("TT-101", "spike")).copied();
        assert!(spike.is_some_and(|t| t < 15.0), "{first:?}");
        let stuck = first.get(&("FT-201", "stuck")).copied();
        assert!(
            stuck.is_some_and(|t| (15.0..40.0).contains(&t)),
            "{first:?}"
        );
    }

    fn board() -> Board {
        let settings = crate::detect::FlagDesign::default().resolve(1.0).unwrap();
        let mut lanes = BTreeMap::new();
        lanes.insert(
            "TT-101".to_string(),
            Lane {
                unit: "degC",
                latest: None,
                count: 0,
                spark: Spark::default(),
                trace: TraceBuilder::new("TT-101", &settings),
                settings,
                pending: VecDeque::new(),
            },
        );
        Board::new(100.0, lanes)
    }

    fn output(time: f64, status: &str, flags: &[&str]) -> OutputMessage {
        OutputMessage {
            channel: "TT-101".into(),
            time,
            estimate: Some(72.0 + time / 100.0),
            std: Some(0.2),
            raw: Some(72.1),
            innovation: Some(0.1),
            std_innovation: Some(0.5),
            status: status.into(),
            flags: flags.iter().map(|f| f.to_string()).collect(),
            model: "lag".into(),
        }
    }

    #[test]
    fn board_counts_rejects_and_turns_flag_changes_into_spans_and_events() {
        let mut b = board();
        for t in [100.5, 101.0, 102.0, 103.0, 104.0, 105.0] {
            b.published("TT-101", t);
        }
        // 100.5 went out before anyone listened: not counted.
        b.output(output(101.0, "ok", &[]));
        // 102 never comes back: refused.
        b.output(output(103.0, "withheld", &["spike"]));
        b.output(output(104.0, "duplicate", &["spike"]));
        b.output(output(109.0, "stale", &["spike", "stale"]));
        b.output(output(105.0, "ok", &[]));
        assert_eq!(b.outputs, 5);
        assert_eq!(b.rejects, 2);
        assert_eq!(b.withheld, 1);
        assert_eq!(b.flags_raised, 2);
        assert_eq!(
            b.unprinted,
            vec![
                "00:03  TT-101   spike raised (low)",
                "00:09  TT-101   stale raised (medium)",
                "00:05  TT-101   spike cleared",
                "00:05  TT-101   stale cleared",
            ]
        );
        let lane = b.lanes.remove("TT-101").unwrap();
        let trace = lane.trace.finish();
        // The duplicate never reached the filter: four samples drawn.
        assert_eq!(trace.times, vec![101.0, 103.0, 109.0, 105.0]);
        assert_eq!(trace.flags.len(), 2);
        assert_eq!(trace.flags[0].kind, FlagKind::Spike.as_str());
        assert_eq!(
            (trace.flags[0].start, trace.flags[0].end),
            (103.0, Some(105.0))
        );
    }

    #[test]
    fn sparkline_scrolls_and_scales() {
        let mut sp = Spark::default();
        for k in 0..40 {
            sp.push(k as f64 * 2.0, k as f64);
        }
        let line = sp.render(78.0);
        assert_eq!(line.chars().count(), SPARK_WIDTH);
        assert!(line.starts_with('▁') && line.ends_with('█'), "{line}");
        // A minute later with nothing new: blank.
        assert_eq!(sp.render(200.0).trim(), "");
        // Flat: mid-height, not the floor.
        let mut flat = Spark::default();
        flat.push(0.0, 5.0);
        flat.push(2.0, 5.0);
        assert_eq!(flat.render(2.0).trim(), "▄▄");
    }

    #[test]
    fn plain_view_has_no_cursor_movement_and_prints_flag_changes() {
        let mut b = board();
        b.output(output(103.0, "withheld", &["spike"]));
        let plant = Plant::brackenfield(0.0, 1).with_faults(&BRACKENFIELD_FAULTS);
        let legend = legend(&plant);
        assert!(
            legend.starts_with(
                "TT-101 reactor vessel temperature (degC): 3 spikes of 4 degC, 3 s apart, at 0:04, every 120 s\n"
            ),
            "{legend}"
        );
        assert!(
            legend.contains("LT-301 storage tank level (m): silent for 10 s at 0:30, every 60 s\n"),
            "{legend}"
        );
        assert!(legend.lines().all(|l| l.chars().count() <= 100), "{legend}");
        let mut out = Vec::new();
        let view = View {
            port: 1883,
            elapsed: 3.0,
            rate_in: 3.5,
            rate_out: 3.5,
            clear: false,
            legend: &legend,
        };
        draw(&mut out, &mut b, &view).unwrap();
        let text = String::from_utf8(out).unwrap();
        assert!(!text.contains('\x1b'), "{text}");
        assert!(
            text.starts_with("flag: 00:03  TT-101   spike raised (low)\n"),
            "{text}"
        );
        let row = text.lines().find(|l| l.starts_with("TT-101")).unwrap();
        assert!(
            row.contains("73.030 ± 0.200") && row.contains(" spike "),
            "{row}"
        );
        assert!(
            text.contains("in 3.5 samples/s   out 3.5 outputs/s   rejects 0"),
            "{text}"
        );
        // Printed once.
        let mut again = Vec::new();
        draw(&mut again, &mut b, &view).unwrap();
        assert!(!String::from_utf8(again).unwrap().contains("flag: "));
    }

    #[test]
    fn generated_config_is_valid_and_maps_every_tag_to_its_model() {
        let plant = Plant::brackenfield(0.0, 1);
        let config = Config::from_str(&config_text(1883, &plant), "demo").unwrap();
        let daemon = config.daemon().unwrap();
        for tag in &plant.tags {
            assert_eq!(
                daemon.channels.model_for(tag.name),
                &tag.model,
                "{}",
                tag.name
            );
        }
    }
}
