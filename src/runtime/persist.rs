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

/// The checkpoint as the file holds it: a map `{saved_at, channels}` whose channels are each encoded on their own
/// (MessagePack, fields in order) inside a binary string. Two reasons: a save streams channels out of the workers
/// a chunk at a time and never holds a decoded copy of every channel (at 100,000 channels that copy was 160 MB,
/// measured by benches/checkpoint.rs); and one channel that cannot be decoded costs only that channel.
#[derive(Debug, Deserialize)]
pub struct SavedFile {
    pub saved_at: f64,
    pub channels: Vec<serde_bytes::ByteBuf>,
}

/// A checkpoint decoded.
#[derive(Debug, Clone)]
pub struct Saved {
    /// Wall clock (s since the epoch) when the save began.
    pub saved_at: f64,
    pub channels: Vec<SavedEntry>,
    /// Entries that did not decode (their channels start fresh).
    pub undecodable: usize,
}

impl SavedFile {
    pub fn decode(self) -> Saved {
        let mut undecodable = 0;
        let channels = self
            .channels
            .iter()
            .filter_map(|b| {
                rmp_serde::from_slice::<SavedEntry>(b)
                    .map_err(|_| undecodable += 1)
                    .ok()
            })
            .collect();
        Saved {
            saved_at: self.saved_at,
            channels,
            undecodable,
        }
    }
}

/// Encoded channel entries, ready to be written: each a MessagePack binary string holding one [`SavedEntry`].
#[derive(Debug, Default)]
pub struct Chunk {
    pub bytes: Vec<u8>,
    /// Channels this chunk covers, encoded or skipped.
    pub count: usize,
    /// Of those, channels whose state could not be encoded (not in `bytes`).
    pub skipped: usize,
}

impl Chunk {
    /// Appends `entry`. A channel whose state cannot be encoded (which serde allows in principle, and nothing in
    /// a channel does) is left out and returns false.
    pub fn push(&mut self, entry: &SavedEntry) -> bool {
        let start = self.bytes.len();
        // bin32: the length is patched in once known, so the entry is encoded in place without a copy.
        self.bytes.extend_from_slice(&[0xc6, 0, 0, 0, 0]);
        if rmp_serde::encode::write(&mut self.bytes, entry).is_err() {
            self.bytes.truncate(start);
            return false;
        }
        let Ok(len) = u32::try_from(self.bytes.len() - start - 5) else {
            self.bytes.truncate(start);
            return false;
        };
        self.bytes[start + 1..start + 5].copy_from_slice(&len.to_be_bytes());
        self.count += 1;
        true
    }
}

/// The bytes in front of the chunks: `{saved_at: .., channels: [` with the number of entries.
pub fn file_prefix(saved_at: f64, count: usize) -> Vec<u8> {
    let mut p = Vec::with_capacity(32);
    // Writing to a Vec cannot fail.
    let _ = rmp::encode::write_map_len(&mut p, 2);
    let _ = rmp::encode::write_str(&mut p, "saved_at");
    let _ = rmp::encode::write_f64(&mut p, saved_at);
    let _ = rmp::encode::write_str(&mut p, "channels");
    let _ = rmp::encode::write_array_len(&mut p, count as u32);
    p
}

/// Writes a checkpoint of `chunks` through `saver`.
pub fn save_chunks<'a>(saver: &'a mut Saver, saved_at: f64, chunks: &[Chunk]) -> SaveOutcome<'a> {
    let count = chunks.iter().map(|c| c.count - c.skipped).sum();
    let prefix = file_prefix(saved_at, count);
    let mut parts: Vec<&[u8]> = Vec::with_capacity(chunks.len() + 1);
    parts.push(&prefix);
    parts.extend(chunks.iter().map(|c| c.bytes.as_slice()));
    saver.save_parts(&parts)
}

/// Reads checkpoint `name` in `dir` without changing anything on disk (for inspection and tests); None when it is
/// missing or unusable.
pub fn read(dir: &std::path::Path, name: &str) -> Option<Saved> {
    Store::new(dir, SCHEMA)
        .inspect::<SavedFile>(name)
        .ok()
        .flatten()
        .and_then(Result::ok)
        .map(SavedFile::decode)
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
        let mine = store.load::<SavedFile>(&name).map(|l| {
            l.map(|l| match l {
                Loaded::Restored(f) => Loaded::Restored(f.decode()),
                Loaded::Discarded(d) => Loaded::Discarded(d),
            })
        });
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
            if saved.undecodable > 0 {
                warn!(
                    "{} channels in the saved state cannot be decoded; they start fresh",
                    saved.undecodable
                );
            }
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
        match store.inspect::<SavedFile>(&name) {
            Ok(Some(Ok(saved))) => found.push(saved.decode()),
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
        undecodable: 0,
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

/// Most channels a worker encodes per request during a periodic save, and the encoded size after which it stops
/// early (a channel with a full 2,000-sample window is about 36 KB): a few milliseconds of its time, so samples
/// queued meanwhile wait no longer than that (benches/checkpoint.rs measures the cost per channel and chunk).
pub const CHUNK_CHANNELS: usize = 1_000;
pub const CHUNK_BYTES: usize = 2 << 20;

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
        let saved_at = super::wall_clock();
        let mut chunks = Vec::new();
        for w in &workers {
            let mut from = 0;
            loop {
                let (tx, rx) = oneshot::channel();
                let request = Control::Snapshot {
                    from,
                    max: CHUNK_CHANNELS,
                    reply: tx,
                };
                if w.send(request).await.is_err() {
                    return;
                }
                let Ok((chunk, more)) = rx.await else {
                    return;
                };
                from += chunk.count;
                chunks.push(chunk);
                if !more {
                    break;
                }
            }
        }
        save_checkpoint(shared.clone(), saver.clone(), saved_at, chunks).await;
    }
}

/// Writes one checkpoint on the blocking pool; counts it and logs a failure once (and its recovery), so a full
/// disk or a read-only directory is reported, retried at the next save, and never stops the daemon.
pub(super) async fn save_checkpoint(
    shared: Arc<Shared>,
    saver: SharedSaver,
    saved_at: f64,
    chunks: Vec<Chunk>,
) {
    let counters = shared.clone();
    let n: usize = chunks.iter().map(|c| c.count).sum();
    let done = tokio::task::spawn_blocking(move || {
        let mut saver = saver.lock().unwrap_or_else(|p| p.into_inner());
        let c = &counters.counters;
        match save_chunks(&mut saver, saved_at, &chunks) {
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
        // Through the file's own encoding, with an entry that does not decode beside it.
        let mut chunk = Chunk::default();
        assert!(chunk.push(&e));
        let mut bad = Chunk::default();
        assert!(bad.push(&e));
        bad.bytes[7] ^= 0xff;
        let dir = tempfile::tempdir().unwrap();
        let mut saver = Saver::new(Store::new(dir.path(), SCHEMA), "channels").unwrap();
        assert!(matches!(
            save_chunks(&mut saver, 5.0, &[chunk, bad]),
            SaveOutcome::Saved { .. }
        ));
        let saved = read(dir.path(), "channels").unwrap();
        assert_eq!(
            (saved.saved_at, saved.channels.len(), saved.undecodable),
            (5.0, 1, 1)
        );
        let e = saved.channels.into_iter().next().unwrap();
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
            undecodable: 0,
        };
        let older = Saved {
            saved_at: 10.0,
            channels: vec![
                at(mine_names[0], 1.0),
                at(mine_names[1], 1.0),
                at(foreign, 1.0),
            ],
            undecodable: 0,
        };
        let newer = Saved {
            saved_at: 20.0,
            channels: vec![at(mine_names[1], 2.0), at(mine_names[2], 2.0)],
            undecodable: 0,
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
