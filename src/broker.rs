//! An MQTT broker inside the process, and a null relay.
//!
//! `gaugewise demo` and the default integration tests need a broker while nothing is installed on the machine.
//! [`EmbeddedBroker`] runs rumqttd (MQTT 3.1.1) on a free loopback port, configured in code, with no persistence
//! and no listener other than that port. It stops when dropped. [`null_relay`] subscribes to a filter and
//! republishes every message unchanged under a prefix, with no computation: the end-to-end benchmark runs it
//! through the same broker as the daemon, as the reference for what the client library and the broker cost alone.
//!
//! This is an edge module: it owns threads, sockets and tokio runtimes of its own. Nothing in the core uses it.

use std::collections::VecDeque;
use std::io;
use std::net::{Ipv4Addr, SocketAddr, SocketAddrV4, TcpListener, TcpStream};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{mpsc, Arc};
use std::thread::{self, JoinHandle};
use std::time::{Duration, Instant};

use rumqttc::{
    AsyncClient, ClientError, Event, MqttOptions, Packet, Publish, QoS, Request,
    SubscribeReasonCode,
};
use rumqttd::protocol::v4::V4;
use rumqttd::{ConnectionSettings, LinkType, Router, RouterConfig, Server, ServerSettings};
use tokio::sync::oneshot;

/// Largest MQTT packet the embedded broker accepts, and the limit the null relay sets on its client. rumqttc's
/// default (10 KiB) is too small to be left implicit.
pub const MAX_PACKET_SIZE: usize = 1024 * 1024;

/// A `tracing` filter directive that silences the embedded broker. Connection and routing events of rumqttd are
/// logged from a thread of its own, outside the broker thread where gaugewise mutes them, so a binary that
/// installs a subscriber adds this directive to keep the broker's chatter out of its log.
pub const QUIET_LOG_DIRECTIVE: &str = "rumqttd=off";

/// How long `start` and `null_relay` wait for the other side before giving up.
const READY_TIMEOUT: Duration = Duration::from_secs(5);

/// Free ports are found by binding port 0 and releasing it; another process may take the port in between, so a
/// start is retried on a new port this many times.
const START_ATTEMPTS: usize = 5;

/// Why the embedded broker or the null relay could not start.
#[derive(Debug, thiserror::Error)]
pub enum BrokerError {
    #[error("no free loopback port: {0}")]
    NoFreePort(#[source] io::Error),
    #[error("cannot start a thread or runtime for the broker: {0}")]
    Thread(#[source] io::Error),
    #[error("the embedded broker did not start after {attempts} attempts: {last}")]
    Start { attempts: usize, last: String },
    #[error("the null relay did not subscribe to {filter} at {addr} within {timeout:?}: {last}")]
    RelayNotReady {
        filter: String,
        addr: String,
        timeout: Duration,
        last: String,
    },
    #[error("invalid topic filter or prefix for the null relay: {0}")]
    RelayTopic(String),
}

/// An MQTT 3.1.1 broker running in this process on `127.0.0.1:port()`.
///
/// Dropping it (or [`EmbeddedBroker::shutdown`]) closes the listener and every client connection. rumqttd's
/// router thread has no stop signal (it holds a sender to its own queue, so its receive never ends); it stays
/// parked, idle, until the process exits. A test process that starts a few brokers keeps a few idle threads.
pub struct EmbeddedBroker {
    port: u16,
    stop: Option<oneshot::Sender<()>>,
    thread: Option<JoinHandle<()>>,
}

impl EmbeddedBroker {
    /// Starts the broker on a free loopback port and returns once it accepts TCP connections.
    pub fn start() -> Result<EmbeddedBroker, BrokerError> {
        let mut last = String::new();
        for _ in 0..START_ATTEMPTS {
            let port = free_port()?;
            match Self::start_on(port) {
                Ok(broker) => return Ok(broker),
                Err(StartFailure::Fatal(e)) => return Err(e),
                Err(StartFailure::Retry(why)) => last = why,
            }
        }
        Err(BrokerError::Start {
            attempts: START_ATTEMPTS,
            last,
        })
    }

    /// The TCP port on 127.0.0.1.
    pub fn port(&self) -> u16 {
        self.port
    }

    /// The loopback host name to give MQTT clients.
    pub fn host(&self) -> &'static str {
        "127.0.0.1"
    }

    /// Closes the listener and all client connections and waits for the broker thread to end.
    pub fn shutdown(mut self) {
        self.stop_now();
    }

    fn stop_now(&mut self) {
        if let Some(stop) = self.stop.take() {
            let _ = stop.send(());
        }
        if let Some(thread) = self.thread.take() {
            let _ = thread.join();
        }
    }

    fn start_on(port: u16) -> Result<EmbeddedBroker, StartFailure> {
        let (stop_tx, stop_rx) = oneshot::channel::<()>();
        // The broker thread reports here only if the server ends on its own, which, before it is ready, means
        // that it could not bind the port.
        let (ended_tx, ended_rx) = mpsc::channel::<String>();
        let thread = thread::Builder::new()
            .name(format!("gaugewise-broker-{port}"))
            .spawn(move || broker_thread(port, stop_rx, ended_tx))
            .map_err(|e| StartFailure::Fatal(BrokerError::Thread(e)))?;
        let mut broker = EmbeddedBroker {
            port,
            stop: Some(stop_tx),
            thread: Some(thread),
        };

        let addr = loopback(port);
        let deadline = Instant::now() + READY_TIMEOUT;
        // Why the broker thread ended, if it has: it reports a server that stopped; a thread that died drops
        // the sender.
        let ended = || match ended_rx.try_recv() {
            Ok(why) => Some(why),
            Err(mpsc::TryRecvError::Disconnected) => {
                Some(format!("broker thread for port {port} ended"))
            }
            Err(mpsc::TryRecvError::Empty) => None,
        };
        loop {
            if let Some(why) = ended() {
                broker.stop_now();
                return Err(StartFailure::Retry(why));
            }
            if TcpStream::connect_timeout(&addr, Duration::from_millis(200)).is_ok() {
                // A connection succeeds as soon as the listener is bound. A failed bind ends the server at
                // once, so a short pause tells a port held by another process from our own listener.
                thread::sleep(Duration::from_millis(20));
                if let Some(why) = ended() {
                    broker.stop_now();
                    return Err(StartFailure::Retry(why));
                }
                return Ok(broker);
            }
            if Instant::now() >= deadline {
                broker.stop_now();
                return Err(StartFailure::Retry(format!(
                    "port {port} did not accept connections within {READY_TIMEOUT:?}"
                )));
            }
            thread::sleep(Duration::from_millis(10));
        }
    }
}

impl Drop for EmbeddedBroker {
    fn drop(&mut self) {
        self.stop_now();
    }
}

impl std::fmt::Debug for EmbeddedBroker {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("EmbeddedBroker")
            .field("port", &self.port)
            .finish()
    }
}

enum StartFailure {
    Retry(String),
    Fatal(BrokerError),
}

fn loopback(port: u16) -> SocketAddr {
    SocketAddr::V4(SocketAddrV4::new(Ipv4Addr::LOCALHOST, port))
}

/// A port that was free a moment ago: bind port 0 on loopback, read the port back, release it.
fn free_port() -> Result<u16, BrokerError> {
    let listener = TcpListener::bind(loopback(0)).map_err(BrokerError::NoFreePort)?;
    let port = listener
        .local_addr()
        .map_err(BrokerError::NoFreePort)?
        .port();
    Ok(port)
}

fn broker_config() -> (RouterConfig, ConnectionSettings) {
    let router = RouterConfig {
        max_connections: 1024,
        // Packets the router queues towards one connection before it waits for that connection to drain.
        max_outgoing_packet_count: 1000,
        // rumqttd keeps a log in memory per topic: up to (count + 1) segments of this size. 1 MiB holds several
        // thousand samples, enough for a persistent session that was away for a while, and bounds the memory of
        // a long demo.
        max_segment_size: 1024 * 1024,
        max_segment_count: 2,
        custom_segment: None,
        initialized_filters: None,
        shared_subscriptions_strategy: Default::default(),
    };
    let connections = ConnectionSettings {
        // Time a new TCP connection has to send CONNECT.
        connection_timeout_ms: 5000,
        max_payload_size: MAX_PACKET_SIZE,
        // Packets read from one connection in one batch.
        max_inflight_count: 100,
        auth: None,
        external_auth: None,
        // Without dynamic filters, a message to a topic that nobody has subscribed to yet is dropped, and a
        // retained message would be lost before its first subscriber.
        dynamic_filters: true,
    };
    (router, connections)
}

fn broker_thread(port: u16, stop: oneshot::Receiver<()>, ended: mpsc::Sender<String>) {
    // rumqttd logs every connect, disconnect and subscription; on this thread (the server and all its
    // connections) that goes nowhere, whatever subscriber the process installed.
    let _mute = tracing::subscriber::set_default(tracing::subscriber::NoSubscriber::default());
    let runtime = match tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
    {
        Ok(runtime) => runtime,
        Err(e) => {
            let _ = ended.send(format!("tokio runtime: {e}"));
            return;
        }
    };
    let (router_config, connections) = broker_config();
    let router_tx = Router::new(0, router_config).spawn();
    let settings = ServerSettings {
        name: format!("gaugewise-embedded-{port}"),
        listen: loopback(port),
        tls: None,
        next_connection_delay_ms: 0,
        connections,
    };
    let mut server = Server::new(settings, router_tx, V4);
    runtime.block_on(async {
        tokio::select! {
            result = server.start(LinkType::Remote) => {
                let why = match result {
                    Ok(()) => format!("server on port {port} stopped"),
                    Err(e) => format!("port {port}: {e}"),
                };
                let _ = ended.send(why);
            }
            _ = stop => {}
        }
    });
    // Dropping the runtime cancels the task of every connection, which closes its socket.
    drop(runtime);
}

/// A running null relay: see [`null_relay`].
pub struct NullRelay {
    relayed: Arc<AtomicU64>,
    stop: Option<oneshot::Sender<()>>,
    thread: Option<JoinHandle<Option<Duration>>>,
}

/// What a null relay did, returned by [`NullRelay::stop`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct RelayReport {
    /// Messages handed to the client library for republishing.
    pub relayed: u64,
    /// CPU time of the relay's thread (Linux: from /proc; `None` elsewhere or if unreadable).
    pub cpu: Option<Duration>,
}

impl NullRelay {
    /// Messages handed on so far.
    pub fn relayed(&self) -> u64 {
        self.relayed.load(Ordering::Relaxed)
    }

    /// Stops the relay, closes its connection and reports what it did.
    pub fn stop(mut self) -> RelayReport {
        let cpu = self.stop_now();
        RelayReport {
            relayed: self.relayed(),
            cpu,
        }
    }

    fn stop_now(&mut self) -> Option<Duration> {
        if let Some(stop) = self.stop.take() {
            let _ = stop.send(());
        }
        self.thread.take().and_then(|t| t.join().ok().flatten())
    }
}

impl std::fmt::Debug for NullRelay {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("NullRelay")
            .field("relayed", &self.relayed())
            .finish()
    }
}

impl Drop for NullRelay {
    fn drop(&mut self) {
        self.stop_now();
    }
}

/// Starts a null relay: a rumqttc client that subscribes to `in_filter` at `qos` and republishes every message it
/// receives, payload untouched, to `out_prefix` + the message's topic at the same `qos`, not retained.
///
/// It runs on a thread of its own with a single-threaded tokio runtime, and returns once the broker has
/// acknowledged the subscription. The client takes the care a daemon needs: explicit maximum packet size, our own
/// back-off between reconnects, re-subscription on every new session, and a publish path that never waits on the
/// request channel while it is the task that drains it.
pub fn null_relay(
    host: &str,
    port: u16,
    in_filter: &str,
    out_prefix: &str,
    qos: QoS,
) -> Result<NullRelay, BrokerError> {
    if in_filter.is_empty() || !rumqttc::valid_filter(in_filter) {
        return Err(BrokerError::RelayTopic(format!("filter {in_filter:?}")));
    }
    if out_prefix.contains(['+', '#']) {
        return Err(BrokerError::RelayTopic(format!(
            "prefix {out_prefix:?} has a wildcard"
        )));
    }
    // An output under the input filter would be relayed again, for ever.
    if rumqttc::matches(&format!("{out_prefix}x"), in_filter) {
        return Err(BrokerError::RelayTopic(format!(
            "outputs under {out_prefix:?} match the input filter {in_filter:?}"
        )));
    }

    static NEXT_ID: AtomicU64 = AtomicU64::new(0);
    let client_id = format!(
        "gaugewise-null-relay-{}-{}",
        std::process::id(),
        NEXT_ID.fetch_add(1, Ordering::Relaxed)
    );
    let mut options = MqttOptions::new(client_id, host, port);
    options
        .set_keep_alive(Duration::from_secs(30))
        .set_max_packet_size(MAX_PACKET_SIZE, MAX_PACKET_SIZE)
        .set_clean_session(true)
        .set_inflight(1000);

    let relayed = Arc::new(AtomicU64::new(0));
    let (stop_tx, stop_rx) = oneshot::channel::<()>();
    let (ready_tx, ready_rx) = mpsc::channel::<Result<(), String>>();
    let job = RelayJob {
        options,
        filter: in_filter.to_string(),
        prefix: out_prefix.to_string(),
        qos,
        relayed: relayed.clone(),
    };
    let thread = thread::Builder::new()
        .name("gaugewise-null-relay".into())
        .spawn(move || job.run(stop_rx, ready_tx))
        .map_err(BrokerError::Thread)?;
    let mut relay = NullRelay {
        relayed,
        stop: Some(stop_tx),
        thread: Some(thread),
    };

    let deadline = Instant::now() + READY_TIMEOUT;
    let mut last = String::from("no answer");
    loop {
        let left = deadline.saturating_duration_since(Instant::now());
        match ready_rx.recv_timeout(left) {
            Ok(Ok(())) => return Ok(relay),
            // Connection errors are retried by the relay until the deadline; keep the latest for the message.
            Ok(Err(e)) => last = e,
            Err(_) => {
                relay.stop_now();
                return Err(BrokerError::RelayNotReady {
                    filter: in_filter.to_string(),
                    addr: format!("{host}:{port}"),
                    timeout: READY_TIMEOUT,
                    last,
                });
            }
        }
    }
}

struct RelayJob {
    options: MqttOptions,
    filter: String,
    prefix: String,
    qos: QoS,
    relayed: Arc<AtomicU64>,
}

impl RelayJob {
    fn run(
        self,
        stop: oneshot::Receiver<()>,
        ready: mpsc::Sender<Result<(), String>>,
    ) -> Option<Duration> {
        let runtime = match tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()
        {
            Ok(runtime) => runtime,
            Err(e) => {
                let _ = ready.send(Err(format!("tokio runtime: {e}")));
                return None;
            }
        };
        runtime.block_on(self.relay(stop, ready));
        thread_cpu_time()
    }

    async fn relay(self, mut stop: oneshot::Receiver<()>, ready: mpsc::Sender<Result<(), String>>) {
        let (client, mut eventloop) = AsyncClient::new(self.options.clone(), 10_000);
        // Same socket options as the daemon (TCP_NODELAY), so the comparison is fair.
        eventloop.set_network_options(crate::runtime::nodelay());
        // Messages the request channel had no room for, in arrival order. Only this task drains that channel
        // (by polling the event loop), so waiting on it here would never end; the backlog is retried after
        // every event instead.
        let mut backlog: VecDeque<Publish> = VecDeque::new();
        let mut backoff = Duration::from_millis(50);
        let mut announced = false;
        loop {
            let event = tokio::select! {
                event = eventloop.poll() => event,
                _ = &mut stop => break,
            };
            match event {
                Ok(Event::Incoming(Packet::ConnAck(ack))) => {
                    backoff = Duration::from_millis(50);
                    if !ack.session_present {
                        if let Err(e) = client.try_subscribe(self.filter.clone(), self.qos) {
                            let _ = ready.send(Err(format!("subscribe: {e}")));
                        }
                    }
                }
                Ok(Event::Incoming(Packet::SubAck(ack))) => {
                    let refused = ack
                        .return_codes
                        .iter()
                        .any(|c| matches!(c, SubscribeReasonCode::Failure));
                    if refused {
                        let _ = ready.send(Err(format!("the broker refused {}", self.filter)));
                    } else if !announced {
                        announced = true;
                        let _ = ready.send(Ok(()));
                    }
                }
                Ok(Event::Incoming(Packet::Publish(mut publish))) => {
                    publish.topic = format!("{}{}", self.prefix, publish.topic);
                    backlog.push_back(publish);
                }
                Ok(_) => {}
                Err(e) => {
                    if !announced {
                        let _ = ready.send(Err(e.to_string()));
                    }
                    // rumqttc reconnects on the next poll with no pause of its own.
                    tokio::select! {
                        _ = tokio::time::sleep(backoff) => {}
                        _ = &mut stop => break,
                    }
                    backoff = (backoff * 2).min(Duration::from_secs(2));
                }
            }
            while let Some(publish) = backlog.pop_front() {
                match client.try_publish(publish.topic, self.qos, false, publish.payload) {
                    Ok(()) => {
                        self.relayed.fetch_add(1, Ordering::Relaxed);
                    }
                    Err(ClientError::TryRequest(Request::Publish(p))) => {
                        backlog.push_front(p);
                        break;
                    }
                    // Only a closed channel is left, and this task holds both ends.
                    Err(_) => break,
                }
            }
        }
    }
}

/// CPU time (user + system) of the calling thread, from the scheduler's own accounting in nanoseconds.
fn thread_cpu_time() -> Option<Duration> {
    let text = std::fs::read_to_string("/proc/thread-self/schedstat").ok()?;
    let ns: u64 = text.split_whitespace().next()?.parse().ok()?;
    Some(Duration::from_nanos(ns))
}
