//! Channel state across restarts: what the daemon writes to its checkpoint (`checkpoint::Store`) and how a saved
//! channel is taken back at start.
//!
//! One checkpoint file holds every channel of this daemon (per instance when the channels are split): its model
//! and filter state (`Channel::save`), its detectors' memory, its re-estimation window and the wall-clock time
//! of its last sample. A saved channel is taken back only if the configuration that built it is unchanged,
//! judged by a fingerprint of its model table, learning kind and flag design; otherwise it starts fresh, as a
//! reload would restart it. The re-estimation window is taken back under the same rule with the re-estimation
//! settings. The time the daemon was down is simply the gap before the channel's next sample: predicted over,
//! never filled in.
//!
//! Saving goes through the workers (each hands over a copy of its channels, between two samples) and the write
//! runs on the blocking pool, so the message path pays only for the copy.

use super::{Control, Shared, StateSettings};
use crate::channel::{Channel, ResumeError, SavedChannel};
use crate::checkpoint::{Loaded, SaveOutcome, Saver, Store};
use crate::config::ChannelConfig;
use crate::reestimate::{LearnSettings, Learner, Window};
use crate::runtime::counters::Counters;
use crate::runtime::shard;
use serde::{Deserialize, Serialize};
use std::sync::{Arc, Mutex};
use std::time::Duration;
use tokio::sync::{mpsc, oneshot};
use tracing::{debug, error, info, warn};

/// Payload schema of the daemon's checkpoint. Bump it when a change cannot read older files: they are then moved
/// aside as incompatible instead of misread.
pub const SCHEMA: u32 = 1;

/// The checkpoint's file name for this daemon's share of the channels: instances that share a state directory
/// must not overwrite each other.
pub fn checkpoint_name(instance: &shard::Instance) -> String {
    if instance.count <= 1 {
        "channels".to_string()
    } else {
        format!("channels-{}-of-{}", instance.index, instance.count)
    }
}

/// Everything the daemon saves.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Saved {
    /// Wall clock (s since the epoch) when the copy was taken.
    pub saved_at: f64,
    pub channels: Vec<SavedEntry>,
}

/// One channel in the checkpoint.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct SavedEntry {
    pub name: String,
    /// [`fingerprint`] of the configuration the channel was built under.
    pub config: u64,
    pub channel: SavedChannel,
    /// The re-estimation window, with the [`learn_fingerprint`] of its settings.
    pub learner: Option<(u64, Window)>,
    /// Wall clock when its last sample was received (NaN: none yet).
    pub last_received: f64,
}

/// Identifies the parts of the configuration a channel's state depends on: its model table (kind, parameters,
/// interval), whether it learns its parameters, and its flag design. Equal fingerprints: the saved state means the
/// same thing under the current configuration. `Debug` prints floats exactly, so any change of value shows.
pub fn fingerprint(config: &ChannelConfig, name: &str) -> u64 {
    let text = format!(
        "{:?}|{:?}|{:?}",
        config.model_for(name),
        config.learning_for(name),
        config.flags_for(name)
    );
    shard::fnv1a64(text.as_bytes())
}

/// The re-estimation settings a channel runs with: its `[reestimate]` settings, or the defaults for a channel that
/// learns its first model with re-estimation off (it needs the window for that fit); None when it has no window.
pub fn learn_settings(config: &ChannelConfig, name: &str) -> Option<LearnSettings> {
    config
        .learn_for(name)
        .copied()
        .or_else(|| config.learning_for(name).map(|_| LearnSettings::default()))
}

pub fn learn_fingerprint(settings: &LearnSettings) -> u64 {
    shard::fnv1a64(format!("{settings:?}").as_bytes())
}

/// Why a saved channel was not taken back.
#[derive(Debug, thiserror::Error)]
pub enum NotRestored {
    #[error("its configuration changed since the state was saved; it starts fresh")]
    ConfigChanged,
    #[error("its saved state is unusable ({0}); it starts fresh")]
    Unusable(#[from] ResumeError),
}

/// A saved channel taken back: the channel, its learner (the saved window when its settings are unchanged, else
/// a fresh one, else none) and whether the window was kept.
pub struct Restored {
    pub channel: Channel,
    pub learner: Option<Box<Learner>>,
    pub window_kept: bool,
}

/// Takes back `entry` under `config`, or says why not.
pub fn restore(config: &ChannelConfig, entry: &SavedEntry) -> Result<Restored, NotRestored> {
    if entry.config != fingerprint(config, &entry.name) {
        return Err(NotRestored::ConfigChanged);
    }
    let channel = Channel::resume(&entry.channel, config.flags_for(&entry.name))?;
    let settings = learn_settings(config, &entry.name);
    // A channel that has learnt its model needs no window unless re-estimation is on for it.
    let settings = settings
        .filter(|_| channel.learning_target().is_some() || config.learn_for(&entry.name).is_some());
    let (learner, window_kept) = match settings {
        None => (None, false),
        Some(s) => match &entry.learner {
            Some((fp, window)) if *fp == learn_fingerprint(&s) => {
                match Learner::resume(s, window.clone()) {
                    Some(l) => (Some(Box::new(l)), true),
                    None => (Some(Box::new(Learner::new(s))), false),
                }
            }
            _ => (Some(Box::new(Learner::new(s))), false),
        },
    };
    Ok(Restored {
        channel,
        learner,
        window_kept,
    })
}

/// A channel's entry for the checkpoint.
pub fn entry(
    config: &ChannelConfig,
    name: &str,
    channel: &Channel,
    learner: Option<&Learner>,
    last_received: f64,
) -> SavedEntry {
    SavedEntry {
        name: name.to_string(),
        config: fingerprint(config, name),
        channel: channel.save(),
        learner: learner.map(|l| (learn_fingerprint(&l.settings), l.window().clone())),
        last_received,
    }
}

/// The saver shared by the periodic saves and the last one (a mutex, so two never write at once).
pub(super) type SharedSaver = Arc<Mutex<Saver>>;

/// Opens the state directory's checkpoint: the saver for later saves and what was saved, if anything usable.
/// Nothing here stops the start: an unreadable, corrupt or incompatible checkpoint is reported and the daemon
/// starts fresh (a corrupt or incompatible file is moved aside first, so it is kept for a look).
pub(super) async fn load_checkpoint(
    state: &StateSettings,
    instance: &shard::Instance,
) -> (Option<SharedSaver>, Option<Saved>) {
    let store = Store::new(state.dir.clone(), SCHEMA);
    let name = checkpoint_name(instance);
    let saver = match Saver::new(store.clone(), &name) {
        Ok(s) => Arc::new(Mutex::new(s)),
        Err(e) => {
            error!("channel state will not be kept: {e}");
            return (None, None);
        }
    };
    let dir = state.dir.display().to_string();
    let own = name.clone();
    let loaded = tokio::task::spawn_blocking(move || {
        let mine = store.load::<Saved>(&name);
        (mine, others(&store, &name))
    })
    .await;
    let (mine, others) = match loaded {
        Ok(pair) => pair,
        Err(e) => {
            error!("reading the saved channel state failed ({e}); starting fresh");
            return (Some(saver), None);
        }
    };
    let mut saved = match mine {
        Ok(Some(Loaded::Restored(saved))) => {
            let age = super::wall_clock() - saved.saved_at;
            info!(
                dir = %dir,
                channels = saved.channels.len(),
                "channel state found, saved {:.0} s ago; the time since is a gap for every channel",
                age.max(0.0)
            );
            Some(saved)
        }
        Ok(Some(Loaded::Discarded(d))) => {
            warn!("{d}");
            None
        }
        Ok(None) => {
            info!(dir = %dir, checkpoint = %own, "no saved channel state of this instance");
            None
        }
        Err(e) => {
            warn!("cannot read the saved channel state ({e}); starting fresh, the next save replaces it");
            None
        }
    };
    if !others.is_empty() {
        // Files of other instance layouts in the same directory (after `[instance] count` changed): channels
        // this instance now owns and has no state for are taken from the newest of them.
        let merged = merge(saved.take(), others, instance);
        info!(
            dir = %dir,
            channels = merged.channels.len(),
            "channel state merged with the checkpoints of other instance layouts"
        );
        saved = Some(merged);
    }
    (Some(saver), saved)
}

/// The other instance layouts' checkpoints in the store's directory (`channels`, `channels-I-of-N`), read
/// without disturbing them: another instance may own and be writing them.
fn others(store: &Store, own: &str) -> Vec<Saved> {
    let Ok(dir) = std::fs::read_dir(store.dir()) else {
        return Vec::new();
    };
    let mut found = Vec::new();
    for entry in dir.flatten() {
        let name = entry.file_name().to_string_lossy().into_owned();
        let ours = name == "channels" || (name.starts_with("channels-") && name.contains("-of-"));
        if !ours || name == own || name.contains('.') {
            continue;
        }
        match store.inspect::<Saved>(&name) {
            Ok(Some(Ok(saved))) => found.push(saved),
            Ok(Some(Err(problem))) => {
                debug!(file = %name, "other layout's checkpoint unusable: {problem}")
            }
            _ => {}
        }
    }
    found
}

/// This instance's own saved channels, plus those it owns from `others` that it has no state for (the newest
/// copy of each).
fn merge(mine: Option<Saved>, others: Vec<Saved>, instance: &shard::Instance) -> Saved {
    let mut out = mine.unwrap_or(Saved {
        saved_at: f64::NEG_INFINITY,
        channels: Vec::new(),
    });
    let mut have: std::collections::HashMap<String, f64> = out
        .channels
        .iter()
        .map(|e| (e.name.clone(), f64::INFINITY))
        .collect();
    let mut taken: std::collections::HashMap<String, usize> = std::collections::HashMap::new();
    for other in others {
        for e in other.channels {
            if !instance.owns(&e.name) {
                continue;
            }
            match have.get(&e.name) {
                Some(&at) if at >= other.saved_at => continue,
                _ => {}
            }
            have.insert(e.name.clone(), other.saved_at);
            match taken.get(&e.name) {
                Some(&i) => out.channels[i] = e,
                None => {
                    taken.insert(e.name.clone(), out.channels.len());
                    out.channels.push(e);
                }
            }
        }
        out.saved_at = out.saved_at.max(other.saved_at);
    }
    out
}

/// Saves every `every` until aborted.
pub(super) async fn save_loop(
    shared: Arc<Shared>,
    workers: Vec<mpsc::Sender<Control>>,
    saver: SharedSaver,
    every: Duration,
) {
    let mut timer = tokio::time::interval_at(tokio::time::Instant::now() + every, every);
    timer.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    loop {
        timer.tick().await;
        let mut channels = Vec::new();
        for w in &workers {
            let (tx, rx) = oneshot::channel();
            if w.send(Control::Snapshot(tx)).await.is_err() {
                return;
            }
            match rx.await {
                Ok(mine) => channels.extend(mine),
                Err(_) => return,
            }
        }
        let saved = Saved {
            saved_at: super::wall_clock(),
            channels,
        };
        save_checkpoint(shared.clone(), saver.clone(), saved).await;
    }
}

/// Writes one checkpoint on the blocking pool; counts it and logs a failure once (and its recovery), so a full
/// disk or a read-only directory is reported, retried at the next save, and never stops the daemon.
pub(super) async fn save_checkpoint(shared: Arc<Shared>, saver: SharedSaver, saved: Saved) {
    let counters = shared.clone();
    let n = saved.channels.len();
    let done = tokio::task::spawn_blocking(move || {
        let mut saver = saver.lock().unwrap_or_else(|p| p.into_inner());
        let c = &counters.counters;
        match saver.save(&saved) {
            SaveOutcome::Saved { bytes } => {
                Counters::bump(&c.checkpoints_saved);
                debug!(channels = n, bytes, "channel state saved");
            }
            SaveOutcome::Recovered { bytes, failures } => {
                Counters::bump(&c.checkpoints_saved);
                info!(channels = n, bytes, "channel state saved again after {failures} failed attempts");
            }
            SaveOutcome::Failed { error, new, failures } => {
                Counters::bump(&c.checkpoints_failed);
                if new {
                    error!("cannot save channel state ({error}); retrying at every save, the last good checkpoint stays");
                } else {
                    debug!(failures, "channel state still not saved: {error}");
                }
            }
        }
    })
    .await;
    if let Err(e) = done {
        Counters::bump(&shared.counters.checkpoints_failed);
        error!("the channel state writer failed: {e}");
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;

    fn config(text: &str) -> ChannelConfig {
        Config::from_str(text, "test.toml").unwrap().channels
    }

    const BASE: &str = r#"
[channels.default]
model = "level"
interval = 1.0
obs_var = 0.04
level_var = 0.001

[[channels.override]]
match = "LT-*"
model = "lag"
interval = 1.0
"#;

    fn fed(config: &ChannelConfig, name: &str, n: usize) -> (Channel, Option<Learner>) {
        let mut c = crate::runtime::build_channel(config, name).unwrap();
        let mut l = learn_settings(config, name).map(Learner::new);
        let mut noise = crate::simulate::Noise::new(11);
        for k in 0..n {
            let o = c.on_sample(k as f64, Some(50.0 + 0.2 * noise.normal()));
            if let Some(l) = l.as_mut() {
                l.observe(&o);
            }
        }
        (c, l)
    }

    #[test]
    fn a_channel_comes_back_under_the_same_configuration_only() {
        let cfg = config(&format!(
            "{BASE}\n[reestimate]\nenabled = true\nwindow = 100\nmin_samples = 50\n"
        ));
        let (c, l) = fed(&cfg, "TT-101", 150);
        let e = entry(&cfg, "TT-101", &c, l.as_ref(), 1.0e9);
        let bytes = rmp_serde::to_vec_named(&e).unwrap();
        let e: SavedEntry = rmp_serde::from_slice(&bytes).unwrap();
        let r = restore(&cfg, &e).unwrap();
        assert!(r.window_kept);
        assert_eq!(r.learner.unwrap().window(), l.as_ref().unwrap().window());
        assert_eq!(r.channel.last_time(), Some(149.0));

        // Another obs_var: the saved filter state belongs to other parameters.
        let changed = config(
            &format!("{BASE}\n[reestimate]\nenabled = true\nwindow = 100\nmin_samples = 50\n")
                .replace("obs_var = 0.04", "obs_var = 0.05"),
        );
        assert!(matches!(
            restore(&changed, &e),
            Err(NotRestored::ConfigChanged)
        ));
        // Another window length: the channel comes back, its window starts again.
        let other_window = config(&format!(
            "{BASE}\n[reestimate]\nenabled = true\nwindow = 200\nmin_samples = 50\n"
        ));
        let r = restore(&other_window, &e).unwrap();
        assert!(!r.window_kept);
        assert_eq!(r.learner.unwrap().window().len(), 0);
        // Re-estimation turned off: no window at all.
        let r = restore(&config(BASE), &e).unwrap();
        assert!(r.learner.is_none());
    }

    #[test]
    fn a_learning_channel_keeps_its_window_with_reestimation_off() {
        let cfg = config(BASE);
        let (c, l) = fed(&cfg, "LT-301", 80);
        assert!(c.learning_target().is_some());
        let e = entry(&cfg, "LT-301", &c, l.as_ref(), 1.0e9);
        let r = restore(&cfg, &e).unwrap();
        assert!(r.window_kept);
        assert_eq!(r.channel.learning_target(), c.learning_target());
    }

    #[test]
    fn other_layouts_fill_in_only_what_this_instance_owns_and_lacks() {
        let cfg = config(BASE);
        let me = shard::Instance { index: 0, count: 2 };
        let names: Vec<String> = (0..40).map(|i| format!("TT-{i}")).collect();
        let mine_names: Vec<&String> = names.iter().filter(|n| me.owns(n)).take(3).collect();
        let foreign = names.iter().find(|n| !me.owns(n)).unwrap();
        let (c, _) = fed(&cfg, "TT-101", 5);
        let at = |name: &str, last_received: f64| entry(&cfg, name, &c, None, last_received);
        let mine = Saved {
            saved_at: 30.0,
            channels: vec![at(mine_names[0], 3.0)],
        };
        let older = Saved {
            saved_at: 10.0,
            channels: vec![
                at(mine_names[0], 1.0),
                at(mine_names[1], 1.0),
                at(foreign, 1.0),
            ],
        };
        let newer = Saved {
            saved_at: 20.0,
            channels: vec![at(mine_names[1], 2.0), at(mine_names[2], 2.0)],
        };
        let got = merge(Some(mine), vec![older, newer], &me);
        let by: std::collections::HashMap<&str, f64> = got
            .channels
            .iter()
            .map(|e| (e.name.as_str(), e.last_received))
            .collect();
        assert_eq!(by.len(), 3, "{by:?}");
        assert_eq!(by[mine_names[0].as_str()], 3.0, "its own copy wins");
        assert_eq!(by[mine_names[1].as_str()], 2.0, "the newest other copy");
        assert_eq!(by[mine_names[2].as_str()], 2.0);
        assert!(!by.contains_key(foreign.as_str()), "not this instance's");
    }

    #[test]
    fn instances_have_their_own_file() {
        assert_eq!(checkpoint_name(&shard::Instance::ALL), "channels");
        let name = checkpoint_name(&shard::Instance { index: 1, count: 3 });
        assert_eq!(name, "channels-1-of-3");
    }
}
