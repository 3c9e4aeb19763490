//! Brokers and an MQTT client for integration tests.
//!
//! Every test starts its own broker on a free loopback port: the embedded one (always available) or a real
//! Mosquitto with a generated configuration in a scratch directory (when the `mosquitto` binary is installed).
//! Tests never use a broker that was already running on the machine, such as a system Mosquitto on 1883.
//! [`TestClient`] is a small rumqttc client that waits, with bounded timeouts, for what a test needs to see.

use std::net::{Ipv4Addr, SocketAddr, SocketAddrV4, TcpListener, TcpStream};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::mpsc::{self, Receiver, RecvTimeoutError, Sender};
use std::sync::{Arc, Mutex};
use std::thread::{self, JoinHandle};
use std::time::{Duration, Instant};

use gaugewise::broker::{EmbeddedBroker, MAX_PACKET_SIZE};
use rumqttc::{Client, Event, LastWill, MqttOptions, Packet, QoS};

/// Upper bound for anything a test waits for from a broker on loopback.
pub const WAIT: Duration = Duration::from_secs(5);

/// A broker owned by one test.
pub enum TestBroker {
    Embedded(EmbeddedBroker),
    Mosquitto(Mosquitto),
}

impl TestBroker {
    /// The embedded broker; panics if it cannot start (it needs nothing installed).
    pub fn embedded() -> TestBroker {
        TestBroker::Embedded(EmbeddedBroker::start().expect("embedded broker"))
    }

    /// A fresh Mosquitto, or `None` (with the reason printed) when it is not installed.
    pub fn mosquitto() -> Option<TestBroker> {
        Mosquitto::start().map(TestBroker::Mosquitto)
    }

    /// The embedded broker, then Mosquitto when installed: for tests that run against both.
    pub fn all() -> Vec<TestBroker> {
        let mut brokers = vec![TestBroker::embedded()];
        brokers.extend(TestBroker::mosquitto());
        brokers
    }

    pub fn port(&self) -> u16 {
        match self {
            TestBroker::Embedded(b) => b.port(),
            TestBroker::Mosquitto(m) => m.port(),
        }
    }

    pub fn host(&self) -> &'static str {
        "127.0.0.1"
    }

    /// For messages: which broker a failing assertion ran against.
    pub fn name(&self) -> &'static str {
        match self {
            TestBroker::Embedded(_) => "embedded",
            TestBroker::Mosquitto(_) => "mosquitto",
        }
    }
}

fn loopback(port: u16) -> SocketAddr {
    SocketAddr::V4(SocketAddrV4::new(Ipv4Addr::LOCALHOST, port))
}

/// A port that was free a moment ago (bind port 0, read it back, release it).
pub fn free_port() -> u16 {
    let listener = TcpListener::bind(loopback(0)).expect("bind a loopback port");
    listener.local_addr().expect("local address").port()
}

/// Waits until something accepts TCP connections on the loopback port, or the deadline passes.
pub fn wait_for_port(port: u16, timeout: Duration) -> bool {
    let deadline = Instant::now() + timeout;
    while Instant::now() < deadline {
        if TcpStream::connect_timeout(&loopback(port), Duration::from_millis(200)).is_ok() {
            return true;
        }
        thread::sleep(Duration::from_millis(20));
    }
    false
}

/// Sends a signal with the system's `kill`, so tests need no FFI crate (std can only send SIGKILL).
pub fn send_signal(pid: u32, signal: &str) -> bool {
    Command::new("kill")
        .arg(format!("-{signal}"))
        .arg(pid.to_string())
        .stderr(Stdio::null())
        .status()
        .map(|s| s.success())
        .unwrap_or(false)
}

/// Where the `mosquitto` binary is: on PATH, else Debian's /usr/sbin (not on a normal user's PATH).
pub fn mosquitto_binary() -> Option<PathBuf> {
    let on_path = std::env::var_os("PATH")
        .map(|paths| {
            std::env::split_paths(&paths)
                .map(|d| d.join("mosquitto"))
                .collect::<Vec<_>>()
        })
        .unwrap_or_default();
    on_path
        .into_iter()
        .chain([
            PathBuf::from("/usr/sbin/mosquitto"),
            PathBuf::from("/usr/local/sbin/mosquitto"),
        ])
        .find(|p| p.is_file())
}

/// A Mosquitto started by the test on a free loopback port, with its configuration, persistence database and
/// log in a scratch directory. It is killed when dropped.
pub struct Mosquitto {
    binary: PathBuf,
    port: u16,
    dir: tempfile::TempDir,
    child: Option<Child>,
    /// Lines appended to the generated configuration (`start_with`), `{dir}` already replaced.
    extra: String,
}

impl Mosquitto {
    /// Starts Mosquitto, or returns `None` and prints why when it is not installed. On CI (`CI=true`), where
    /// .ci/run installs it, a missing binary fails the test instead, so a skipped half cannot pass unseen.
    pub fn start() -> Option<Mosquitto> {
        Mosquitto::start_with("", &[])
    }

    /// `start` with `extra` configuration lines after the generated ones (another listener with TLS, a password
    /// file, `allow_anonymous false`), and `files` (name, contents) written into the scratch directory first. In
    /// `extra`, `{dir}` stands for that directory, so a line can name a file: `certfile {dir}/server.pem`. A later
    /// line wins over a generated one where Mosquitto allows a setting once (`allow_anonymous`).
    pub fn start_with(extra: &str, files: &[(&str, &[u8])]) -> Option<Mosquitto> {
        let Some(binary) = mosquitto_binary() else {
            let reason = "mosquitto is not installed (looked on PATH and in /usr/sbin): skipping the Mosquitto half";
            if std::env::var("CI").is_ok_and(|v| v == "true") {
                panic!("{reason}; on CI .ci/run installs it");
            }
            eprintln!("{reason}");
            return None;
        };
        let dir = tempfile::Builder::new()
            .prefix("gaugewise-mosquitto-")
            .tempdir()
            .expect("scratch directory for mosquitto");
        for (name, contents) in files {
            let path = dir.path().join(name);
            std::fs::write(&path, contents)
                .unwrap_or_else(|e| panic!("write {}: {e}", path.display()));
        }
        let extra = extra.replace("{dir}", &dir.path().display().to_string());
        let mut broker = Mosquitto {
            binary,
            port: 0,
            dir,
            child: None,
            extra,
        };
        let mut last = String::new();
        // The free port can be taken between our probe and Mosquitto's bind: try a few.
        for _ in 0..5 {
            broker.port = free_port();
            match broker.launch() {
                Ok(()) => return Some(broker),
                Err(why) => last = why,
            }
        }
        panic!("mosquitto did not start: {last}");
    }

    pub fn port(&self) -> u16 {
        self.port
    }

    /// The process id while it runs.
    pub fn pid(&self) -> Option<u32> {
        self.child.as_ref().map(|c| c.id())
    }

    pub fn dir(&self) -> &Path {
        self.dir.path()
    }

    /// Mosquitto's own log so far (for assertion messages).
    pub fn log(&self) -> String {
        std::fs::read_to_string(self.dir.path().join("mosquitto.log")).unwrap_or_default()
    }

    /// Stops the broker as an operator would (SIGTERM, so it saves its persistence database), waiting up to
    /// 5 s before killing it. Clients see the broker go away.
    pub fn stop(&mut self) {
        let Some(mut child) = self.child.take() else {
            return;
        };
        send_signal(child.id(), "TERM");
        let deadline = Instant::now() + WAIT;
        while Instant::now() < deadline {
            if let Ok(Some(_)) = child.try_wait() {
                return;
            }
            thread::sleep(Duration::from_millis(20));
        }
        let _ = child.kill();
        let _ = child.wait();
    }

    /// Kills the broker with no chance to save anything, as a crash would.
    pub fn kill(&mut self) {
        if let Some(mut child) = self.child.take() {
            let _ = child.kill();
            let _ = child.wait();
        }
    }

    /// Starts the broker again after `stop` or `kill`: same port, same persistence directory, so persistent
    /// sessions and their queued QoS 1 messages come back. Panics if it does not come up.
    pub fn start_again(&mut self) {
        assert!(self.child.is_none(), "mosquitto is still running");
        // The port was ours a moment ago; Mosquitto sets SO_REUSEADDR, so lingering connections do not block it.
        let mut last = String::new();
        for _ in 0..3 {
            match self.launch() {
                Ok(()) => return,
                Err(why) => last = why,
            }
            thread::sleep(Duration::from_millis(200));
        }
        panic!(
            "mosquitto did not start again on port {}: {last}",
            self.port
        );
    }

    /// `stop` then `start_again`.
    pub fn restart(&mut self) {
        self.stop();
        self.start_again();
    }

    fn write_config(&self) -> PathBuf {
        let dir = self.dir.path();
        let conf = dir.join("mosquitto.conf");
        let text = format!(
            "# Generated by the gaugewise test harness; loopback only, never the system's broker.\n\
             listener {port} 127.0.0.1\n\
             allow_anonymous true\n\
             persistence true\n\
             persistence_location {dir}/\n\
             log_dest file {dir}/mosquitto.log\n\
             log_type error\n\
             log_type warning\n\
             log_type notice\n\
             log_type information\n\
             connection_messages true\n\
             max_packet_size {max_packet}\n\
             max_queued_messages 100000\n\
             max_inflight_messages 1000\n\
             # As root Mosquitto would switch to the user \"mosquitto\", who cannot write the scratch directory;\n\
             # as any other user this line has no effect.\n\
             user root\n\
             {extra}\n",
            port = self.port,
            dir = dir.display(),
            max_packet = MAX_PACKET_SIZE,
            extra = self.extra,
        );
        std::fs::write(&conf, text).expect("write mosquitto.conf");
        conf
    }

    fn launch(&mut self) -> Result<(), String> {
        let conf = self.write_config();
        let mut child = Command::new(&self.binary)
            .arg("-c")
            .arg(&conf)
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .map_err(|e| format!("{}: {e}", self.binary.display()))?;
        let deadline = Instant::now() + WAIT;
        loop {
            if let Ok(Some(status)) = child.try_wait() {
                return Err(format!(
                    "exited with {status} on port {}; log:\n{}",
                    self.port,
                    self.log()
                ));
            }
            if TcpStream::connect_timeout(&loopback(self.port), Duration::from_millis(200)).is_ok()
            {
                // Our child is still running, so the listener that answered is its own (a failed bind exits).
                thread::sleep(Duration::from_millis(20));
                if let Ok(Some(status)) = child.try_wait() {
                    return Err(format!(
                        "exited with {status} on port {}; log:\n{}",
                        self.port,
                        self.log()
                    ));
                }
                self.child = Some(child);
                return Ok(());
            }
            if Instant::now() >= deadline {
                let _ = child.kill();
                let _ = child.wait();
                return Err(format!(
                    "no listener on port {} within {WAIT:?}; log:\n{}",
                    self.port,
                    self.log()
                ));
            }
            thread::sleep(Duration::from_millis(20));
        }
    }
}

impl Drop for Mosquitto {
    fn drop(&mut self) {
        self.kill();
    }
}

/// One message as a test client received it.
#[derive(Debug, Clone, PartialEq)]
pub struct Message {
    pub topic: String,
    pub payload: Vec<u8>,
    pub qos: QoS,
    pub retain: bool,
}

impl Message {
    pub fn text(&self) -> String {
        String::from_utf8_lossy(&self.payload).into_owned()
    }

    pub fn json(&self) -> serde_json::Value {
        serde_json::from_slice(&self.payload).unwrap_or_else(|e| {
            panic!(
                "payload on {} is not JSON ({e}): {}",
                self.topic,
                self.text()
            )
        })
    }
}

/// How a [`TestClient`] connects.
#[derive(Clone)]
pub struct ClientOptions {
    /// `None`: a unique id. A persistent session needs a fixed one.
    pub client_id: Option<String>,
    pub clean_session: bool,
    pub keep_alive: Duration,
    pub last_will: Option<LastWill>,
    /// User name and password, for a broker that refuses anonymous clients.
    pub credentials: Option<(String, String)>,
}

impl Default for ClientOptions {
    fn default() -> Self {
        ClientOptions {
            client_id: None,
            clean_session: true,
            keep_alive: Duration::from_secs(10),
            last_will: None,
            credentials: None,
        }
    }
}

impl ClientOptions {
    /// A persistent session (clean session off) under a fixed client id.
    pub fn persistent(client_id: &str) -> ClientOptions {
        ClientOptions {
            client_id: Some(client_id.to_string()),
            clean_session: false,
            ..ClientOptions::default()
        }
    }
}

#[derive(Default)]
struct Shared {
    /// Filters this client subscribed to, renewed whenever the broker starts a new session.
    subscriptions: Vec<(String, QoS, Sender<Message>)>,
    connacks: u64,
    session_present: bool,
    subacks: u64,
    qos1_acked: u64,
    last_error: Option<String>,
}

/// A test's MQTT client (rumqttc, synchronous), its connection driven by a thread of its own.
///
/// It reconnects by itself after a broker restart, with a pause between attempts (rumqttc has none), and sends
/// its subscriptions again whenever the broker did not keep the session. Every wait is bounded.
pub struct TestClient {
    client: Client,
    client_id: String,
    shared: Arc<Mutex<Shared>>,
    inbox: Receiver<Message>,
    stop: Arc<AtomicBool>,
    qos1_sent: AtomicU64,
    thread: Option<JoinHandle<()>>,
}

impl TestClient {
    /// A clean-session client with a unique id; panics if it is not connected within [`WAIT`].
    pub fn connect(port: u16) -> TestClient {
        TestClient::connect_with(port, ClientOptions::default())
    }

    pub fn connect_with(port: u16, options: ClientOptions) -> TestClient {
        static NEXT: AtomicU64 = AtomicU64::new(0);
        let client_id = options.client_id.clone().unwrap_or_else(|| {
            format!(
                "gaugewise-test-{}-{}",
                std::process::id(),
                NEXT.fetch_add(1, Ordering::Relaxed)
            )
        });
        let mut mqtt = MqttOptions::new(client_id.clone(), "127.0.0.1", port);
        mqtt.set_keep_alive(options.keep_alive)
            .set_clean_session(options.clean_session)
            .set_max_packet_size(MAX_PACKET_SIZE, MAX_PACKET_SIZE)
            .set_inflight(100);
        if let Some(will) = options.last_will.clone() {
            mqtt.set_last_will(will);
        }
        if let Some((user, password)) = &options.credentials {
            mqtt.set_credentials(user.clone(), password.clone());
        }
        let (client, mut connection) = Client::new(mqtt, 1000);
        let shared = Arc::new(Mutex::new(Shared::default()));
        let (inbox_tx, inbox) = mpsc::channel();
        let stop = Arc::new(AtomicBool::new(false));

        let thread = {
            let shared = shared.clone();
            let stop = stop.clone();
            let client = client.clone();
            thread::Builder::new()
                .name(format!("mqtt-{client_id}"))
                .spawn(move || {
                    while !stop.load(Ordering::Relaxed) {
                        match connection.recv_timeout(Duration::from_millis(100)) {
                            Ok(Ok(event)) => on_event(event, &shared, &inbox_tx, &client),
                            Ok(Err(e)) => {
                                shared.lock().unwrap().last_error = Some(e.to_string());
                                // rumqttc reconnects on the next poll at once; pace it.
                                thread::sleep(Duration::from_millis(100));
                            }
                            Err(rumqttc::RecvTimeoutError::Timeout) => {}
                            Err(_) => break,
                        }
                    }
                })
                .expect("client thread")
        };
        let test_client = TestClient {
            client,
            client_id,
            shared,
            inbox,
            stop,
            qos1_sent: AtomicU64::new(0),
            thread: Some(thread),
        };
        let connected = test_client.wait_until(WAIT, |s| s.connacks > 0);
        assert!(
            connected,
            "no CONNACK from 127.0.0.1:{port} within {WAIT:?}: {:?}",
            test_client.shared.lock().unwrap().last_error
        );
        test_client
    }

    pub fn client_id(&self) -> &str {
        &self.client_id
    }

    /// Whether the broker kept a session for this client id at the latest connection.
    pub fn session_present(&self) -> bool {
        self.shared.lock().unwrap().session_present
    }

    /// CONNACKs received so far: 1 after the first connection, one more after each reconnect.
    pub fn connections(&self) -> u64 {
        self.shared.lock().unwrap().connacks
    }

    /// Waits until the client has connected `n` times in all.
    pub fn wait_connections(&self, n: u64, timeout: Duration) -> bool {
        self.wait_until(timeout, |s| s.connacks >= n)
    }

    /// Subscribes and waits for the SUBACK; the receiver gets every later message matching `filter`.
    pub fn subscribe(&self, filter: &str, qos: QoS) -> Receiver<Message> {
        let (tx, rx) = mpsc::channel();
        let before = {
            let mut shared = self.shared.lock().unwrap();
            shared.subscriptions.push((filter.to_string(), qos, tx));
            shared.subacks
        };
        self.client.subscribe(filter, qos).expect("queue SUBSCRIBE");
        assert!(
            self.wait_until(WAIT, |s| s.subacks > before),
            "no SUBACK for {filter} within {WAIT:?}"
        );
        rx
    }

    /// Messages that match none of this client's `subscribe` receivers, such as those a resumed persistent
    /// session delivers before (or without) a new subscription.
    pub fn inbox(&self) -> &Receiver<Message> {
        &self.inbox
    }

    /// Queues a publish. At QoS 1, `flush` waits for the broker's acknowledgements.
    pub fn publish(&self, topic: &str, payload: impl Into<Vec<u8>>, qos: QoS, retain: bool) {
        if qos != QoS::AtMostOnce {
            self.qos1_sent.fetch_add(1, Ordering::Relaxed);
        }
        self.client
            .publish(topic, qos, retain, payload)
            .expect("queue PUBLISH");
    }

    /// Waits until the broker has acknowledged every QoS 1 publish made so far.
    pub fn flush(&self, timeout: Duration) -> bool {
        let sent = self.qos1_sent.load(Ordering::Relaxed);
        self.wait_until(timeout, |s| s.qos1_acked >= sent)
    }

    /// Sends DISCONNECT (so no Last Will) and stops the connection thread.
    pub fn disconnect(mut self) {
        let _ = self.client.disconnect();
        // Give the event loop a moment to write DISCONNECT before it is stopped.
        thread::sleep(Duration::from_millis(100));
        self.end();
    }

    /// Drops the TCP connection without DISCONNECT, as a crashed client would: the broker sends its Last Will.
    pub fn abort(mut self) {
        self.end();
    }

    fn end(&mut self) {
        self.stop.store(true, Ordering::Relaxed);
        if let Some(thread) = self.thread.take() {
            let _ = thread.join();
        }
    }

    fn wait_until(&self, timeout: Duration, done: impl Fn(&Shared) -> bool) -> bool {
        let deadline = Instant::now() + timeout;
        loop {
            if done(&self.shared.lock().unwrap()) {
                return true;
            }
            if Instant::now() >= deadline {
                return false;
            }
            thread::sleep(Duration::from_millis(5));
        }
    }
}

impl Drop for TestClient {
    fn drop(&mut self) {
        if self.thread.is_some() {
            let _ = self.client.try_disconnect();
            thread::sleep(Duration::from_millis(20));
            self.end();
        }
    }
}

fn on_event(event: Event, shared: &Mutex<Shared>, inbox: &Sender<Message>, client: &Client) {
    let Event::Incoming(packet) = event else {
        return;
    };
    let mut shared = shared.lock().unwrap();
    match packet {
        Packet::ConnAck(ack) => {
            shared.connacks += 1;
            shared.session_present = ack.session_present;
            if !ack.session_present {
                for (filter, qos, _) in &shared.subscriptions {
                    let _ = client.try_subscribe(filter.clone(), *qos);
                }
            }
        }
        Packet::SubAck(_) => shared.subacks += 1,
        Packet::PubAck(_) => shared.qos1_acked += 1,
        Packet::Publish(p) => {
            let message = Message {
                topic: p.topic.clone(),
                payload: p.payload.to_vec(),
                qos: p.qos,
                retain: p.retain,
            };
            let mut routed = false;
            for (filter, _, tx) in &shared.subscriptions {
                if rumqttc::matches(&message.topic, filter) {
                    let _ = tx.send(message.clone());
                    routed = true;
                }
            }
            if !routed {
                let _ = inbox.send(message);
            }
        }
        _ => {}
    }
}

/// Receives up to `n` messages, waiting at most `timeout` in all.
pub fn recv_n(rx: &Receiver<Message>, n: usize, timeout: Duration) -> Vec<Message> {
    let deadline = Instant::now() + timeout;
    let mut out = Vec::with_capacity(n);
    while out.len() < n {
        let left = deadline.saturating_duration_since(Instant::now());
        match rx.recv_timeout(left) {
            Ok(m) => out.push(m),
            Err(RecvTimeoutError::Timeout) | Err(RecvTimeoutError::Disconnected) => break,
        }
    }
    out
}

/// Asserts that nothing more arrives within `quiet`.
pub fn assert_quiet(rx: &Receiver<Message>, quiet: Duration) {
    if let Ok(m) = rx.recv_timeout(quiet) {
        panic!("unexpected message on {}: {}", m.topic, m.text());
    }
}
