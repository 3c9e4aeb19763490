//! Which worker owns a channel: a stable hash of its name, modulo the worker count; and which daemon instance
//! handles it when several share the channels ([`Instance`], `[instance]` in the configuration).
//!
//! All samples of a channel must go to one worker, so its samples are filtered in arrival order, and the choice
//! must not change between runs or builds (logs and benchmarks should be comparable). std's `HashMap` hasher is
//! randomly seeded per process, so it is not used here; FNV-1a (64-bit) is fixed, fast on short names and spreads
//! tag names such as `TT-101`, `TT-102` well enough over a handful of workers.
//!
//! The instance partition must be just as fixed (every instance, whatever its version or platform, must agree on
//! who owns a channel), but it must not reuse the worker hash. FNV-1a's low bit is the parity of the bytes' low
//! bits (multiplying by an odd prime keeps it), so `fnv1a64(name) % 2` and `fnv1a64(prefix + name) % 2` differ by
//! a constant: with two instances and two workers, each instance would put all its channels on one worker. So
//! [`instance_hash`] is FNV-1a over `instance:` followed by the name, then the MurmurHash3 64-bit finaliser
//! (`fmix64`), which makes every output bit depend on every input bit; the owner is that value modulo the count.

/// 64-bit FNV-1a of `bytes` (Fowler, Noll and Vo; offset basis and prime from the reference description).
pub fn fnv1a64(bytes: &[u8]) -> u64 {
    const OFFSET: u64 = 0xcbf2_9ce4_8422_2325;
    const PRIME: u64 = 0x0000_0100_0000_01b3;
    bytes
        .iter()
        .fold(OFFSET, |h, b| (h ^ u64::from(*b)).wrapping_mul(PRIME))
}

/// The worker (0..workers) that owns `channel`; 0 when there is at most one worker.
pub fn shard_of(channel: &str, workers: usize) -> usize {
    if workers <= 1 {
        return 0;
    }
    (fnv1a64(channel.as_bytes()) % workers as u64) as usize
}

/// What the instance hash is taken over: this, then the channel name. Changing it moves channels between
/// instances, so it is part of the format, like the hash itself.
pub const INSTANCE_SALT: &[u8] = b"instance:";

/// The MurmurHash3 64-bit finaliser (Appleby): a bijection that spreads each input bit over the whole word.
fn fmix64(mut h: u64) -> u64 {
    h ^= h >> 33;
    h = h.wrapping_mul(0xff51_afd7_ed55_8ccd);
    h ^= h >> 33;
    h = h.wrapping_mul(0xc4ce_b9fe_1a85_ec53);
    h ^ (h >> 33)
}

/// The stable hash that decides which instance owns `channel`: `fmix64(FNV-1a-64("instance:" + name))`.
pub fn instance_hash(channel: &str) -> u64 {
    const PRIME: u64 = 0x0000_0100_0000_01b3;
    let h = INSTANCE_SALT
        .iter()
        .chain(channel.as_bytes())
        .fold(0xcbf2_9ce4_8422_2325_u64, |h, b| {
            (h ^ u64::from(*b)).wrapping_mul(PRIME)
        });
    fmix64(h)
}

/// This daemon's share of the channels: it handles those whose [`instance_hash`] modulo `count` is `index`.
/// `index < count` and `count >= 1` hold for every value the configuration produces.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Instance {
    pub index: u64,
    pub count: u64,
}

impl Instance {
    /// The only instance: every channel.
    pub const ALL: Instance = Instance { index: 0, count: 1 };

    /// Whether this instance handles `channel`. One instance owns everything without hashing.
    pub fn owns(&self, channel: &str) -> bool {
        self.count <= 1 || instance_hash(channel) % self.count == self.index
    }
}

impl Default for Instance {
    fn default() -> Self {
        Instance::ALL
    }
}

/// The instance (0..count) that owns `channel` among `count` instances; 0 when `count` is at most 1.
pub fn instance_of(channel: &str, count: u64) -> u64 {
    if count <= 1 {
        return 0;
    }
    instance_hash(channel) % count
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fnv1a_matches_published_vectors() {
        // Test vectors of the FNV reference description (64-bit FNV-1a).
        assert_eq!(fnv1a64(b""), 0xcbf2_9ce4_8422_2325);
        assert_eq!(fnv1a64(b"a"), 0xaf63_dc4c_8601_ec8c);
        assert_eq!(fnv1a64(b"foobar"), 0x8594_4171_f739_67e8);
    }

    #[test]
    fn shards_are_stable_and_in_range() {
        // Pinned values: a change here reshuffles channels between workers, which must be deliberate.
        assert_eq!(shard_of("TT-101", 2), (fnv1a64(b"TT-101") % 2) as usize);
        assert_eq!(shard_of("anything", 1), 0);
        assert_eq!(shard_of("anything", 0), 0);
        for w in 1..9 {
            for i in 0..200 {
                let name = format!("TT-{i}");
                let s = shard_of(&name, w);
                assert!(s < w);
                assert_eq!(s, shard_of(&name, w));
            }
        }
    }

    #[test]
    fn tag_names_spread_over_workers() {
        for workers in [2usize, 3, 4] {
            let mut counts = vec![0usize; workers];
            for area in ["TT", "FT", "LT", "PT"] {
                for n in 100..350 {
                    counts[shard_of(&format!("{area}-{n}"), workers)] += 1;
                }
            }
            let expected = 1000.0 / workers as f64;
            for c in &counts {
                assert!((*c as f64 - expected).abs() < 0.15 * expected, "{counts:?}");
            }
        }
    }

    #[test]
    fn instance_partition_is_pinned() {
        // Pinned values: a change here moves channels between running instances, which must be deliberate (and
        // would need every instance upgraded at once). fmix64 of 0 is 0, a published property of the finaliser.
        assert_eq!(fmix64(0), 0);
        assert_eq!(instance_hash("TT-101"), PINNED[0]);
        assert_eq!(instance_hash("FT-201"), PINNED[1]);
        assert_eq!(instance_hash("LT-301"), PINNED[2]);
        assert_eq!(instance_hash(""), PINNED[3]);
        let owners: Vec<u64> = ["TT-101", "FT-201", "LT-301"]
            .iter()
            .map(|n| instance_of(n, 2))
            .collect();
        assert_eq!(owners, PINNED_OF_2);
        assert_eq!(instance_of("anything", 1), 0);
        assert_eq!(instance_of("anything", 0), 0);
        assert!(Instance::ALL.owns("anything"));
        for count in 1..6u64 {
            for i in 0..100 {
                let name = format!("TT-{i}");
                let owner = instance_of(&name, count);
                assert!(owner < count);
                let owning: Vec<u64> = (0..count)
                    .filter(|&index| Instance { index, count }.owns(&name))
                    .collect();
                assert_eq!(owning, vec![owner], "{name} of {count}");
            }
        }
    }

    /// `instance_hash` of TT-101, FT-201, LT-301 and the empty name, computed independently (a few lines of
    /// Python over the same definition), and the owners of the three tags among two instances.
    const PINNED: [u64; 4] = [
        0x7542_9b8e_a4ae_4a50,
        0x5acc_a8d5_e576_845b,
        0xbf92_3158_1a3f_4d52,
        0x6a31_bfe7_49c4_37a3,
    ];
    const PINNED_OF_2: [u64; 3] = [0, 1, 0];

    #[test]
    fn instances_are_balanced_over_many_names() {
        for count in [2u64, 3, 5] {
            let mut counts = vec![0usize; count as usize];
            for n in 0..10_000 {
                let area = ["TT", "FT", "LT", "PT"][n % 4];
                counts[instance_of(&format!("{area}-{}", n / 4 + 100), count) as usize] += 1;
            }
            // A fair split gives a binomial spread of about 50 names here; 5% of the expected share is over 7 sd.
            let expected = 10_000.0 / count as f64;
            for c in &counts {
                assert!(
                    (*c as f64 - expected).abs() < 0.05 * expected,
                    "{count}: {counts:?}"
                );
            }
        }
    }

    #[test]
    fn instance_and_worker_choices_are_independent() {
        // The reason for the finaliser: with plain FNV-1a, the instance parity would fix the worker parity.
        let names: Vec<String> = (0..4000).map(|n| format!("TT-{n}")).collect();
        let salted_parity = |name: &str| fnv1a64(&[INSTANCE_SALT, name.as_bytes()].concat()) % 2;
        let flips: std::collections::BTreeSet<u64> = names
            .iter()
            .map(|n| salted_parity(n) ^ (fnv1a64(n.as_bytes()) % 2))
            .collect();
        assert_eq!(
            flips.len(),
            1,
            "plain FNV-1a parities are tied to each other"
        );
        // With it, each instance of 2 spreads its channels over 2 (and 3) workers.
        for workers in [2usize, 3] {
            let mut table = vec![vec![0usize; workers]; 2];
            for n in &names {
                table[instance_of(n, 2) as usize][shard_of(n, workers)] += 1;
            }
            let expected = names.len() as f64 / (2 * workers) as f64;
            for row in &table {
                for c in row {
                    assert!((*c as f64 - expected).abs() < 0.15 * expected, "{table:?}");
                }
            }
        }
    }
}
