//! The daemon as a supervised service: systemd notifications and the watchdog, the event loop's tick, the metrics
//! endpoint's answers, and the reload task.
//!
//! - **The tick.** The MQTT event loop task ticks every second (or every watchdog period, if shorter) beside its
//!   poll ([`LoopTicker::run`]). A tick records the time (`/health` fails when it is older than
//!   [`metrics::MAX_TICK_AGE`]), sends `WATCHDOG=1` when due, and every [`STATUS_EVERY`] a `STATUS=` line. Because
//!   the pings come from that task and nowhere else, a loop that hangs, or that waits forever on a worker that
//!   does not take its samples, stops pinging and systemd restarts the daemon.
//! - **Readiness.** `READY=1` is sent by `run_service` once the tasks run, not when the broker answers, so a broker
//!   that is down at boot does not fail the start; the status line says the daemon is reconnecting instead.
//! - **Reload.** [`reload_loop`] waits for reload requests (SIGHUP), sends `RELOADING=1`, reads and validates the
//!   file off the async threads, hands a changed channel configuration to every worker and waits for their
//!   answers, then sends `READY=1` with a status line, whether the new file was applied or refused. See
//!   [`super::reload`] for what is applied.
//!
//! Without `NOTIFY_SOCKET` in the environment every notification is a no-op, and status lines are not even built.

use super::reload::{self, Reload};
use super::{http, metrics, setup, Control, RuntimeError, Shared};
use crate::notify::{self, Message, Notifier, WatchdogTimer};
use std::future::Future;
use std::net::SocketAddr;
use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::time::{Duration, Instant};
use tokio::sync::{mpsc, oneshot};
use tracing::{error, info, warn};

/// Period of the event loop's tick when no watchdog asks for a shorter one.
pub const LOOP_TICK: Duration = Duration::from_secs(1);
/// Shortest tick, whatever `WATCHDOG_USEC` says.
const MIN_TICK: Duration = Duration::from_millis(10);
/// Period of the `STATUS=` line while nothing else changes it.
pub const STATUS_EVERY: Duration = Duration::from_secs(10);
/// How long a reload waits for the workers to take a new channel configuration.
const RELOAD_TIMEOUT: Duration = Duration::from_secs(10);

/// What `gaugewise run` adds to the daemon as a service. `Service::default()` adds nothing (the demo, tests).
pub struct Service {
    /// systemd's notification socket; disabled when not run by systemd.
    pub notifier: Notifier,
    /// Ping period (half of `WATCHDOG_USEC`); None: no watchdog.
    pub watchdog: Option<Duration>,
    pub reload: Option<Reload>,
    /// Where the metrics endpoint listens; None: off.
    pub metrics: Option<SocketAddr>,
}

impl Default for Service {
    fn default() -> Self {
        Service {
            notifier: Notifier::disabled(),
            watchdog: None,
            reload: None,
            metrics: None,
        }
    }
}

impl Service {
    /// Notifications and watchdog as the process environment asks (`NOTIFY_SOCKET`, `WATCHDOG_USEC`,
    /// `WATCHDOG_PID`). A variable that cannot be used is logged and that part stays off: the daemon runs
    /// whatever its supervisor got wrong.
    pub fn from_env() -> Service {
        let notifier = Notifier::from_env().unwrap_or_else(|e| {
            error!("systemd notifications off: {e}");
            Notifier::disabled()
        });
        let watchdog = notify::watchdog_interval_from_env().unwrap_or_else(|e| {
            error!("systemd watchdog off: {e}");
            None
        });
        if let Some(w) = watchdog {
            info!(
                ping_every_s = w.as_secs_f64(),
                "systemd watchdog on: pinging from the event loop"
            );
        }
        Service {
            notifier,
            watchdog,
            reload: None,
            metrics: None,
        }
    }
}

/// The event loop task's tick: liveness for `/health`, watchdog pings and the periodic status line.
pub(super) struct LoopTicker {
    interval: tokio::time::Interval,
    watchdog: Option<WatchdogTimer>,
    next_status: Instant,
    /// Received-message count and time at the last status line, for the rate.
    last: (Instant, u64),
}

impl LoopTicker {
    pub(super) fn new(watchdog: Option<Duration>) -> Self {
        let period = watchdog
            .map_or(LOOP_TICK, |w| w.min(LOOP_TICK))
            .max(MIN_TICK);
        let mut interval = tokio::time::interval(period);
        // After a stall, one tick (and one ping) as soon as the loop runs again, not a burst.
        interval.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        let now = Instant::now();
        LoopTicker {
            interval,
            watchdog: watchdog.map(WatchdogTimer::new),
            next_status: now + STATUS_EVERY,
            last: (now, 0),
        }
    }

    /// Drives `work` to completion, ticking meanwhile. `work` is polled until done, never dropped half-way.
    pub(super) async fn run<F: Future>(&mut self, work: F, shared: &Shared) -> F::Output {
        tokio::pin!(work);
        loop {
            // Not biased: under a steady stream `work` is always ready, and the tick must still get its turn.
            tokio::select! {
                out = &mut work => return out,
                _ = self.interval.tick() => self.tick(shared),
            }
        }
    }

    fn tick(&mut self, shared: &Shared) {
        let now = Instant::now();
        shared.mark_tick(now);
        if let Some(w) = &mut self.watchdog {
            if w.due(now) {
                shared.notify(&[Message::Watchdog]);
            }
        }
        if now >= self.next_status && shared.notifier.is_enabled() {
            self.next_status = now + STATUS_EVERY;
            let received = shared.counters.received.load(Ordering::Relaxed);
            let (then, before) = std::mem::replace(&mut self.last, (now, received));
            let secs = now.saturating_duration_since(then).as_secs_f64();
            let rate = if secs > 0.0 {
                received.saturating_sub(before) as f64 / secs
            } else {
                0.0
            };
            shared.notify_status(|| {
                let mut line = status_line(shared, None);
                line.push_str(&format!(", {rate:.1} samples/s"));
                line
            });
        }
    }
}

/// The `STATUS=` line: the link, the channels, and (when the link is down) the error and the wait before retrying.
pub(super) fn status_line(
    shared: &Shared,
    failure: Option<(&rumqttc::ConnectionError, Duration)>,
) -> String {
    let s = &shared.settings;
    let channels = shared.channels.load(Ordering::Relaxed);
    let stale = shared.stale_channels.load(Ordering::Relaxed);
    let link = match failure {
        Some((e, retry)) => format!(
            "reconnecting to {}:{} in {:.1} s ({e})",
            s.host,
            s.port,
            retry.as_secs_f64()
        ),
        None if shared.connected.load(Ordering::Relaxed) => {
            format!("connected to {}:{}", s.host, s.port)
        }
        None => format!("not connected to {}:{}, retrying", s.host, s.port),
    };
    format!("{link}; {channels} channels, {stale} stale")
}

/// The metrics endpoint's answer for `path`.
pub(super) fn answer(shared: &Shared, path: &str) -> http::Response {
    match path {
        "/metrics" => http::Response {
            status: 200,
            content_type: metrics::CONTENT_TYPE,
            body: metrics::render(&shared.metrics()),
        },
        "/health" => {
            let (healthy, body) = metrics::health(&shared.health());
            http::Response {
                status: if healthy { 200 } else { 503 },
                content_type: "application/json",
                body,
            }
        }
        "/" => http::Response::text(200, "gaugewise: /metrics (Prometheus), /health\n"),
        _ => http::Response::text(404, "not found: try /metrics or /health\n"),
    }
}

/// Serves reload requests until their sender goes away (see the module notes).
pub(super) async fn reload_loop(
    shared: Arc<Shared>,
    mut reload: Reload,
    workers: Vec<mpsc::Sender<Control>>,
) {
    while reload.requests.recv().await.is_some() {
        shared.notify(&[
            Message::Reloading,
            Message::Status("reloading the configuration"),
        ]);
        let status = match reload_once(&shared, &mut reload, &workers).await {
            Ok(text) => {
                shared.reloads_applied.fetch_add(1, Ordering::Relaxed);
                text
            }
            Err(e) => {
                shared.reloads_refused.fetch_add(1, Ordering::Relaxed);
                error!("configuration reload refused, still running on the previous configuration: {e}");
                format!(
                    "reload refused (see the log); {}",
                    status_line(&shared, None)
                )
            }
        };
        shared.notify(&[Message::Ready, Message::Status(&status)]);
    }
}

/// One reload: read, validate, compare, apply. Err: refused, nothing changed.
async fn reload_once(
    shared: &Shared,
    reload: &mut Reload,
    workers: &[mpsc::Sender<Control>],
) -> Result<String, String> {
    let load = reload.load.clone();
    let new = tokio::task::spawn_blocking(move || load())
        .await
        .map_err(|e| format!("the configuration reader failed: {e}"))?
        .map_err(|e| e.to_string())?;
    // What a start would also refuse (inputs as ingest rules, topics, TLS files).
    setup::from_config(&new, 0.0)
        .and_then(|(settings, _)| super::mqtt_options(&settings).map(|_| ()))
        .map_err(|e: RuntimeError| format!("{}: {e}", new.source))?;
    let plan = reload::plan(&reload.current, &new);
    for section in &plan.need_restart {
        warn!(
            section,
            "reload: [{section}] changed in {}; it is not applied until the daemon restarts (systemctl restart gaugewise)",
            new.source
        );
    }
    let mut restarted = Vec::new();
    if plan.channels {
        let config = Arc::new(new.channels.clone());
        let mut replies = Vec::with_capacity(workers.len());
        for w in workers {
            let (tx, rx) = oneshot::channel();
            if w.send(Control::Channels(config.clone(), tx)).await.is_ok() {
                replies.push(rx);
            }
        }
        let gathered = tokio::time::timeout(RELOAD_TIMEOUT, async {
            let mut all = Vec::new();
            for rx in replies {
                all.extend(rx.await.unwrap_or_default());
            }
            all
        })
        .await;
        restarted = match gathered {
            Ok(all) => all,
            Err(_) => {
                // The workers take the request between samples; one that has not answered by now still will.
                warn!("reload: not every worker confirmed the new channel configuration within {RELOAD_TIMEOUT:?}");
                Vec::new()
            }
        };
        reload.current.channels = new.channels;
    }
    let total = shared.channels.load(Ordering::Relaxed);
    let kept = total.saturating_sub(restarted.len());
    reload::log_outcome(&restarted, kept, &plan.need_restart);
    let mut status = format!(
        "reloaded: {} restarted, {kept} kept",
        reload::channels(restarted.len())
    );
    if !plan.need_restart.is_empty() {
        status.push_str(&format!(
            "; restart to apply [{}]",
            plan.need_restart.join("], [")
        ));
    }
    Ok(status)
}
