//! What a checkpoint of channel state costs: the copy a worker makes between two samples, the file's size, the
//! write (encode, fsync, rename), and the start-up read and restore, for a large plant (100,000 channels without
//! re-estimation) and for 1,000 channels with 2,000-sample re-estimation windows. Also the process's peak memory
//! over a save, since a save holds a copy of every channel's state while it writes.
//!
//! `cargo bench --bench checkpoint` (GWBENCH_CKPT_CHANNELS, GWBENCH_CKPT_WINDOW_CHANNELS to change the sizes).
//! Prints figures; judges nothing: the daemon's memory target (200 MB at 100,000 channels) is judged by
//! benches/daemon_e2e.rs case c, and this bench says how much a save adds to it.

use gaugewise::channel::Channel;
use gaugewise::checkpoint::{Loaded, SaveOutcome, Saver, Store};
use gaugewise::config::{ChannelConfig, Config};
use gaugewise::reestimate::Learner;
use gaugewise::runtime::persist::{self, Chunk, SavedFile, CHUNK_BYTES, CHUNK_CHANNELS, SCHEMA};
use gaugewise::simulate::Noise;
use std::time::Instant;

fn env_or(name: &str, default: usize) -> usize {
    std::env::var(name)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

/// VmRSS and VmHWM in MB.
fn memory() -> (f64, f64) {
    let status = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    let field = |name: &str| {
        status
            .lines()
            .find(|l| l.starts_with(name))
            .and_then(|l| l.split_whitespace().nth(1))
            .and_then(|v| v.parse::<f64>().ok())
            .unwrap_or(0.0)
            / 1024.0
    };
    (field("VmRSS:"), field("VmHWM:"))
}

/// Resets the peak so the next VmHWM is the peak from now on (Linux 4.0+: write 5 to clear_refs).
fn reset_peak() {
    let _ = std::fs::write("/proc/self/clear_refs", "5");
}

struct Held {
    name: String,
    channel: Channel,
    learner: Option<Learner>,
}

fn plant(config: &ChannelConfig, n: usize, samples: usize) -> Vec<Held> {
    let mut noise = Noise::new(5);
    (0..n)
        .map(|i| {
            let name = format!("AREA{}/TT-{i:06}", i % 20);
            let mut channel =
                Channel::with_flags(config.model_for(&name), config.flags_for(&name)).unwrap();
            let mut learner = config.learn_for(&name).copied().map(Learner::new);
            for k in 0..samples {
                let o = channel.on_sample(k as f64, Some(60.0 + 0.5 * noise.normal()));
                if let Some(l) = learner.as_mut() {
                    l.observe(&o);
                }
            }
            Held {
                name,
                channel,
                learner,
            }
        })
        .collect()
}

fn measure(what: &str, config: &ChannelConfig, channels: &[Held]) {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::new(dir.path(), SCHEMA);
    let (rss0, _) = memory();
    reset_peak();

    // As the daemon does it: each worker encodes its channels a chunk at a time (at most CHUNK_CHANNELS, cut
    // short at CHUNK_BYTES), then one write.
    let t = Instant::now();
    let mut chunks = Vec::new();
    let mut slowest_chunk: f64 = 0.0;
    let mut from = 0;
    while from < channels.len() {
        let c0 = Instant::now();
        let mut chunk = Chunk::default();
        for h in channels.iter().skip(from).take(CHUNK_CHANNELS) {
            if chunk.bytes.len() >= CHUNK_BYTES {
                break;
            }
            let e = persist::entry(config, &h.name, &h.channel, h.learner.as_ref(), 1.0e9);
            chunk.push(&e);
        }
        slowest_chunk = slowest_chunk.max(c0.elapsed().as_secs_f64());
        from += chunk.count;
        chunks.push(chunk);
    }
    let n_chunks = chunks.len();
    let copy = t.elapsed();
    let t = Instant::now();
    let mut saver = Saver::new(store.clone(), "channels").unwrap();
    let bytes = match persist::save_chunks(&mut saver, 0.0, &chunks) {
        SaveOutcome::Saved { bytes } => bytes,
        other => panic!("the save failed: {other:?}"),
    };
    let write = t.elapsed();
    drop(chunks);
    let (_, peak) = memory();

    let t = Instant::now();
    let loaded = match store.load::<SavedFile>("channels").unwrap() {
        Some(Loaded::Restored(s)) => s.decode(),
        other => panic!("the checkpoint did not load: {other:?}"),
    };
    let read = t.elapsed();
    let t = Instant::now();
    let mut restored = 0;
    for e in &loaded.channels {
        if persist::restore(config, e).is_ok() {
            restored += 1;
        }
    }
    let restore = t.elapsed();
    assert_eq!(restored, channels.len());
    let n = channels.len() as f64;
    println!("{what}: {} channels", channels.len());
    println!(
        "   encoding every channel's state (the workers' share of a save): {:.1} ms, {:.2} µs per channel; \
         the longest a worker pauses for one chunk: {:.1} ms ({} chunks)",
        copy.as_secs_f64() * 1e3,
        copy.as_secs_f64() * 1e6 / n,
        slowest_chunk * 1e3,
        n_chunks
    );
    println!(
        "   file: {:.1} MB ({:.0} bytes per channel); write + fsync + rename: {:.1} ms",
        bytes as f64 / 1e6,
        bytes as f64 / n,
        write.as_secs_f64() * 1e3
    );
    println!(
        "   at start: read, check and decode {:.1} ms, restore {:.1} ms",
        read.as_secs_f64() * 1e3,
        restore.as_secs_f64() * 1e3
    );
    println!(
        "   memory: VmRSS {rss0:.1} MB with the channels; peak during the save {peak:.1} MB (+{:.1} MB)",
        peak - rss0
    );
    println!();
}

fn main() {
    // Criterion-style arguments (--bench) are accepted and ignored.
    let n = env_or("GWBENCH_CKPT_CHANNELS", 100_000);
    let nw = env_or("GWBENCH_CKPT_WINDOW_CHANNELS", 1_000);
    let base = r#"
[channels.default]
model = "level"
interval = 1.0
obs_var = 0.25
level_var = 0.01
"#;
    let plain = Config::from_str(base, "bench").unwrap().channels;
    let channels = plant(&plain, n, 20);
    measure("a) a large plant, no re-estimation", &plain, &channels);
    drop(channels);

    let with_windows = Config::from_str(
        &format!("{base}\n[reestimate]\nenabled = true\nwindow = 2000\nevery_s = 60\n"),
        "bench",
    )
    .unwrap()
    .channels;
    let channels = plant(&with_windows, nw, 2000);
    measure(
        "b) re-estimation on, 2,000-sample windows full",
        &with_windows,
        &channels,
    );
}
