//! Configuration reload on SIGHUP: what a new configuration changes, and which of those changes a running daemon
//! takes on.
//!
//! A reload re-reads the file (with the `GAUGEWISE_*` environment applied again) and validates it exactly as a
//! start would. An invalid file is refused with an error in the log, and the daemon carries on with what it runs.
//! A valid one is compared with the running configuration section by section ([`plan`]):
//!
//! - **Channel models and flag designs** (`[channels]`, `[flags]`) are applied at once, by the workers, between two
//!   samples. A channel whose model ([`ModelSpec`]) and flag design are unchanged keeps its state (filter,
//!   detectors, order of samples). A channel whose model or flag design changed starts again from the new ones,
//!   as a new channel would, and the log names it and what changed ([`change`]). Channels that appear later
//!   simply get the new configuration.
//! - **Everything else** (`[broker]`, `[[inputs]]`, `[output]`, `[status]`, `[timing]`, `[limits]`, `[metrics]`,
//!   `[instance]`) is
//!   kept as it was, and the log says, per section, that the change waits for a restart. These change the MQTT
//!   connection, the subscriptions or the session, which a restart redoes cleanly; applying them in place would
//!   mean a reconnect in the middle of the stream for what is a rare edit. The running configuration the next
//!   reload compares with is therefore the old one with the new channel sections, so an edit still waiting for
//!   a restart is reported again.

use crate::config::{ChannelConfig, ConfigError, DaemonConfig};
use crate::detect::FlagDesign;
use crate::model::ModelSpec;
use std::sync::Arc;
use tokio::sync::mpsc;
use tracing::{error, info};

/// Reads and validates the configuration again (for `gaugewise run`: the file named on the command line).
pub type Loader = Arc<dyn Fn() -> Result<DaemonConfig, ConfigError> + Send + Sync>;

/// Reloads on request: each message on `requests` is one (SIGHUP, see [`hangup_requests`]).
pub struct Reload {
    /// The configuration the daemon was started with.
    pub current: DaemonConfig,
    pub load: Loader,
    pub requests: mpsc::Receiver<()>,
}

/// What a new configuration changes, compared with the running one.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct Plan {
    /// `[channels]` or `[flags]` differ: workers re-check their channels.
    pub channels: bool,
    /// Sections that differ and are not applied until a restart, by their name in the file.
    pub need_restart: Vec<&'static str>,
}

/// Compares the running configuration with a new one.
pub fn plan(running: &DaemonConfig, new: &DaemonConfig) -> Plan {
    let mut need_restart = Vec::new();
    let mut differs = |name: &'static str, same: bool| {
        if !same {
            need_restart.push(name);
        }
    };
    differs("broker", running.broker == new.broker);
    differs("inputs", running.inputs == new.inputs);
    differs(
        "output",
        running.output == new.output && running.flags_topic == new.flags_topic,
    );
    differs("status", running.status_topic == new.status_topic);
    differs(
        "timing",
        running.stale_after_s == new.stale_after_s && running.stale_every_s == new.stale_every_s,
    );
    differs("limits", running.max_channels == new.max_channels);
    differs("metrics", running.metrics == new.metrics);
    // The checkpoint's directory and period are fixed for a run: its saver holds the directory it loaded from.
    differs("state", running.state == new.state);
    // Applying it in place would hand channels between running instances with no one owning them in between.
    differs("instance", running.instance == new.instance);
    Plan {
        channels: running.channels != new.channels,
        need_restart,
    }
}

/// How one channel's configuration changed between two channel configurations; None if it did not.
#[derive(Debug, Clone, PartialEq)]
pub struct Change {
    pub model: Option<(ModelSpec, ModelSpec)>,
    pub flags: bool,
}

/// Whether `channel` runs the same model and flag design under `old` and `new`; if not, what changed.
pub fn change(old: &ChannelConfig, new: &ChannelConfig, channel: &str) -> Option<Change> {
    let (om, nm) = (old.model_for(channel), new.model_for(channel));
    let (of, nf): (&FlagDesign, &FlagDesign) = (old.flags_for(channel), new.flags_for(channel));
    let model = (om != nm).then(|| (om.clone(), nm.clone()));
    let flags = of != nf;
    (model.is_some() || flags).then_some(Change { model, flags })
}

impl Change {
    /// For the log: `model lag -> trend`, `model lag: parameters changed`, `flag design changed`, or both.
    pub fn describe(&self) -> String {
        let mut parts = Vec::new();
        if let Some((old, new)) = &self.model {
            if old.kind() == new.kind() {
                parts.push(format!("model {}: parameters changed", new.kind()));
            } else {
                parts.push(format!("model {} -> {}", old.kind(), new.kind()));
            }
        }
        if self.flags {
            parts.push("flag design changed".to_string());
        }
        parts.join(", ")
    }
}

/// One channel a worker restarted.
#[derive(Debug, Clone, PartialEq)]
pub struct Restarted {
    pub channel: String,
    pub change: String,
}

/// Most restarted channels named one by one in the log; the rest are counted.
pub const MAX_NAMED: usize = 50;

/// Logs the channels a reload restarted (at most [`MAX_NAMED`] by name) and the summary line.
pub fn log_outcome(restarted: &[Restarted], kept: usize, need_restart: &[&'static str]) {
    for r in restarted.iter().take(MAX_NAMED) {
        info!(channel = %r.channel, "reload: channel restarts with its new configuration ({})", r.change);
    }
    if restarted.len() > MAX_NAMED {
        info!(
            "reload: {} more channels restart with their new configuration",
            restarted.len() - MAX_NAMED
        );
    }
    let waiting = if need_restart.is_empty() {
        String::new()
    } else {
        format!(
            "; not applied until a restart: [{}]",
            need_restart.join("], [")
        )
    };
    info!(
        restarted = restarted.len(),
        kept,
        "configuration reloaded: {} restarted with a new model or flag design, {kept} kept their state{waiting}",
        channels(restarted.len())
    );
}

/// `1 channel`, `2 channels`.
pub fn channels(n: usize) -> String {
    if n == 1 {
        "1 channel".to_string()
    } else {
        format!("{n} channels")
    }
}

/// A receiver that gets one message per SIGHUP (several signals during one reload make one more reload).
///
/// The handler is installed by this call, so call it early inside the tokio runtime: without one, SIGHUP
/// terminates the process.
pub fn hangup_requests() -> mpsc::Receiver<()> {
    let (tx, rx) = mpsc::channel(1);
    #[cfg(unix)]
    {
        use tokio::signal::unix::{signal, SignalKind};
        match signal(SignalKind::hangup()) {
            Ok(mut hup) => {
                tokio::spawn(async move {
                    while hup.recv().await.is_some() {
                        info!("SIGHUP received: reloading the configuration");
                        // Full: a reload is already pending, which will read the file as it is now.
                        let _ = tx.try_send(());
                    }
                });
            }
            Err(e) => error!("cannot listen for SIGHUP ({e}); configuration reload is off"),
        }
    }
    #[cfg(not(unix))]
    drop(tx);
    rx
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;

    const BASE: &str = r#"
[channels.default]
model = "level"
interval = 10.0
obs_var = 0.25
level_var = 0.01

[[channels.override]]
match = "TT-*"
model = "lag"
interval = 10.0
mean = 72.5
tau = 300.0
state_var = 0.015
obs_var = 0.04

[broker]
client_id = "gw-1"

[[inputs]]
topic = "brackenfield/raw/+"
channel = "{2}"
payload = "number"

[output]
topic = "brackenfield/clean/{channel}"
"#;

    fn daemon(text: &str) -> DaemonConfig {
        Config::from_str(text, "test.toml")
            .unwrap()
            .daemon()
            .unwrap()
    }

    #[test]
    fn identical_configs_change_nothing() {
        let a = daemon(BASE);
        assert_eq!(plan(&a, &a.clone()), Plan::default());
        assert_eq!(change(&a.channels, &a.channels, "TT-101"), None);
    }

    #[test]
    fn a_model_change_restarts_only_its_channels() {
        let old = daemon(BASE);
        let new = daemon(&BASE.replace("tau = 300.0", "tau = 600.0"));
        let p = plan(&old, &new);
        assert!(p.channels);
        assert!(p.need_restart.is_empty(), "{p:?}");
        let c = change(&old.channels, &new.channels, "TT-101").unwrap();
        assert_eq!(c.describe(), "model lag: parameters changed");
        assert_eq!(change(&old.channels, &new.channels, "FT-201"), None);

        let new = daemon(&BASE.replace("match = \"TT-*\"", "match = \"TT-9*\""));
        let c = change(&old.channels, &new.channels, "TT-101").unwrap();
        assert_eq!(c.describe(), "model lag -> level");
        assert_eq!(
            change(&old.channels, &new.channels, "TT-901"),
            None,
            "still matched by the edited pattern"
        );
    }

    #[test]
    fn a_flag_design_change_restarts_its_channels() {
        let old = daemon(BASE);
        let new = daemon(&format!("{BASE}\n[flags.spike]\nthreshold = 6.0\n"));
        assert!(plan(&old, &new).channels);
        let c = change(&old.channels, &new.channels, "FT-201").unwrap();
        assert_eq!(c.describe(), "flag design changed");
        assert!(c.model.is_none());
    }

    #[test]
    fn connection_sections_wait_for_a_restart() {
        let old = daemon(BASE);
        let text = BASE
            .replace("client_id = \"gw-1\"", "client_id = \"gw-1\"\nkeep_alive_s = 10")
            .replace("payload = \"number\"", "payload = \"number\"\nqos = 0")
            + "\n[timing]\nstale_after_s = 0\n[limits]\nmax_channels = 10\n[metrics]\nlisten = \"127.0.0.1:9464\"\n";
        let p = plan(&old, &daemon(&text));
        assert!(!p.channels);
        assert_eq!(
            p.need_restart,
            vec!["broker", "inputs", "timing", "limits", "metrics"]
        );
        let text = BASE.replace("brackenfield/clean/", "brackenfield/estimates/");
        assert_eq!(plan(&old, &daemon(&text)).need_restart, vec!["output"]);
        let text = format!("{BASE}\n[instance]\nindex = 1\ncount = 2\n");
        assert_eq!(plan(&old, &daemon(&text)).need_restart, vec!["instance"]);
    }
}
