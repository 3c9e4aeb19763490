//! A simulated plant for demos and benchmarks: the fictional Brackenfield Works, a handful of tags whose signals
//! come from the same model families gaugewise fits, plus the faults a real gateway shows (dropouts). Sensor faults
//! (spike bursts, a stuck transmitter) are opt-in ([`Plant::with_faults`]), so the demo can show flags while
//! other users keep a healthy plant; [`BRACKENFIELD_FAULTS`] is the demo's schedule.
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

/// A sensor fault injected into one tag, repeating every `every` seconds from `first` seconds after the start.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Fault {
    pub tag: &'static str,
    pub kind: FaultKind,
    /// Seconds after the plant's start of the first occurrence.
    pub first: f64,
    /// Seconds between occurrences; 0 (or anything not finite and positive) for once only.
    pub every: f64,
}

#[derive(Debug, Clone, Copy, PartialEq)]
pub enum FaultKind {
    /// `count` single spikes of `size` to `1.25 size` (engineering units, random sign), `spacing` seconds apart:
    /// a loose connection or interference. Apart, so the filter sees spikes rather than a level shift.
    Spikes { size: f64, count: u32, spacing: f64 },
    /// The transmitter repeats the last value it sent before the fault, for `duration` seconds.
    Stuck { duration: f64 },
}

impl Fault {
    /// Seconds into the current occurrence at `elapsed` seconds after the start; None before the first.
    fn phase(&self, elapsed: f64) -> Option<f64> {
        let since = elapsed - self.first;
        // NaN (a non-finite time) is "before" too.
        if since.is_nan() || since < 0.0 {
            return None;
        }
        Some(if self.every.is_finite() && self.every > 0.0 {
            since.rem_euclid(self.every)
        } else {
            since
        })
    }

    /// For a legend: `3 spikes of 4 degC at 0:04, every 120 s`.
    pub fn describe(&self, unit: &str) -> String {
        let what = match self.kind {
            FaultKind::Spikes {
                size,
                count,
                spacing,
            } => format!("{count} spikes of {size} {unit}, {spacing} s apart,"),
            FaultKind::Stuck { duration } => format!("stuck for {duration} s"),
        };
        let when = format!(
            "{}:{:02}",
            (self.first / 60.0).floor(),
            self.first.rem_euclid(60.0).floor()
        );
        if self.every.is_finite() && self.every > 0.0 {
            format!("{what} at {when}, every {} s", self.every)
        } else {
            format!("{what} at {when}")
        }
    }
}

/// The demo's faults, timed so a newcomer sees flags within the first minute: spikes on the vessel temperature
/// from 4 s (flag `spike`, held for its 60 s off-delay), the feed flow transmitter stuck from 15 s to 40 s (flag
/// `stuck` once 30 samples have repeated, about 15 s later); both every two minutes. The demo adds the tank
/// transmitter's silence (flag `stale`) itself, since that is a gateway matter rather than a sensor value.
pub const BRACKENFIELD_FAULTS: [Fault; 2] = [
    Fault {
        tag: "TT-101",
        kind: FaultKind::Spikes {
            size: 4.0,
            count: 3,
            spacing: 3.0,
        },
        first: 4.0,
        every: 120.0,
    },
    Fault {
        tag: "FT-201",
        kind: FaultKind::Stuck { duration: 25.0 },
        first: 15.0,
        every: 120.0,
    },
];

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
    /// Spike signs and sizes: a stream of its own, so faults never shift the healthy signals' noise.
    fault_noise: Noise,
    start: f64,
    /// Injected faults, by tag index.
    faults: Vec<(usize, Fault)>,
    /// Per tag, the last value sent while not stuck: what a stuck transmitter repeats.
    held: Vec<Option<f64>>,
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
        let held = vec![None; tags.len()];
        Plant {
            tags,
            next_due,
            noise: Noise::new(seed),
            fault_noise: Noise::new(seed ^ 0x5EED_FA17),
            start,
            faults: Vec::new(),
            held,
        }
    }

    /// The same plant with `faults` injected; faults naming a tag the plant does not have are ignored. Without
    /// faults (or before the first) the signals are exactly those of the plant without them.
    pub fn with_faults(mut self, faults: &[Fault]) -> Self {
        for f in faults {
            if let Some(i) = self.tags.iter().position(|t| t.name == f.tag) {
                self.faults.push((i, *f));
            }
        }
        self
    }

    /// The injected faults.
    pub fn faults(&self) -> impl Iterator<Item = &Fault> {
        self.faults.iter().map(|(_, f)| f)
    }

    /// `value` of tag `i` at `time` as its faulty transmitter reports it.
    fn inject(&mut self, i: usize, time: f64, value: f64) -> f64 {
        let elapsed = time - self.start;
        let interval = self.tags[i].interval;
        let mut out = value;
        let mut stuck = false;
        for (tag, fault) in &self.faults {
            if *tag != i {
                continue;
            }
            let Some(phase) = fault.phase(elapsed) else {
                continue;
            };
            match fault.kind {
                FaultKind::Spikes {
                    size,
                    count,
                    spacing,
                } => {
                    // The sample nearest to each spike time carries it.
                    let j = if spacing > 0.0 {
                        (phase / spacing).round()
                    } else {
                        0.0
                    };
                    let at = j * spacing.max(0.0);
                    if j < f64::from(count) && (phase - at).abs() < interval / 2.0 {
                        let sign = if self.fault_noise.uniform() < 0.5 {
                            -1.0
                        } else {
                            1.0
                        };
                        out += sign * size * (1.0 + 0.25 * self.fault_noise.uniform());
                    }
                }
                FaultKind::Stuck { duration } => stuck |= phase < duration,
            }
        }
        if stuck {
            if let Some(v) = self.held[i] {
                return v;
            }
        }
        self.held[i] = Some(out);
        out
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
            let (dropout, interval) = (tag.dropout, tag.interval);
            let value = if self.faults.is_empty() {
                value
            } else {
                self.inject(i, due, value)
            };
            let dropped = self.noise.uniform() < dropout;
            out.push((
                i,
                Reading {
                    time: due,
                    value: (!dropped).then_some(value),
                },
            ));
            self.next_due[i] = due + interval;
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
    fn faults_are_where_the_schedule_puts_them_and_nowhere_else() {
        let mut healthy = Plant::brackenfield(1000.0, 7);
        let mut faulty = Plant::brackenfield(1000.0, 7).with_faults(&BRACKENFIELD_FAULTS);
        let (mut h, mut f) = (Vec::new(), Vec::new());
        healthy.advance(1000.0 + 130.0, &mut h);
        faulty.advance(1000.0 + 130.0, &mut f);
        assert_eq!(h.len(), f.len());
        let value = |(_, r): &(usize, Reading)| r.value.unwrap_or(f64::NAN);
        // Where no fault acts the two plants are identical, dropouts included.
        let first = h.iter().position(|(_, r)| r.time >= 1004.0).unwrap();
        assert_eq!(h[..first], f[..first]);
        let lt = |p: &[(usize, Reading)]| -> Vec<Reading> {
            p.iter().filter(|(i, _)| *i == 2).map(|(_, r)| *r).collect()
        };
        assert_eq!(lt(&h), lt(&f));
        // TT-101 (tag 0): three spikes of 4 to 5 degC at 4, 7 and 10 s, then again at 124 s.
        let tt_jumps: Vec<f64> = h
            .iter()
            .zip(&f)
            .filter(|((i, _), _)| *i == 0)
            .filter(|(a, b)| (value(a) - value(b)).abs() > 1e-9)
            .map(|((_, r), _)| r.time - 1000.0)
            .collect();
        // A spike on a dropped sample is not seen, so at most, not exactly, these.
        assert!(!tt_jumps.is_empty());
        for t in &tt_jumps {
            assert!(
                [4.0, 7.0, 10.0, 124.0, 127.0, 130.0].contains(t),
                "{tt_jumps:?}"
            );
        }
        // FT-201 (tag 1): one value repeated from 15 s to 40 s.
        let stuck: Vec<f64> = f
            .iter()
            .filter(|(i, r)| *i == 1 && (1015.0..1040.0).contains(&r.time))
            .filter_map(|(_, r)| r.value)
            .collect();
        assert!(stuck.len() > 40, "{}", stuck.len());
        assert!(stuck.iter().all(|v| *v == stuck[0]), "{stuck:?}");
        let after: Vec<f64> = f
            .iter()
            .filter(|(i, r)| *i == 1 && (1040.0..1050.0).contains(&r.time))
            .filter_map(|(_, r)| r.value)
            .collect();
        assert!(after.iter().any(|v| *v != stuck[0]));
        assert_eq!(
            BRACKENFIELD_FAULTS[0].describe("degC"),
            "3 spikes of 4 degC, 3 s apart, at 0:04, every 120 s"
        );
    }

    #[test]
    fn configured_models_are_valid() {
        for tag in Plant::brackenfield(0.0, 1).tags {
            tag.model.validate().unwrap();
        }
    }
}
