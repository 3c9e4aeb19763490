//! The daemon: MQTT in, one filtered output per sample out, for as long as the process runs.
//!
//! [`run`] is `gaugewise run` as a library function, so the demo and tests can start the daemon in-process. It owns
//! the tokio side of gaugewise; the math stays in the synchronous core (`channel`), which it drives exactly as
//! `replay` does. Its parts:
//!
//! - **Event loop task.** rumqttc's `EventLoop` is polled without pause in a task of its own: it is what moves
//!   packets both ways and sends the keep-alive pings. rumqttc reconnects on the very next poll after an error, so
//!   the pause between attempts is ours ([`backoff`]), reset by each ConnAck. On every ConnAck the task renews the
//!   subscriptions unless the broker kept the session, and publishes the retained `online` status; the Last Will
//!   set at connect turns it `offline` if the process dies.
//! - **Routing.** Each incoming message is routed (topic and payload to a sample) in that task, a pure and cheap
//!   step, then sent to the worker that owns the channel: a stable hash of the channel name ([`shard`]) so one
//!   channel's samples stay in order while channels spread over the cores. The worker queues are bounded; a full
//!   queue pauses reading from the broker (TCP back-pressure) rather than dropping samples.
//! - **Scale-out.** Several daemons may share one broker's channels (`[instance]`): every one subscribes to the
//!   same topics and keeps only the channels its [`shard::Instance`] owns. The owner is decided from the topic
//!   alone, so another instance's messages are dropped before their payload is parsed, and only counted
//!   (`not_ours`): at N instances, N - 1 of every N messages take this path, so it must stay cheap and quiet.
//! - **Workers.** Each owns its channels' state and feeds every sample to `Channel::on_sample`, then hands one
//!   output per sample to the MQTT client with `try_publish`: the request queue is drained only by the event loop
//!   task, so a worker must never wait on it. A full queue drops the output and counts it (`publish_dropped`).
//!   A timer per worker publishes `stale` forecasts for quiet channels ([`stale`]).
//! - **Counters and logs.** [`counters`] counts every event; refused input is logged at most once per reason per
//!   10 s, with the number of lines left out; a summary line is logged every minute and at the end.
//! - **Shutdown.** When the `shutdown` future completes: stop routing (later messages are ignored and counted as
//!   received only), let the workers drain their queues, publish the retained `offline` status, disconnect, and
//!   wait until the event loop has written everything queued before the disconnect (at most [`FLUSH_TIMEOUT`]).
//! - **Checkpoints** ([`persist`]): with a state directory, the channels saved by the last run are taken back
//!   before the workers start, a save runs every `[state] save_every_s` (each worker encodes its channels a
//!   chunk at a time between samples; the write is on the blocking pool), and a last one at shutdown.
//! - **As a service** ([`run_service`], what `gaugewise run` calls; [`service`]): systemd notifications (`READY=1`
//!   once set up, without waiting for the broker; `STATUS=` lines; `WATCHDOG=1` from the event loop task's own
//!   tick, so a hung loop stops the pings; `STOPPING=1`), configuration reload on SIGHUP ([`reload`]), and the
//!   HTTP endpoint for Prometheus metrics and health ([`metrics`], [`http`]).
//!
//! Wall-clock time (seconds since the Unix epoch) is read here, at the edge, and passed into the core as the
//! receive time of a sample and the "now" of a stale report.

pub mod backoff;
pub mod counters;
pub mod fitpool;
pub mod http;
pub mod metrics;
pub mod persist;
pub mod reload;
pub mod service;
pub mod setup;
pub mod shard;
pub mod stale;
pub mod tls;

use crate::channel::{Channel, Outcome, SampleStatus};
use crate::config::ChannelConfig;
use crate::ingest::{Reject, Resolved, Router, Sample};
use crate::notify::{Message, Notifier};
use crate::publish::{self, OutputTopic};
use crate::reestimate::{self, Decision, Learner};
use backoff::Backoff;
pub use counters::{CounterSnapshot, Counters, LogLimiter};
use metrics::LatencyHistogram;
use rumqttc::{
    AsyncClient, ConnectReturnCode, Event, EventLoop, LastWill, MqttOptions, Outgoing, Packet, QoS,
    SubscribeReasonCode, Transport,
};
pub use service::Service;
pub use setup::from_config;
use stale::StaleTimer;
use std::collections::HashMap;
use std::future::Future;
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicUsize, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};
use thiserror::Error;
pub use tls::{TlsError, TlsFiles};
use tokio::sync::{mpsc, oneshot, watch};
use tracing::{debug, error, info, warn};

/// How long shutdown waits for the event loop to write what was queued before the disconnect.
pub const FLUSH_TIMEOUT: Duration = Duration::from_secs(3);
/// How long shutdown waits for the workers to drain their queues.
const DRAIN_TIMEOUT: Duration = Duration::from_secs(1);
/// The extra wait when they also encode their channels for the last checkpoint: 100,000 channels take about
/// 0.35 s on the 2-core test machine (benches/checkpoint.rs), a slower gateway a few times that.
const FINAL_STATE_TIMEOUT: Duration = Duration::from_secs(2);
/// At most one log line per rejection reason per this period.
const REJECT_LOG_PERIOD: Duration = Duration::from_secs(10);
/// Reconnect attempts while shutting down are capped at this pause: there are only seconds left.
const SHUTDOWN_RECONNECT_CAP: Duration = Duration::from_millis(250);

/// Everything the runtime needs to know about the connection and its limits, already validated.
#[derive(Debug, Clone)]
pub struct Settings {
    pub host: String,
    pub port: u16,
    /// Fixed and non-empty when `clean_session` is false (the broker keeps the session under this id).
    pub client_id: String,
    pub keep_alive: Duration,
    /// false: a persistent session, so QoS 1 messages published while the daemon was away are delivered later.
    pub clean_session: bool,
    pub credentials: Option<(String, String)>,
    /// Some: connect over TLS with this material.
    pub tls: Option<TlsFiles>,
    /// Largest MQTT packet accepted or sent, in bytes (rumqttc's default of 10 KiB is too small to be implicit).
    pub max_packet_size: usize,
    /// Topic filters to subscribe to, with their QoS.
    pub subscriptions: Vec<(String, QoS)>,
    pub output_qos: QoS,
    pub output_retain: bool,
    /// Where the retained online/offline status goes (also the Last Will's topic).
    pub status_topic: String,
    pub status_online: Vec<u8>,
    pub status_offline: Vec<u8>,
    pub reconnect_min: Duration,
    pub reconnect_max: Duration,
    /// Silence (wall clock) after which a channel reports `stale`; None: never.
    pub stale_after: Option<Duration>,
    /// Cadence of stale reports while the silence lasts.
    pub stale_every: Duration,
    /// Worker tasks (channels are sharded over them).
    pub workers: usize,
    /// Samples queued per worker.
    pub worker_queue: usize,
    /// Requests (outputs) queued towards the MQTT client.
    pub request_queue: usize,
    /// Most channels the daemon keeps state for; samples of further channels are rejected.
    pub max_channels: usize,
    /// This daemon's share of the channels; messages for the others are ignored and counted (`not_ours`).
    pub instance: shard::Instance,
    /// Period of the counter summary in the log.
    pub summary_every: Duration,
    /// Where channel state is kept between runs; None: not kept.
    pub state: Option<StateSettings>,
}

/// Checkpoints of channel state ([`persist`]).
#[derive(Debug, Clone, PartialEq)]
pub struct StateSettings {
    pub dir: std::path::PathBuf,
    /// Period of the saves (another is made at shutdown).
    pub every: Duration,
}

/// A sample on its way to its worker, with its wall-clock receive time (seconds since the epoch, for staleness)
/// and the monotonic instant it was taken from the broker (for the processing-latency histogram).
#[derive(Debug, Clone, PartialEq)]
struct Queued {
    sample: Sample,
    received: f64,
    arrived: Instant,
}

/// A request to a worker besides samples.
enum Control {
    /// A reload changed the channel configuration: restart the channels whose model or flag design changed, keep
    /// the others, and report which were restarted.
    Channels(Arc<ChannelConfig>, oneshot::Sender<Vec<reload::Restarted>>),
    /// Channels `from..from + max` encoded for a checkpoint, and whether more follow.
    Snapshot {
        from: usize,
        max: usize,
        reply: oneshot::Sender<(persist::Chunk, bool)>,
    },
}

/// An input the daemon refused: why (a short fixed label) and what it was about (channel, else topic).
#[derive(Debug, Clone, PartialEq)]
struct Refusal {
    reason: &'static str,
    key: String,
    /// A readable detail for the log.
    detail: String,
}

/// The message-format side of the daemon: how topics and payloads become samples (`ingest`) and where outputs
/// go (`publish`).
#[derive(Debug, Clone)]
pub struct Pipeline {
    pub router: Router,
    pub output: OutputTopic,
    /// Retained flag-change messages.
    pub flags: OutputTopic,
    /// Retained parameter changes of live re-estimation.
    pub params: OutputTopic,
}

/// Socket options for our MQTT connections: TCP_NODELAY on.
pub fn nodelay() -> rumqttc::NetworkOptions {
    let mut n = rumqttc::NetworkOptions::new();
    n.set_tcp_nodelay(true);
    n
}

/// What a run did, once it has stopped.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RunReport {
    pub counters: CounterSnapshot,
    /// Channels with state at the end.
    pub channels: usize,
    /// Whether everything queued before the disconnect was written (false: the flush timed out).
    pub flushed: bool,
}

/// Why the daemon could not start. Once running, it does not stop on errors: connection problems are retried
/// and bad input is counted.
#[derive(Debug, Error)]
pub enum RuntimeError {
    #[error("TLS: {0}")]
    Tls(#[from] TlsError),
    #[error("{0}")]
    Settings(String),
    /// The metrics endpoint's address is taken or not ours; a restart may succeed, so not a configuration error.
    #[error("metrics.listen: cannot listen on {addr}: {source}")]
    MetricsListen {
        addr: std::net::SocketAddr,
        #[source]
        source: std::io::Error,
    },
}

/// Seconds since the Unix epoch, now.
pub fn wall_clock() -> f64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0.0, |d| d.as_secs_f64())
}

/// The rumqttc options for `settings`: identity, session, limits, credentials, TLS and the Last Will.
pub fn mqtt_options(settings: &Settings) -> Result<MqttOptions, RuntimeError> {
    if settings.client_id.is_empty() && !settings.clean_session {
        return Err(RuntimeError::Settings(
            "a persistent session (clean_session = false) needs a fixed, non-empty client id"
                .to_string(),
        ));
    }
    let mut o = MqttOptions::new(
        settings.client_id.clone(),
        settings.host.clone(),
        settings.port,
    );
    // rumqttc refuses (panics on) a keep-alive under a second other than zero, which disables it.
    let keep_alive = if settings.keep_alive.is_zero() {
        Duration::ZERO
    } else {
        settings.keep_alive.max(Duration::from_secs(1))
    };
    o.set_keep_alive(keep_alive)
        .set_clean_session(settings.clean_session)
        .set_max_packet_size(settings.max_packet_size, settings.max_packet_size)
        .set_last_will(LastWill::new(
            settings.status_topic.clone(),
            settings.status_offline.clone(),
            QoS::AtLeastOnce,
            true,
        ));
    if let Some((user, password)) = &settings.credentials {
        o.set_credentials(user.clone(), password.clone());
    }
    if let Some(files) = &settings.tls {
        let config = tls::client_config(files)?;
        o.set_transport(Transport::tls_with_config(
            rumqttc::TlsConfiguration::Rustls(config),
        ));
    }
    Ok(o)
}

/// Shared by the event loop task and the workers.
struct Shared {
    settings: Settings,
    counters: Counters,
    limiter: LogLimiter,
    /// Cleared at shutdown: messages still arriving are no longer routed.
    routing: AtomicBool,
    /// Channels with state, across workers (for `max_channels`).
    channels: AtomicUsize,
    /// Wall-clock seconds since the epoch; a field so the one place that reads the clock is explicit.
    clock: fn() -> f64,
    /// systemd's notification socket (a no-op when not run by systemd).
    notifier: Notifier,
    /// Whether the MQTT connection is up (ConnAck received, no error since).
    connected: AtomicBool,
    /// Shutdown has begun.
    stopping: AtomicBool,
    /// When the event loop last ticked, in ms after `started`.
    last_tick_ms: AtomicU64,
    /// The monotonic origin of `last_tick_ms`.
    started: Instant,
    /// Channels currently reporting stale (a gauge the workers move).
    stale_channels: AtomicU64,
    reloads_applied: AtomicU64,
    reloads_refused: AtomicU64,
    /// One processing-latency histogram per worker.
    latency: Vec<LatencyHistogram>,
    /// Re-estimations running at once on the blocking pool, across workers: at most half the cores, so the
    /// message path always has a core.
    fits: fitpool::FitPool,
}

impl Shared {
    fn new(settings: Settings, notifier: Notifier, workers: usize) -> Self {
        Shared {
            counters: Counters::new(),
            limiter: LogLimiter::new(REJECT_LOG_PERIOD),
            routing: AtomicBool::new(true),
            channels: AtomicUsize::new(0),
            clock: wall_clock,
            notifier,
            connected: AtomicBool::new(false),
            stopping: AtomicBool::new(false),
            last_tick_ms: AtomicU64::new(0),
            started: Instant::now(),
            stale_channels: AtomicU64::new(0),
            reloads_applied: AtomicU64::new(0),
            reloads_refused: AtomicU64::new(0),
            latency: (0..workers).map(|_| LatencyHistogram::new()).collect(),
            fits: fitpool::FitPool::new((workers / 2).max(1)),
            settings,
        }
    }

    /// Sends systemd notifications; a failure is logged (rate-limited), never fatal.
    fn notify(&self, messages: &[Message<'_>]) {
        if let Err(e) = self.notifier.send(messages) {
            if self.limiter.check("notify", Instant::now()).is_some() {
                warn!("{e}");
            }
        }
    }

    /// A `STATUS=` line, built only when someone listens.
    fn notify_status(&self, text: impl FnOnce() -> String) {
        if self.notifier.is_enabled() {
            self.notify(&[Message::Status(&text())]);
        }
    }

    fn mark_tick(&self, now: Instant) {
        let ms = now.saturating_duration_since(self.started).as_millis();
        self.last_tick_ms
            .store(u64::try_from(ms).unwrap_or(u64::MAX), Ordering::Relaxed);
    }

    /// Seconds since the event loop last ticked.
    fn tick_age(&self, now: Instant) -> f64 {
        let since_start = now.saturating_duration_since(self.started).as_secs_f64();
        (since_start - self.last_tick_ms.load(Ordering::Relaxed) as f64 / 1000.0).max(0.0)
    }

    /// Everything the metrics endpoint exports, now.
    fn metrics(&self) -> metrics::Snapshot {
        let mut latency = metrics::HistogramSnapshot::default();
        for h in &self.latency {
            h.add_to(&mut latency);
        }
        metrics::Snapshot {
            counters: self.counters.snapshot(),
            channels: self.channels.load(Ordering::Relaxed) as u64,
            channels_stale: self.stale_channels.load(Ordering::Relaxed),
            broker_connected: self.connected.load(Ordering::Relaxed),
            reloads_applied: self.reloads_applied.load(Ordering::Relaxed),
            reloads_refused: self.reloads_refused.load(Ordering::Relaxed),
            loop_tick_age_s: self.tick_age(Instant::now()),
            latency,
        }
    }

    fn health(&self) -> metrics::HealthInputs {
        metrics::HealthInputs {
            broker_connected: self.connected.load(Ordering::Relaxed),
            loop_tick_age_s: self.tick_age(Instant::now()),
            stopping: self.stopping.load(Ordering::Relaxed),
        }
    }

    /// Counts a refusal and logs it, rate-limited per reason.
    fn refuse(&self, r: &Refusal) {
        self.counters.reject(r.reason, &r.key);
        if let Some(suppressed) = self.limiter.check(r.reason, Instant::now()) {
            if suppressed > 0 {
                warn!(reason = r.reason, key = %r.key, suppressed, "input refused: {} ({suppressed} more of this reason not logged)", r.detail);
            } else {
                warn!(reason = r.reason, key = %r.key, "input refused: {}", r.detail);
            }
        }
    }
}

/// Runs the daemon until `shutdown` completes, then shuts down cleanly (see the module notes) and reports.
///
/// Must be called inside a tokio runtime (the workers are spawned on it; a multi-thread runtime uses the cores).
/// Fails only before connecting, on settings that cannot work (e.g. an unreadable TLS file). The same as
/// [`run_service`] with nothing of a service: no notifications, no reload, no metrics endpoint.
pub async fn run(
    settings: Settings,
    channels: Arc<ChannelConfig>,
    pipeline: Pipeline,
    shutdown: impl Future<Output = ()>,
) -> Result<RunReport, RuntimeError> {
    run_service(settings, channels, pipeline, Service::default(), shutdown).await
}

/// [`run`] as a service: with systemd notifications and the watchdog, reload requests and the metrics endpoint
/// that `service` asks for. `READY=1` goes out once the tasks are running and the metrics endpoint is bound,
/// before the broker answers: a broker that is down at boot is retried, not a failed start.
pub async fn run_service(
    settings: Settings,
    channels: Arc<ChannelConfig>,
    pipeline: Pipeline,
    service: Service,
    shutdown: impl Future<Output = ()>,
) -> Result<RunReport, RuntimeError> {
    let options = mqtt_options(&settings)?;
    // Bound before anything else starts, so a taken port fails the start instead of leaving a daemon that cannot
    // be watched.
    let metrics_listener = match service.metrics {
        Some(addr) => Some(
            tokio::net::TcpListener::bind(addr)
                .await
                .map_err(|source| RuntimeError::MetricsListen { addr, source })?,
        ),
        None => None,
    };
    let (client, mut eventloop) = AsyncClient::new(options, settings.request_queue.max(1));
    // rumqttc leaves Nagle's algorithm on: small outputs then wait for the peer's delayed ACK (measured: 40-50 ms
    // tail latency in benches/daemon_e2e.rs). Every output is a small message that should leave at once.
    eventloop.set_network_options(nodelay());
    let workers = settings.workers.max(1);
    let shared = Arc::new(Shared::new(settings, service.notifier, workers));
    shared.mark_tick(Instant::now());
    info!(
        host = %shared.settings.host,
        port = shared.settings.port,
        client_id = %shared.settings.client_id,
        workers,
        "starting"
    );

    let (saver, mut restored) = match &shared.settings.state {
        Some(state) => {
            let (saver, saved) = persist::load_checkpoint(state, &shared.settings.instance).await;
            let mut per_worker: Vec<Vec<persist::SavedEntry>> =
                (0..workers).map(|_| Vec::new()).collect();
            let mut foreign = 0;
            for entry in saved.into_iter().flat_map(|s| s.channels) {
                if shared.settings.instance.owns(&entry.name) {
                    per_worker[shard::shard_of(&entry.name, workers)].push(entry);
                } else {
                    foreign += 1;
                }
            }
            (saver, Some((per_worker, foreign)))
        }
        None => {
            info!("channel state is not kept across restarts (no state directory; see [state])");
            (None, None)
        }
    };
    let mut tally = RestoreTally::default();

    let (stop_tx, stop_rx) = watch::channel(false);
    let mut senders = Vec::with_capacity(workers);
    let mut controls = Vec::with_capacity(workers);
    let mut worker_tasks = Vec::with_capacity(workers);
    for id in 0..workers {
        let (tx, rx) = mpsc::channel(shared.settings.worker_queue.max(1));
        let (control_tx, control_rx) = mpsc::channel(1);
        senders.push(tx);
        controls.push(control_tx);
        let mut worker = Worker::new(
            id,
            shared.clone(),
            channels.clone(),
            pipeline.output.clone(),
            pipeline.flags.clone(),
            pipeline.params.clone(),
            client.clone(),
        );
        if let Some((per_worker, _)) = restored.as_mut() {
            worker.restore(std::mem::take(&mut per_worker[id]), &mut tally);
        }
        worker_tasks.push(tokio::spawn(worker.run(rx, control_rx, stop_rx.clone())));
    }
    if let Some((_, foreign)) = restored {
        tally.foreign = foreign;
        report_restore(&tally);
    }
    let saver_task = saver.clone().map(|saver| {
        let every = shared
            .settings
            .state
            .as_ref()
            .map_or(Duration::from_secs(60), |s| s.every);
        tokio::spawn(persist::save_loop(
            shared.clone(),
            controls.clone(),
            saver,
            every,
        ))
    });
    let poller = tokio::spawn(poll_loop(
        eventloop,
        client.clone(),
        shared.clone(),
        Arc::new(pipeline.router),
        senders,
        stop_rx.clone(),
        service.watchdog,
    ));
    let summary = tokio::spawn(summary_loop(shared.clone()));
    let metrics_server = metrics_listener.map(|listener| {
        let addr = listener.local_addr().ok();
        if let Some(addr) = addr {
            if addr.ip().is_loopback() {
                info!(%addr, "metrics on http://{addr}/metrics, health on /health");
            } else {
                warn!(%addr, "metrics on http://{addr}/metrics, reachable from other hosts and without authentication");
            }
        }
        let handler = {
            let shared = shared.clone();
            Arc::new(move |path: &str| service::answer(&shared, path))
        };
        // Serves until the very end, so a health check sees the shutdown (503) rather than a refused connection.
        tokio::spawn(http::serve(listener, handler, std::future::pending()))
    });
    let reloader = service
        .reload
        .map(|r| tokio::spawn(service::reload_loop(shared.clone(), r, controls)));

    shared.notify(&[
        Message::Ready,
        Message::Status(&format!(
            "started; connecting to the broker at {}:{}",
            shared.settings.host, shared.settings.port
        )),
    ]);

    shutdown.await;
    info!("shutting down: no longer taking messages");
    shared.stopping.store(true, Ordering::SeqCst);
    shared.notify(&[Message::Stopping, Message::Status("stopping")]);
    if let Some(r) = &reloader {
        r.abort();
    }
    shared.routing.store(false, Ordering::SeqCst);
    let _ = stop_tx.send(true);
    if let Some(t) = &saver_task {
        t.abort();
    }
    let drain_timeout = if shared.settings.state.is_some() {
        DRAIN_TIMEOUT + FINAL_STATE_TIMEOUT
    } else {
        DRAIN_TIMEOUT
    };
    let drained = tokio::time::timeout(drain_timeout, async {
        let mut total = 0;
        let mut saved = Some(Vec::new());
        for t in worker_tasks {
            match t.await {
                Ok(end) => {
                    total += end.channels;
                    match (saved.as_mut(), end.saved) {
                        (Some(all), Some(mine)) => all.push(mine),
                        _ => saved = None,
                    }
                }
                Err(_) => saved = None,
            }
        }
        (total, saved)
    })
    .await;
    let (channel_count, final_state) = match drained {
        Ok((n, saved)) => (n, saved),
        Err(_) => {
            warn!("workers did not drain their queues within {drain_timeout:?}");
            (shared.channels.load(Ordering::Relaxed), None)
        }
    };
    // The last save runs beside the flush below; a worker that did not stop cleanly leaves the last periodic
    // checkpoint in place rather than a partial one.
    let final_save = match (saver, final_state) {
        (Some(saver), Some(chunks)) => Some(tokio::spawn(persist::save_checkpoint(
            shared.clone(),
            saver,
            wall_clock(),
            chunks,
        ))),
        (Some(_), None) => {
            warn!("channel state not saved at shutdown: a worker did not stop in time; the last checkpoint stays");
            None
        }
        _ => None,
    };

    // The offline status and the disconnect go through the same FIFO request queue as the outputs, so when the
    // event loop reports the disconnect as sent, everything queued before it has been written.
    let flush = async {
        let s = &shared.settings;
        if let Err(e) = client
            .publish(
                s.status_topic.clone(),
                QoS::AtLeastOnce,
                true,
                s.status_offline.clone(),
            )
            .await
        {
            warn!("cannot queue the offline status: {e}");
        }
        if let Err(e) = client.disconnect().await {
            warn!("cannot queue the disconnect: {e}");
        }
    };
    let deadline = tokio::time::Instant::now() + FLUSH_TIMEOUT;
    let poller_handle = poller.abort_handle();
    let flushed = tokio::time::timeout_at(deadline, async {
        flush.await;
        poller.await
    })
    .await;
    let flushed = match flushed {
        Ok(Ok(PollEnd::Disconnected)) => true,
        Ok(_) => false,
        Err(_) => {
            warn!("outgoing messages not flushed within {FLUSH_TIMEOUT:?}; disconnecting anyway");
            false
        }
    };
    // Dropping the event loop closes the connection; without a DISCONNECT sent, the broker publishes the Last Will,
    // which is the offline status too.
    poller_handle.abort();
    if let Some(save) = final_save {
        let _ = save.await;
    }
    summary.abort();
    if let Some(m) = metrics_server {
        m.abort();
    }
    let counters = shared.counters.snapshot();
    info!(channels = channel_count, flushed, "stopped: {counters}");
    Ok(RunReport {
        counters,
        channels: channel_count,
        flushed,
    })
}

/// One log line on what came back from the checkpoint.
fn report_restore(t: &RestoreTally) {
    info!(
        restored = t.restored,
        windows = t.windows,
        fresh = t.fresh,
        refused = t.refused,
        other_instances = t.foreign,
        "channels taken back from the saved state"
    );
    if t.fresh > 0 {
        warn!(
            "{} saved channels start fresh, e.g. {}",
            t.fresh,
            t.examples.join("; ")
        );
    }
}

async fn summary_loop(shared: Arc<Shared>) {
    let period = shared.settings.summary_every.max(Duration::from_secs(1));
    let mut tick = tokio::time::interval_at(tokio::time::Instant::now() + period, period);
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    loop {
        tick.tick().await;
        let channels = shared.channels.load(Ordering::Relaxed);
        info!(channels, "{}", shared.counters.snapshot());
    }
}

/// How the event loop task ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum PollEnd {
    /// The disconnect was written: everything queued before it went out.
    Disconnected,
    /// The request queue closed (every client handle dropped).
    Closed,
}

/// What the event loop does with one message.
#[derive(Debug, Clone, PartialEq)]
enum Routed {
    Sample(Sample),
    /// Another instance owns the channel: ignored, payload unread.
    NotOurs,
    /// Refused, and what to count it against: the channel when the topic names one, else the topic.
    Refused(Reject, String),
}

/// `Router::route`, with the owner check between naming the channel and reading the payload, so a message for
/// another instance costs a topic match and a hash, never a JSON parse.
fn route_message(
    router: &Router,
    instance: &shard::Instance,
    topic: &str,
    payload: &[u8],
    received: f64,
) -> Routed {
    let Resolved { rule, channel } = match router.resolve(topic) {
        Ok(r) => r,
        Err(reject) => return Routed::Refused(reject, topic.to_string()),
    };
    if !instance.owns(&channel) {
        return Routed::NotOurs;
    }
    match router.rules()[rule].read(payload, received) {
        Ok(r) => Routed::Sample(Sample {
            channel,
            time: r.time,
            value: r.value,
            time_from_payload: r.time_from_payload,
            bad_quality: r.bad_quality,
        }),
        Err(reject) => Routed::Refused(reject, channel),
    }
}

async fn poll_loop(
    mut eventloop: EventLoop,
    client: AsyncClient,
    shared: Arc<Shared>,
    router: Arc<Router>,
    senders: Vec<mpsc::Sender<Queued>>,
    mut stop: watch::Receiver<bool>,
    watchdog: Option<Duration>,
) -> PollEnd {
    let s = &shared.settings;
    let mut ticker = service::LoopTicker::new(watchdog);
    let seed = backoff::process_seed();
    let mut backoff = Backoff::new(
        s.reconnect_min.as_secs_f64(),
        s.reconnect_max.as_secs_f64(),
        seed,
    );
    let mut connected_before = false;
    let mut connected = false;
    loop {
        // The tick runs beside the poll, never instead of it: rumqttc's poll is not cancel-safe (a request taken
        // from the queue but not yet written would be lost), so the future is polled to completion.
        let event = ticker.run(eventloop.poll(), &shared).await;
        match event {
            Ok(Event::Incoming(Packet::ConnAck(ack))) => {
                backoff.reset();
                connected = true;
                shared.connected.store(true, Ordering::Relaxed);
                if connected_before {
                    Counters::bump(&shared.counters.reconnects);
                    info!(session_present = ack.session_present, "reconnected");
                } else {
                    info!(session_present = ack.session_present, "connected");
                }
                shared.notify_status(|| service::status_line(&shared, None));
                connected_before = true;
                if shared.routing.load(Ordering::SeqCst) {
                    announce(&client, &shared, !ack.session_present);
                }
            }
            Ok(Event::Incoming(Packet::Publish(p))) => {
                Counters::bump(&shared.counters.received);
                if !shared.routing.load(Ordering::Relaxed) {
                    continue;
                }
                let arrived = Instant::now();
                let received = (shared.clock)();
                match route_message(&router, &s.instance, &p.topic, &p.payload, received) {
                    // Not logged: at N instances this is N - 1 of every N messages.
                    Routed::NotOurs => Counters::bump(&shared.counters.not_ours),
                    Routed::Sample(sample) => {
                        let w = shard::shard_of(&sample.channel, senders.len());
                        // Awaiting here is the back-pressure: a worker behind pauses reading from the broker.
                        // It cannot deadlock: workers never wait on anything this task drains. No tick while
                        // waiting: a worker that never takes the sample is a hung daemon for the watchdog.
                        let queued = Queued {
                            sample,
                            received,
                            arrived,
                        };
                        if senders[w].send(queued).await.is_err() {
                            debug!(
                                "a sample arrived while the workers were stopping; not processed"
                            );
                        }
                    }
                    Routed::Refused(reject, key) => shared.refuse(&Refusal {
                        reason: reject.reason(),
                        key,
                        detail: format!(
                            "{reject} (topic {})",
                            counters::clip(&p.topic, counters::MAX_KEY_BYTES)
                        ),
                    }),
                }
            }
            Ok(Event::Incoming(Packet::SubAck(ack))) => {
                for (i, code) in ack.return_codes.iter().enumerate() {
                    if matches!(code, SubscribeReasonCode::Failure) {
                        let filter = s.subscriptions.get(i).map_or("?", |(f, _)| f.as_str());
                        error!(filter, "the broker refused the subscription");
                    }
                }
            }
            Ok(Event::Outgoing(Outgoing::Disconnect)) => return PollEnd::Disconnected,
            Ok(_) => {}
            Err(rumqttc::ConnectionError::RequestsDone) => return PollEnd::Closed,
            Err(e) => {
                let mut delay = backoff.next_delay();
                let stopping = *stop.borrow();
                if stopping {
                    delay = delay.min(SHUTDOWN_RECONNECT_CAP);
                }
                match &e {
                    rumqttc::ConnectionError::ConnectionRefused(code) => error!(
                        reason = refusal_text(*code),
                        retry_in_s = delay.as_secs_f64(),
                        "the broker refused the connection"
                    ),
                    _ if connected => warn!(
                        error = %e,
                        retry_in_s = delay.as_secs_f64(),
                        "connection to the broker lost"
                    ),
                    _ => warn!(
                        error = %e,
                        retry_in_s = delay.as_secs_f64(),
                        "cannot connect to the broker"
                    ),
                }
                connected = false;
                shared.connected.store(false, Ordering::Relaxed);
                shared.notify_status(|| service::status_line(&shared, Some((&e, delay))));
                let pause = async {
                    tokio::select! {
                        _ = tokio::time::sleep(delay) => {}
                        // Shutdown while waiting: retry at once, to flush what is queued if the broker is back.
                        _ = stop.changed(), if !stopping => {}
                    }
                };
                ticker.run(pause, &shared).await;
            }
        }
    }
}

/// After a ConnAck: renew the subscriptions (when the broker did not keep them) and publish the retained online
/// status. Spawned, because the request queue may be full and only the event loop task, the caller, drains it.
fn announce(client: &AsyncClient, shared: &Arc<Shared>, subscribe: bool) {
    let client = client.clone();
    let shared = shared.clone();
    tokio::spawn(async move {
        let s = &shared.settings;
        if subscribe && !s.subscriptions.is_empty() {
            let filters = s
                .subscriptions
                .iter()
                .map(|(f, q)| rumqttc::SubscribeFilter::new(f.clone(), *q));
            if let Err(e) = client.subscribe_many(filters).await {
                warn!("cannot queue the subscriptions: {e}");
            }
        }
        if let Err(e) = client
            .publish(
                s.status_topic.clone(),
                QoS::AtLeastOnce,
                true,
                s.status_online.clone(),
            )
            .await
        {
            warn!("cannot queue the online status: {e}");
        }
    });
}

fn refusal_text(code: ConnectReturnCode) -> &'static str {
    match code {
        ConnectReturnCode::Success => "success",
        ConnectReturnCode::RefusedProtocolVersion => "protocol version not supported",
        ConnectReturnCode::BadClientId => "client id refused",
        ConnectReturnCode::ServiceUnavailable => "service unavailable",
        ConnectReturnCode::BadUserNamePassword => {
            "bad user name or password: check broker.username and the password (password or password_file)"
        }
        // Mosquitto answers a wrong password with this code too, not with the one above.
        ConnectReturnCode::NotAuthorized => {
            "not authorised: a wrong user name or password, or this client may not connect; check \
             broker.username, the password and the broker's access rules"
        }
    }
}

/// One channel as a worker keeps it.
struct ChannelState {
    name: String,
    channel: Channel,
    topic: String,
    /// Where this channel's flag changes go.
    flags_topic: String,
    /// Wall-clock receive time of the last accepted sample.
    last_received: f64,
    /// Counted in the stale-channels gauge: it has reported stale since its last sample.
    stale: bool,
    /// Its re-estimation window and schedule, when `[reestimate]` turns it on (boxed: most channels have none).
    learner: Option<Box<Learner>>,
    /// A re-estimation of this channel is running on the blocking pool.
    fitting: bool,
}

/// A channel as the configuration describes it: with its model, or learning one when its table gave no
/// parameters.
pub(crate) fn build_channel(
    config: &ChannelConfig,
    name: &str,
) -> Result<Channel, crate::channel::ChannelError> {
    match config.learning_for(name) {
        Some(kind) => Channel::learning(
            kind,
            config.model_for(name).interval,
            config.flags_for(name),
        ),
        None => Channel::with_flags(config.model_for(name), config.flags_for(name)),
    }
}

/// A finished background re-estimation, back at its worker. `decision` is None if the fit task died.
struct FitDone {
    index: usize,
    decision: Option<Decision>,
}

/// What a stopped worker hands back.
struct WorkerEnd {
    channels: usize,
    /// Its channels' final state, when state is kept.
    saved: Option<persist::Chunk>,
}

/// How the channels of a checkpoint were taken back at start.
#[derive(Debug, Default)]
struct RestoreTally {
    restored: usize,
    /// Of those, the ones whose re-estimation window came back too.
    windows: usize,
    /// Not taken back (configuration changed, unusable state): they start fresh on their next sample.
    fresh: usize,
    /// Past `max_channels`, or no output topic.
    refused: usize,
    /// Owned by another instance now (`[instance]` changed).
    foreign: usize,
    examples: Vec<String>,
}

/// A worker: the state of the channels sharded to it.
struct Worker {
    id: usize,
    shared: Arc<Shared>,
    config: Arc<ChannelConfig>,
    output: OutputTopic,
    flags: OutputTopic,
    params: OutputTopic,
    client: AsyncClient,
    index: HashMap<String, usize>,
    /// Where background re-estimations report back (unbounded: at most one in flight per channel).
    fits_tx: mpsc::UnboundedSender<FitDone>,
    fits_rx: Option<mpsc::UnboundedReceiver<FitDone>>,
    channels: Vec<ChannelState>,
    stale: StaleTimer,
    /// One copy of each distinct resolved flag design among its channels.
    flag_pool: crate::detect::SettingsPool,
}

impl Worker {
    fn new(
        id: usize,
        shared: Arc<Shared>,
        config: Arc<ChannelConfig>,
        output: OutputTopic,
        flags: OutputTopic,
        params: OutputTopic,
        client: AsyncClient,
    ) -> Self {
        let (fits_tx, fits_rx) = mpsc::unbounded_channel();
        let s = &shared.settings;
        let stale = StaleTimer::new(
            s.stale_after.map_or(0.0, |d| d.as_secs_f64()),
            s.stale_every.as_secs_f64(),
        );
        Self {
            id,
            shared,
            config,
            output,
            flags,
            params,
            client,
            fits_tx,
            fits_rx: Some(fits_rx),
            index: HashMap::new(),
            channels: Vec::new(),
            stale,
            flag_pool: crate::detect::SettingsPool::default(),
        }
    }

    /// Processes samples until stopped, then drains the queue; returns the number of channels it held and, when
    /// state is kept, their final state.
    async fn run(
        mut self,
        mut rx: mpsc::Receiver<Queued>,
        mut control: mpsc::Receiver<Control>,
        mut stop: watch::Receiver<bool>,
    ) -> WorkerEnd {
        let tick = stale_tick(&self.shared.settings);
        let mut timer = tokio::time::interval(tick);
        timer.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        let mut due = Vec::new();
        let mut fits = self.fits_rx.take().expect("a worker runs once");
        loop {
            tokio::select! {
                biased;
                sample = rx.recv() => match sample {
                    Some(sample) => self.on_sample(sample),
                    None => break,
                },
                Some(done) = fits.recv() => self.on_fit(done),
                _ = stop.changed() => {
                    // No new samples; what is queued is processed.
                    rx.close();
                    while let Some(sample) = rx.recv().await {
                        self.on_sample(sample);
                    }
                    break;
                }
                Some(request) = control.recv() => match request {
                    Control::Channels(config, reply) => {
                        let _ = reply.send(self.reconfigure(config));
                    }
                    Control::Snapshot { from, max, reply } => {
                        let chunk = self.snapshot(from, max, persist::CHUNK_BYTES);
                        let more = from + chunk.count < self.channels.len();
                        let _ = reply.send((chunk, more));
                    }
                },
                _ = timer.tick(), if self.stale.enabled() => {
                    let now = (self.shared.clock)();
                    due.clear();
                    self.stale.due(now, &mut due);
                    for &i in &due {
                        self.report_stale(i, now);
                    }
                }
            }
        }
        debug!(
            worker = self.id,
            channels = self.channels.len(),
            "worker stopped"
        );
        WorkerEnd {
            channels: self.channels.len(),
            saved: self
                .shared
                .settings
                .state
                .is_some()
                .then(|| self.snapshot(0, usize::MAX, usize::MAX)),
        }
    }

    fn on_sample(&mut self, queued: Queued) {
        let Queued {
            sample,
            received,
            arrived,
        } = queued;
        let Some(i) = self.channel_index(&sample.channel) else {
            return;
        };
        let state = &mut self.channels[i];
        let outcome = state.channel.on_sample(sample.time, sample.value);
        match outcome.status {
            SampleStatus::Ok | SampleStatus::Missing | SampleStatus::Withheld => {
                state.last_received = received;
                if std::mem::take(&mut state.stale) {
                    self.shared.stale_channels.fetch_sub(1, Ordering::Relaxed);
                }
                self.stale.on_sample(i, received);
                if outcome.status == SampleStatus::Withheld {
                    Counters::bump(&self.shared.counters.withheld);
                }
            }
            SampleStatus::Late => Counters::bump(&self.shared.counters.late),
            SampleStatus::Duplicate => Counters::bump(&self.shared.counters.duplicate),
            SampleStatus::Rejected => self.shared.refuse(&Refusal {
                reason: "unusable_sample",
                key: sample.channel.clone(),
                detail: format!(
                    "time {} / value {:?} cannot be filtered",
                    sample.time, sample.value
                ),
            }),
            SampleStatus::Stale => {}
        }
        self.publish(i, &outcome);
        self.shared.latency[self.id].record(arrived.elapsed());
        self.learn(i, &outcome);
    }

    /// Feeds the channel's re-estimation window and, when a re-estimation is due, starts it on the blocking pool.
    /// The message path only copies the window (a few microseconds for 2,000 samples); the fit runs elsewhere.
    fn learn(&mut self, i: usize, outcome: &Outcome) {
        let state = &mut self.channels[i];
        let Some(learner) = state.learner.as_mut() else {
            return;
        };
        learner.observe(outcome);
        let learning = state.channel.learning_target();
        if state.fitting || !learner.due_for(outcome.time, learning.is_some()) {
            return;
        }
        let (times, values) = learner.start(outcome.time);
        let settings = learner.settings;
        state.fitting = true;
        let spec = state.channel.spec().clone();
        let tx = self.fits_tx.clone();
        let queued = self.shared.fits.submit(move || {
            let decision = std::panic::catch_unwind(|| match learning {
                Some(kind) => reestimate::propose_first(&spec, kind, &times, &values),
                None => reestimate::propose(&spec, &times, &values, &settings),
            })
            .ok();
            // The worker may have stopped meanwhile; then nobody needs the result.
            let _ = tx.send(FitDone { index: i, decision });
        });
        if !queued {
            state.fitting = false;
            Counters::bump(&self.shared.counters.reestimate_failed);
        }
    }

    /// Applies a finished re-estimation: an accepted one replaces the channel's parameters (if the channel still
    /// runs the parameters it was fitted from: a reload may have changed them meanwhile) and is published
    /// retained; a refused one is counted and logged.
    fn on_fit(&mut self, done: FitDone) {
        let Some(state) = self.channels.get_mut(done.index) else {
            return;
        };
        state.fitting = false;
        let counters = &self.shared.counters;
        let Some(d) = done.decision else {
            Counters::bump(&counters.reestimate_failed);
            error!(channel = %state.name, "re-estimation task failed; the channel keeps its parameters");
            return;
        };
        if let Some(why) = &d.refused {
            match why {
                reestimate::Refusal::NotConverged(_) => {
                    Counters::bump(&counters.reestimate_not_converged)
                }
                reestimate::Refusal::NoGain { .. } => Counters::bump(&counters.reestimate_no_gain),
            }
            debug!(channel = %state.name, reason = why.reason(), "re-estimation refused: {why}");
            return;
        }
        // A learning channel resizes its stand-in as data come, so only a re-estimation checks the old model.
        if !d.first && state.channel.spec() != &d.old {
            debug!(channel = %state.name, "re-estimation dropped: the channel's model changed while it ran");
            return;
        }
        let time = state.channel.last_time().unwrap_or(d.to);
        let applied = if d.first {
            if state.channel.learning_target().is_none() {
                return;
            }
            state.channel.learned(&d.new, time).map(Some)
        } else {
            state.channel.set_model(&d.new).map(|_| None)
        };
        let cleared = match applied {
            Ok(c) => c,
            Err(e) => {
                Counters::bump(&counters.reestimate_failed);
                error!(channel = %state.name, "re-estimated parameters unusable ({e}); the channel keeps its own");
                return;
            }
        };
        Counters::bump(&counters.reestimate_accepted);
        if d.first && self.config.learn_for(&state.name).is_none() {
            // Learnt, and re-estimation is off for it: the window is no longer needed.
            state.learner = None;
        }
        info!(
            channel = %state.name,
            "parameters re-estimated: {}",
            reestimate::describe_change(&d)
        );
        let mut topic = String::new();
        if let Err(e) = self.params.render(&state.name, &mut topic) {
            warn!(channel = %state.name, "no params topic for this channel: {e}");
            return;
        }
        let payload = match serde_json::to_vec(&d.record(&state.name, time)) {
            Ok(p) => p,
            Err(e) => {
                error!(channel = %state.name, "cannot write the parameter change: {e}");
                return;
            }
        };
        if self
            .client
            .try_publish(topic, QoS::AtLeastOnce, true, payload)
            .is_err()
        {
            self.publish_dropped();
        }
        if let Some(update) = cleared.filter(|u| u.changed()) {
            self.publish_flag_update(done.index, time, &update);
        }
    }

    /// Takes on a reloaded channel configuration: a channel whose model and flag design are unchanged keeps its
    /// state; one whose model or flag design changed starts again from the new ones. Returns the restarted ones.
    fn reconfigure(&mut self, config: Arc<ChannelConfig>) -> Vec<reload::Restarted> {
        let old = std::mem::replace(&mut self.config, config);
        let mut restarted = Vec::new();
        for state in &mut self.channels {
            let want = self.config.learn_for(&state.name);
            if want != state.learner.as_ref().map(|l| &l.settings) {
                info!(channel = %state.name, "reload: re-estimation settings changed; its window starts again");
                state.learner = want.map(|s| Box::new(Learner::new(*s)));
            }
        }
        for i in 0..self.channels.len() {
            let Some(change) = reload::change(&old, &self.config, &self.channels[i].name) else {
                continue;
            };
            let name = &self.channels[i].name;
            let mut fresh = match build_channel(&self.config, name) {
                Ok(c) => c,
                Err(e) => {
                    // Validation builds every configured model, so this is a bug; keep the channel running.
                    error!(channel = %name, "reload: the new model cannot be built ({e}); the channel keeps its old one");
                    continue;
                }
            };
            fresh.share_flag_settings(&mut self.flag_pool);
            let state = &mut self.channels[i];
            let old_channel = std::mem::replace(&mut state.channel, fresh);
            if std::mem::take(&mut state.stale) {
                self.shared.stale_channels.fetch_sub(1, Ordering::Relaxed);
            }
            restarted.push(reload::Restarted {
                channel: state.name.clone(),
                change: change.describe(),
            });
            // Flags the old channel had raised are retained on the broker; the restarted channel has none, so say
            // they cleared rather than leave them standing with nothing to clear them.
            let active = old_channel.detectors().active();
            if !active.is_empty() {
                let update = crate::detect::FlagUpdate {
                    active: crate::detect::FlagSet::EMPTY,
                    raised: crate::detect::FlagSet::EMPTY,
                    cleared: active,
                };
                let time = old_channel
                    .last_time()
                    .unwrap_or_else(|| (self.shared.clock)());
                self.publish_flag_update(i, time, &update);
            }
        }
        restarted
    }

    /// The index of `name`'s state, created on its first sample; None (and counted) past `max_channels`.
    fn channel_index(&mut self, name: &str) -> Option<usize> {
        if let Some(&i) = self.index.get(name) {
            return Some(i);
        }
        let channel = match build_channel(&self.config, name) {
            Ok(c) => c,
            Err(e) => {
                // Config validation builds every model it names, so this means a bug; refuse, do not panic.
                self.shared.refuse(&Refusal {
                    reason: "bad_model",
                    key: name.to_string(),
                    detail: format!("its configured model is unusable: {e}"),
                });
                return None;
            }
        };
        // A channel that learns its parameters needs the window for its first fit even with [reestimate] off.
        let learner =
            persist::learn_settings(&self.config, name).map(|s| Box::new(Learner::new(s)));
        match self.add_channel(name, channel, learner, f64::NAN) {
            Ok(i) => Some(i),
            Err(r) => {
                self.shared.refuse(&r);
                None
            }
        }
    }

    /// Adds a channel's state (new, or taken back from a checkpoint); Err past `max_channels` or without topics.
    fn add_channel(
        &mut self,
        name: &str,
        mut channel: Channel,
        learner: Option<Box<Learner>>,
        last_received: f64,
    ) -> Result<usize, Refusal> {
        let max = self.shared.settings.max_channels;
        let refusal = |reason: &'static str, detail: String| Refusal {
            reason,
            key: name.to_string(),
            detail,
        };
        let mut topic = String::new();
        if let Err(e) = self.output.render(name, &mut topic) {
            let detail = format!("no output topic for this channel: {e}");
            return Err(refusal("no_output_topic", detail));
        }
        let mut flags_topic = String::new();
        if let Err(e) = self.flags.render(name, &mut flags_topic) {
            let detail = format!("no flags topic for this channel: {e}");
            return Err(refusal("no_output_topic", detail));
        }
        // Taken only below the limit, so the channel gauge never reads above it, even for a moment.
        let taken = self
            .shared
            .channels
            .fetch_update(Ordering::Relaxed, Ordering::Relaxed, |n| {
                (n < max).then_some(n + 1)
            });
        if taken.is_err() {
            let detail = format!("the daemon already keeps {max} channels (limits.max_channels)");
            return Err(refusal("too_many_channels", detail));
        }
        channel.share_flag_settings(&mut self.flag_pool);
        let i = self.channels.len();
        self.channels.push(ChannelState {
            name: name.to_string(),
            channel,
            topic,
            flags_topic,
            last_received,
            stale: false,
            learner,
            fitting: false,
        });
        let stale_index = self.stale.add();
        debug_assert_eq!(stale_index, i);
        if last_received.is_finite() {
            // A channel taken back from a checkpoint goes stale from its last sample before the restart.
            self.stale.on_sample(i, last_received);
        }
        self.index.insert(name.to_string(), i);
        Ok(i)
    }

    /// Takes back the channels of a checkpoint that belong to this worker (before it runs).
    fn restore(&mut self, entries: Vec<persist::SavedEntry>, tally: &mut RestoreTally) {
        for entry in entries {
            if self.index.contains_key(&entry.name) {
                continue;
            }
            match persist::restore(&self.config, &entry) {
                Ok(r) => {
                    let kept = r.window_kept;
                    match self.add_channel(&entry.name, r.channel, r.learner, entry.last_received) {
                        Ok(_) => {
                            tally.restored += 1;
                            tally.windows += usize::from(kept);
                        }
                        Err(refusal) => {
                            tally.refused += 1;
                            debug!(channel = %entry.name, "not restored: {}", refusal.detail);
                        }
                    }
                }
                Err(why) => {
                    tally.fresh += 1;
                    if tally.examples.len() < 5 {
                        tally.examples.push(format!("{}: {why}", entry.name));
                    }
                    debug!(channel = %entry.name, "not restored: {why}");
                }
            }
        }
    }

    /// The state of up to `max` channels from index `from`, encoded for a checkpoint; it stops early once the
    /// encoding reaches `max_bytes`.
    fn snapshot(&self, from: usize, max: usize, max_bytes: usize) -> persist::Chunk {
        let mut chunk = persist::Chunk::default();
        for c in self.channels.iter().skip(from).take(max) {
            if chunk.bytes.len() >= max_bytes {
                break;
            }
            let e = persist::entry(
                &self.config,
                &c.name,
                &c.channel,
                c.learner.as_deref(),
                c.last_received,
            );
            if !chunk.push(&e) {
                error!(channel = %c.name, "this channel's state cannot be encoded; it is left out of the checkpoint");
                // Counted as handled, so the next chunk starts after it.
                chunk.count += 1;
                chunk.skipped += 1;
            }
        }
        chunk
    }

    fn report_stale(&mut self, i: usize, now: f64) {
        let state = &mut self.channels[i];
        // The channel's clock may not be the wall clock (payload timestamps from a device): forecast as far past
        // its last sample as the wall clock has moved since that sample was received.
        let Some(last) = state.channel.last_time() else {
            return;
        };
        let Some(outcome) = state.channel.mark_stale(last + (now - state.last_received)) else {
            return;
        };
        if !std::mem::replace(&mut state.stale, true) {
            self.shared.stale_channels.fetch_add(1, Ordering::Relaxed);
        }
        Counters::bump(&self.shared.counters.stale);
        self.publish(i, &outcome);
    }

    fn publish(&self, i: usize, outcome: &Outcome) {
        let state = &self.channels[i];
        let mut payload = Vec::with_capacity(256);
        publish::write_payload(
            &mut payload,
            &state.name,
            state.channel.spec().kind(),
            outcome,
        );
        let s = &self.shared.settings;
        match self
            .client
            .try_publish(state.topic.clone(), s.output_qos, s.output_retain, payload)
        {
            Ok(()) => Counters::bump(&self.shared.counters.published),
            Err(_) => self.publish_dropped(),
        }
        if outcome.flags.changed() {
            self.publish_flags(i, outcome);
        }
    }

    /// The retained flag-change message, at QoS 1 whatever the output's QoS: flag changes are rare and must not
    /// be lost on the way.
    fn publish_flags(&self, i: usize, outcome: &Outcome) {
        let state = &self.channels[i];
        for kind in outcome.flags.raised.iter() {
            Counters::bump(&self.shared.counters.flags_raised[kind as usize]);
            info!(channel = %state.name, flag = %kind, time = outcome.time, "flag raised");
        }
        for kind in outcome.flags.cleared.iter() {
            info!(channel = %state.name, flag = %kind, time = outcome.time, "flag cleared");
        }
        self.publish_flag_update(i, outcome.time, &outcome.flags);
    }

    /// Publishes a flag change of channel `i` at `time` (the active flags come from its detectors).
    fn publish_flag_update(&self, i: usize, time: f64, update: &crate::detect::FlagUpdate) {
        let state = &self.channels[i];
        let mut payload = Vec::with_capacity(256);
        publish::write_flags_payload(
            &mut payload,
            &state.name,
            time,
            update,
            state.channel.detectors(),
        );
        match self
            .client
            .try_publish(state.flags_topic.clone(), QoS::AtLeastOnce, true, payload)
        {
            // Not counted as `published`, which stays one per input sample.
            Ok(()) => {}
            Err(_) => self.publish_dropped(),
        }
    }

    fn publish_dropped(&self) {
        Counters::bump(&self.shared.counters.publish_dropped);
        if let Some(suppressed) = self.shared.limiter.check("publish_dropped", Instant::now()) {
            warn!(
                suppressed,
                "output dropped: the MQTT request queue is full (limits.request_queue) or closed"
            );
        }
    }
}

/// How often a worker looks for stale channels: a quarter of the shorter period, between 50 ms and 1 s.
fn stale_tick(s: &Settings) -> Duration {
    let shortest = match s.stale_after {
        Some(after) => after.min(s.stale_every),
        None => return Duration::from_secs(1),
    };
    (shortest / 4).clamp(Duration::from_millis(50), Duration::from_secs(1))
}

/// The stop signal of the process: SIGTERM or SIGINT (Ctrl-C), whichever comes first.
///
/// The handlers are installed by this call, not when the future is first polled, so a signal that arrives while
/// the daemon is still starting is not lost (nor does it kill the process the default way). Call it inside the
/// tokio runtime.
pub fn termination_signal() -> impl Future<Output = ()> + Send {
    #[cfg(unix)]
    {
        use tokio::signal::unix::{signal, SignalKind};
        let handlers = signal(SignalKind::terminate())
            .and_then(|term| Ok((term, signal(SignalKind::interrupt())?)));
        async move {
            match handlers {
                Ok((mut term, mut int)) => {
                    tokio::select! {
                        _ = term.recv() => info!("SIGTERM received"),
                        _ = int.recv() => info!("SIGINT received"),
                    }
                }
                Err(e) => {
                    error!(
                        "cannot listen for SIGTERM/SIGINT ({e}); only Ctrl-C will stop the daemon"
                    );
                    let _ = tokio::signal::ctrl_c().await;
                }
            }
        }
    }
    #[cfg(not(unix))]
    {
        async {
            let _ = tokio::signal::ctrl_c().await;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn settings() -> Settings {
        Settings {
            host: "127.0.0.1".into(),
            port: 1,
            client_id: "gw-1".into(),
            keep_alive: Duration::from_secs(30),
            clean_session: false,
            credentials: None,
            tls: None,
            max_packet_size: 65536,
            subscriptions: vec![("plant/#".into(), QoS::AtLeastOnce)],
            output_qos: QoS::AtMostOnce,
            output_retain: false,
            status_topic: "gaugewise/gw-1/status".into(),
            status_online: b"online".to_vec(),
            status_offline: b"offline".to_vec(),
            reconnect_min: Duration::from_millis(500),
            reconnect_max: Duration::from_secs(30),
            stale_after: Some(Duration::from_secs(60)),
            stale_every: Duration::from_secs(10),
            workers: 2,
            worker_queue: 1024,
            request_queue: 4096,
            max_channels: 1000,
            instance: shard::Instance::ALL,
            summary_every: Duration::from_secs(60),
            state: None,
        }
    }

    #[test]
    fn options_carry_the_settings() {
        let o = mqtt_options(&settings()).unwrap();
        assert_eq!(o.client_id(), "gw-1");
        assert!(!o.clean_session());
        assert_eq!(o.max_packet_size(), 65536);
        let will = o.last_will().unwrap();
        assert_eq!(will.topic, "gaugewise/gw-1/status");
        assert_eq!(&will.message[..], b"offline");
        assert!(will.retain);
    }

    #[test]
    fn persistent_session_needs_a_client_id() {
        let mut s = settings();
        s.client_id = String::new();
        assert!(matches!(mqtt_options(&s), Err(RuntimeError::Settings(_))));
        s.clean_session = true;
        assert!(mqtt_options(&s).is_ok());
    }

    #[test]
    fn tls_problems_stop_the_start() {
        let mut s = settings();
        s.tls = Some(TlsFiles {
            ca: Some("missing-ca.pem".into()),
            ..TlsFiles::default()
        });
        let e = mqtt_options(&s).unwrap_err().to_string();
        assert!(e.contains("missing-ca.pem"), "{e}");
    }

    fn plain_router() -> Router {
        let rule = crate::ingest::InputRule::new(
            "plant/raw/+",
            "{2}",
            crate::ingest::PayloadFormat::Number,
            1024,
        )
        .unwrap();
        Router::new(vec![rule])
    }

    #[test]
    fn one_instance_routes_like_the_router() {
        let router = plain_router();
        for (topic, payload) in [
            ("plant/raw/TT-101", &b"72.5"[..]),
            ("plant/raw/FT-201", b"not a number"),
            ("plant/other/TT-101", b"1"),
        ] {
            let got = route_message(&router, &shard::Instance::ALL, topic, payload, 5.0);
            match router.route(topic, payload, 5.0) {
                Ok(sample) => assert_eq!(got, Routed::Sample(sample)),
                Err(reject) => {
                    let key = router.channel_for(topic).unwrap_or(topic.to_string());
                    assert_eq!(got, Routed::Refused(reject, key));
                }
            }
        }
    }

    #[test]
    fn other_instances_channels_are_dropped_before_the_payload_is_read() {
        let router = plain_router();
        let owner = shard::instance_of("TT-101", 2);
        let mine = shard::Instance {
            index: owner,
            count: 2,
        };
        let other = shard::Instance {
            index: 1 - owner,
            count: 2,
        };
        assert!(matches!(
            route_message(&router, &mine, "plant/raw/TT-101", b"72.5", 5.0),
            Routed::Sample(s) if s.channel == "TT-101" && s.value == Some(72.5)
        ));
        // A payload that would be refused is not even looked at by the instance that does not own the channel.
        assert_eq!(
            route_message(&router, &other, "plant/raw/TT-101", b"garbage", 5.0),
            Routed::NotOurs
        );
        assert_eq!(
            route_message(&router, &mine, "plant/raw/TT-101", b"garbage", 5.0),
            Routed::Refused(Reject::NotNumber, "TT-101".to_string())
        );
        // A topic that names no channel has no owner: every instance refuses it.
        for instance in [mine, other] {
            assert_eq!(
                route_message(&router, &instance, "plant/other/x", b"1", 5.0),
                Routed::Refused(Reject::NoRule, "plant/other/x".to_string())
            );
        }
    }

    #[test]
    fn stale_tick_is_bounded() {
        let mut s = settings();
        assert_eq!(stale_tick(&s), Duration::from_secs(1));
        s.stale_after = Some(Duration::from_millis(100));
        assert_eq!(stale_tick(&s), Duration::from_millis(50));
        s.stale_after = None;
        assert_eq!(stale_tick(&s), Duration::from_secs(1));
    }
}
