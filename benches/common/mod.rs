//! Deterministic test signals for the benches: a tiny seeded generator (xorshift64* with Box-Muller normals), so
//! every run measures the same data without adding a dependency.

/// xorshift64* (Vigna 2016): fast, seedable, good enough for simulated sensor noise.
pub struct Rng {
    state: u64,
    spare: Option<f64>,
}

impl Rng {
    pub fn new(seed: u64) -> Self {
        // A zero state would stay zero; mix the seed so small seeds give unrelated streams.
        let state = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1;
        Self { state, spare: None }
    }

    pub fn next_u64(&mut self) -> u64 {
        let mut x = self.state;
        x ^= x >> 12;
        x ^= x << 25;
        x ^= x >> 27;
        self.state = x;
        x.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }

    /// Uniform on (0, 1): 53 random bits, never exactly 0.
    pub fn uniform(&mut self) -> f64 {
        ((self.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }

    /// Standard normal by Box-Muller, using both values of each pair.
    pub fn normal(&mut self) -> f64 {
        if let Some(z) = self.spare.take() {
            return z;
        }
        let r = (-2.0 * self.uniform().ln()).sqrt();
        let theta = 2.0 * std::f64::consts::PI * self.uniform();
        self.spare = Some(r * theta.sin());
        r * theta.cos()
    }
}

/// Parameters of the simulated process temperature: a `lag` (AR(1) around a mean plus measurement noise).
pub const MEAN: f64 = 72.0;
pub const PHI: f64 = 0.95;
pub const STATE_VAR: f64 = 0.1;
pub const OBS_VAR: f64 = 0.05;
/// Nominal sample interval in seconds.
pub const INTERVAL: f64 = 10.0;

/// `n` samples of the lag process at times 0, INTERVAL, 2 INTERVAL, ...; a fraction `missing` of the values
/// (chosen at random) is NaN.
pub fn lag_signal(n: usize, missing: f64, seed: u64) -> (Vec<f64>, Vec<f64>) {
    let mut rng = Rng::new(seed);
    let mut x = rng.normal() * (STATE_VAR / (1.0 - PHI * PHI)).sqrt();
    let mut times = Vec::with_capacity(n);
    let mut values = Vec::with_capacity(n);
    for i in 0..n {
        times.push(i as f64 * INTERVAL);
        let y = MEAN + x + rng.normal() * OBS_VAR.sqrt();
        values.push(if rng.uniform() < missing { f64::NAN } else { y });
        x = PHI * x + rng.normal() * STATE_VAR.sqrt();
    }
    (times, values)
}
