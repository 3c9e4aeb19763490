//! A simulated plant for demos and benchmarks: the fictional Brackenfield Works, a handful of tags whose signals
//! come from the same model families gaugewise fits, plus the faults a real gateway shows (dropouts).
//!
//! Pure and deterministic: a seed gives the same signals on every machine, and time is an argument. The demo
//! publishes these samples over MQTT; nothing here knows about MQTT. The numbers are invented for illustration.

use crate::model::{ModelParams, ModelSpec};

/// One simulated transmitter.
#[derive(Debug, Clone)]
pub struct Tag {
    pub name: &'static str,
    /// What the tag measures, for the demo's table.
    pub description: &'static str,
    pub unit: &'static str,
    /// Seconds between samples.
    pub interval: f64,
    /// Model configured for the tag in the demo (what `fit` would find on its history).
    pub model: ModelSpec,
    process: Process,
    /// Probability that a sample is dropped (the gateway sends null).
    dropout: f64,
}

#[derive(Debug, Clone)]
enum Process {
    /// First-order lag around a mean (heat loss): x' = -(x - mean)/tau + noise.
    Lag {
        mean: f64,
        tau: f64,
        sd: f64,
        noise: f64,
        x: f64,
    },
    /// ARMA(1,1) around a mean, one step per interval.
    Arma11 {
        mean: f64,
        ar: f64,
        ma: f64,
        sd: f64,
        u: f64,
        e: f64,
    },
    /// Level with a slowly wandering fill rate.
    Drift {
        level: f64,
        slope: f64,
        slope_sd: f64,
        noise: f64,
    },
}

/// A sample as a gateway would send it: `None` is a dropout.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Reading {
    pub time: f64,
    pub value: Option<f64>,
}

/// xorshift64* with Box-Muller: small, seedable, good enough for demo and test noise, and no dependency.
#[derive(Debug, Clone)]
pub struct Noise(u64);

impl Noise {
    pub fn new(seed: u64) -> Self {
        Noise(seed.max(1))
    }
    /// Uniform on (0, 1).
    pub fn uniform(&mut self) -> f64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        ((self.0.wrapping_mul(0x2545_F491_4F6C_DD1D) >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    /// Standard normal.
    pub fn normal(&mut self) -> f64 {
        let (u, v) = (self.uniform(), self.uniform());
        (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
    }
}

/// The demo plant: a set of tags advancing together in simulated time.
#[derive(Debug, Clone)]
pub struct Plant {
    pub tags: Vec<Tag>,
    next_due: Vec<f64>,
    noise: Noise,
}

impl Plant {
    /// Brackenfield Works: a reactor vessel temperature, a feed flow and a storage tank level.
    pub fn brackenfield(start: f64, seed: u64) -> Self {
        let tags = vec![
            Tag {
                name: "TT-101",
                description: "reactor vessel temperature",
                unit: "degC",
                interval: 1.0,
                model: ModelSpec {
                    interval: 1.0,
                    params: ModelParams::Lag {
                        mean: 72.5,
                        tau: 120.0,
                        // Stationary sd 1.5 degC: per-interval variance 1.5^2 (1 - phi^2), phi = e^(-1/120).
                        state_var: 2.25 * (1.0 - (-2.0f64 / 120.0).exp()),
                        obs_var: 0.04,
                    },
                },
                process: Process::Lag {
                    mean: 72.5,
                    tau: 120.0,
                    sd: 1.5,
                    noise: 0.2,
                    x: 72.5,
                },
                dropout: 0.02,
            },
            Tag {
                name: "FT-201",
                description: "feed flow",
                unit: "m3/h",
                interval: 0.5,
                // The simulated ARMA(1,1) (ar 0.8, ma -0.3, shock variance 0.25) is exactly an AR(1) state seen
                // through noise (REFERENCES.md: gamma1 = -phi r, gamma0 = q + (1 + phi^2) r), so the configured
                // model is the equivalent lag: r = 0.3 * 0.25 / 0.8, q = 1.09 * 0.25 - 1.64 r, tau = -0.5 / ln 0.8.
                model: ModelSpec {
                    interval: 0.5,
                    params: ModelParams::Lag {
                        mean: 12.0,
                        tau: -0.5 / 0.8f64.ln(),
                        state_var: 0.11875,
                        obs_var: 0.09375,
                    },
                },
                process: Process::Arma11 {
                    mean: 12.0,
                    ar: 0.8,
                    ma: -0.3,
                    sd: 0.5,
                    u: 0.0,
                    e: 0.0,
                },
                dropout: 0.01,
            },
            Tag {
                name: "LT-301",
                description: "storage tank level",
                unit: "m",
                interval: 2.0,
                model: ModelSpec {
                    interval: 2.0,
                    params: ModelParams::Trend {
                        obs_var: 0.0004,
                        level_var: 1e-6,
                        // The simulated fill rate wanders 3e-5 m/s per sample: 6e-5 m per 2 s interval.
                        slope_var: 3.6e-9,
                    },
                },
                process: Process::Drift {
                    level: 3.2,
                    slope: 0.001,
                    slope_sd: 3e-5,
                    noise: 0.02,
                },
                dropout: 0.03,
            },
        ];
        let next_due = vec![start; tags.len()];
        Plant {
            tags,
            next_due,
            noise: Noise::new(seed),
        }
    }

    /// Every sample due up to and including `now`, in time order, as (tag index, reading).
    pub fn advance(&mut self, now: f64, out: &mut Vec<(usize, Reading)>) {
        out.clear();
        while let Some((i, due)) = self
            .next_due
            .iter()
            .copied()
            .enumerate()
            .filter(|(_, d)| *d <= now)
            .min_by(|a, b| a.1.total_cmp(&b.1))
        {
            let tag = &mut self.tags[i];
            let value = step(&mut tag.process, tag.interval, &mut self.noise);
            let dropped = self.noise.uniform() < tag.dropout;
            out.push((
                i,
                Reading {
                    time: due,
                    value: (!dropped).then_some(value),
                },
            ));
            self.next_due[i] = due + tag.interval;
        }
    }
}

fn step(p: &mut Process, dt: f64, noise: &mut Noise) -> f64 {
    match p {
        Process::Lag {
            mean,
            tau,
            sd,
            noise: obs,
            x,
        } => {
            let phi = (-dt / *tau).exp();
            *x = *mean + phi * (*x - *mean) + *sd * (1.0 - phi * phi).sqrt() * noise.normal();
            *x + *obs * noise.normal()
        }
        Process::Arma11 {
            mean,
            ar,
            ma,
            sd,
            u,
            e,
        } => {
            let shock = *sd * noise.normal();
            *u = *ar * *u + shock + *ma * *e;
            *e = shock;
            *mean + *u
        }
        Process::Drift {
            level,
            slope,
            slope_sd,
            noise: obs,
        } => {
            *slope += *slope_sd * noise.normal();
            *level += *slope * dt;
            *level + *obs * noise.normal()
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn deterministic_and_time_ordered() {
        let (mut a, mut b) = (
            Plant::brackenfield(1000.0, 7),
            Plant::brackenfield(1000.0, 7),
        );
        let (mut ra, mut rb) = (Vec::new(), Vec::new());
        a.advance(1060.0, &mut ra);
        b.advance(1060.0, &mut rb);
        assert_eq!(ra, rb);
        // 60 s: TT-101 every 1 s, FT-201 every 0.5 s, LT-301 every 2 s, both ends included.
        assert_eq!(ra.len(), 61 + 121 + 31);
        assert!(ra.windows(2).all(|w| w[0].1.time <= w[1].1.time));
        let dropped = ra.iter().filter(|(_, r)| r.value.is_none()).count();
        assert!(dropped < ra.len() / 10);
    }

    /// FT-201's configured lag is the simulated ARMA(1,1) in disguise: the ARMA(1,1) implied by the lag's
    /// (phi, q, r) is the simulated one (ar 0.8, ma -0.3, shock variance 0.25).
    #[test]
    fn flow_model_is_the_simulated_arma() {
        let plant = Plant::brackenfield(0.0, 1);
        let ModelParams::Lag {
            tau,
            state_var,
            obs_var,
            ..
        } = plant.tags[1].model.params
        else {
            panic!("FT-201 runs a lag")
        };
        let phi = (-0.5 / tau).exp();
        let (theta, var) = crate::estimate::ar1_noise_to_arma11(phi, state_var, obs_var);
        assert!((phi - 0.8).abs() < 1e-12);
        assert!((theta + 0.3).abs() < 1e-12, "{theta}");
        assert!((var - 0.25).abs() < 1e-12, "{var}");
    }

    #[test]
    fn configured_models_are_valid() {
        for tag in Plant::brackenfield(0.0, 1).tags {
            tag.model.validate().unwrap();
        }
    }
}
