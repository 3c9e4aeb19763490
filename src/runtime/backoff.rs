//! Reconnect delays: exponential growth with jitter between a floor and a ceiling, reset by a successful connect.
//!
//! rumqttc reconnects on the very next `poll` after a connection error, with no pause at all, so a broker that is
//! down would be hammered in a tight loop. The daemon sleeps [`Backoff::next_delay`] after each error instead. The
//! jitter spreads the reconnects of many gateways that lost the same broker at the same moment. The random source is
//! a small seeded generator, so tests can pin it; nothing here reads a clock.

use std::time::Duration;

/// Exponential backoff with "equal jitter": the n-th delay after a reset is drawn uniformly from
/// `[c/2, c]` where `c = min(max, min * 2^n)`, and never below `min`. So the first delay is in `[min, min]`
/// when `min` is the ceiling too, grows about twofold per failure, and stays within `[min, max]`.
#[derive(Debug, Clone)]
pub struct Backoff {
    min: f64,
    max: f64,
    failures: u32,
    rng: SplitMix64,
}

impl Backoff {
    /// `min_s` and `max_s` in seconds; a `max_s` below `min_s` is raised to it, a non-finite or negative value is
    /// read as 0 (config validation refuses such values; this only keeps the arithmetic sane).
    pub fn new(min_s: f64, max_s: f64, seed: u64) -> Self {
        let clean = |x: f64| if x.is_finite() && x > 0.0 { x } else { 0.0 };
        let min = clean(min_s);
        let max = clean(max_s).max(min);
        Self {
            min,
            max,
            failures: 0,
            rng: SplitMix64(seed),
        }
    }

    /// The pause before the next reconnect attempt; each call counts one more failure.
    pub fn next_delay(&mut self) -> Duration {
        let ceiling = (self.min * 2f64.powi(self.failures.min(60) as i32)).min(self.max);
        self.failures = self.failures.saturating_add(1);
        let low = (ceiling / 2.0).max(self.min);
        let delay = low + (ceiling - low) * self.rng.unit();
        Duration::from_secs_f64(delay.clamp(self.min, self.max))
    }

    /// After a successful connect (ConnAck): the next failure starts again from the floor.
    pub fn reset(&mut self) {
        self.failures = 0;
    }

    /// Failures since the last reset.
    pub fn failures(&self) -> u32 {
        self.failures
    }
}

/// SplitMix64 (Steele, Lea and Flood 2014): tiny, fast, good enough to decorrelate reconnect times. Not for
/// anything that needs unpredictability.
#[derive(Debug, Clone)]
struct SplitMix64(u64);

impl SplitMix64 {
    fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in [0, 1).
    fn unit(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// A seed that differs between processes and runs (pid and the time), so gateways restarted together do not
/// draw the same delays. The runtime calls it once; tests pass fixed seeds to `Backoff::new` instead.
pub fn process_seed() -> u64 {
    let nanos = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_nanos() as u64);
    nanos ^ (u64::from(std::process::id()) << 32)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn secs(d: Duration) -> f64 {
        d.as_secs_f64()
    }

    #[test]
    fn delays_stay_within_bounds() {
        for seed in 0..50 {
            let mut b = Backoff::new(0.5, 30.0, seed);
            for _ in 0..100 {
                let d = secs(b.next_delay());
                assert!((0.5..=30.0).contains(&d), "seed {seed}: {d}");
            }
        }
    }

    #[test]
    fn delays_grow_until_the_ceiling() {
        let mut b = Backoff::new(1.0, 64.0, 7);
        // The n-th delay lies in [max(c/2, min), c] with c = min(64, 2^n).
        for n in 0..12 {
            let c = 2f64.powi(n).min(64.0);
            let d = secs(b.next_delay());
            assert!(
                d >= (c / 2.0).max(1.0) - 1e-9 && d <= c + 1e-9,
                "n={n}: {d} not in [{}, {c}]",
                c / 2.0
            );
        }
        // At the ceiling, delays stay in its upper half.
        for _ in 0..100 {
            let d = secs(b.next_delay());
            assert!((32.0..=64.0).contains(&d), "{d}");
        }
    }

    #[test]
    fn jitter_covers_its_range() {
        // Many draws at the ceiling spread over [max/2, max], not a single value.
        let mut b = Backoff::new(1.0, 8.0, 42);
        for _ in 0..4 {
            b.next_delay();
        }
        let draws: Vec<f64> = (0..2000).map(|_| secs(b.next_delay())).collect();
        let lo = draws.iter().cloned().fold(f64::INFINITY, f64::min);
        let hi = draws.iter().cloned().fold(0.0, f64::max);
        assert!((4.0..4.1).contains(&lo), "{lo}");
        assert!(hi <= 8.0 && hi > 7.9, "{hi}");
        let mean = draws.iter().sum::<f64>() / draws.len() as f64;
        assert!((mean - 6.0).abs() < 0.1, "uniform mean {mean}");
    }

    #[test]
    fn different_seeds_differ_and_same_seed_repeats() {
        let run = |seed| {
            let mut b = Backoff::new(1.0, 60.0, seed);
            (0..8).map(|_| b.next_delay()).collect::<Vec<_>>()
        };
        assert_eq!(run(3), run(3));
        assert_ne!(run(3), run(4));
    }

    #[test]
    fn reset_returns_to_the_floor() {
        let mut b = Backoff::new(0.25, 10.0, 1);
        for _ in 0..10 {
            b.next_delay();
        }
        assert_eq!(b.failures(), 10);
        b.reset();
        assert_eq!(b.failures(), 0);
        assert_eq!(secs(b.next_delay()), 0.25);
        assert!(secs(b.next_delay()) <= 0.5);
    }

    #[test]
    fn odd_settings_do_not_break_it() {
        let mut b = Backoff::new(5.0, 1.0, 0);
        assert_eq!(secs(b.next_delay()), 5.0);
        let mut b = Backoff::new(f64::NAN, -1.0, 0);
        assert_eq!(secs(b.next_delay()), 0.0);
        let mut b = Backoff::new(1.0, 1e6, 0);
        for _ in 0..200 {
            assert!(secs(b.next_delay()) <= 1e6);
        }
    }
}
