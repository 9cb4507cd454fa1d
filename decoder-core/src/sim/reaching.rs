//! A synthetic reaching block, for the demo, the tests and benchmarks.
//!
//! Scenario: a participant steers a cursor from a central hold pad to one of
//! eight targets on a ring 10 cm out, holds, and returns. Reaches follow a
//! minimum-jerk profile with a random duration and a little endpoint
//! scatter. Each channel is cosine-tuned to velocity with an exponential
//! (log-linear) rate, λ = exp(b₀ + βᵀv); spikes are drawn every millisecond
//! with an absolute refractory period and then binned. Everything comes from
//! one seeded ChaCha8 stream, so a seed gives the same block on every
//! machine and release.

use crate::bin_width::BinWidth;
use std::f64::consts::PI;

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};

use crate::formats::block::{Block, Trial};
use crate::linalg::Mat;

#[derive(Clone, Debug, PartialEq)]
pub struct SimOptions {
    /// Seed of the block: movements and spikes.
    pub seed: u64,
    /// Seed of the simulated array: each channel's tuning. Blocks with the
    /// same population seed come from the same channels, as a calibration
    /// block and a later block of one session do.
    pub population_seed: u64,
    pub minutes: f64,
    pub n_channels: usize,
    /// Whole milliseconds (spikes are drawn on a 1 ms grid).
    pub bin_width: BinWidth,
    /// Ring radius in cm.
    pub target_radius: f64,
    /// Absolute refractory period in ms.
    pub refractory_ms: usize,
    /// Relative refractoriness: after the absolute period the rate recovers
    /// as 1 − exp(−t/recovery_ms). 0 turns it off (the default).
    pub recovery_ms: f64,
}

impl Default for SimOptions {
    fn default() -> Self {
        SimOptions {
            seed: 1,
            population_seed: 1,
            minutes: 10.0,
            n_channels: 96,
            bin_width: BinWidth::from_us(20_000).expect("20 ms"),
            target_radius: 10.0,
            refractory_ms: 2,
            recovery_ms: 0.0,
        }
    }
}

/// The encoding model the simulator drew, kept for tests that need ground
/// truth (preferred directions, modulation).
#[derive(Clone, Debug, PartialEq)]
pub struct SimChannels {
    /// ln of the baseline rate in spikes per second.
    pub log_baseline: Vec<f64>,
    /// Per channel (βx, βy) in ln(rate) per cm/s.
    pub beta: Vec<[f64; 2]>,
}

#[derive(Debug, thiserror::Error)]
pub enum SimError {
    #[error("{key} is {value}; {expected}")]
    Option {
        key: &'static str,
        value: String,
        expected: &'static str,
    },
}

/// Minimum-jerk position fraction and its time derivative at s ∈ [0, 1].
fn min_jerk(s: f64) -> (f64, f64) {
    let s2 = s * s;
    let s3 = s2 * s;
    (
        10.0 * s3 - 15.0 * s3 * s + 6.0 * s3 * s2,
        30.0 * s2 - 60.0 * s3 + 30.0 * s2 * s2,
    )
}

struct Movement {
    /// Position and velocity (cm, cm/s) every ms.
    pos: Vec<[f64; 2]>,
    vel: Vec<[f64; 2]>,
    /// (start ms, end ms, target) of each outward reach and its hold.
    trials: Vec<(usize, usize, [f64; 2])>,
}

fn draw_movement(rng: &mut ChaCha8Rng, total_ms: usize, radius: f64) -> Movement {
    let mut pos = Vec::with_capacity(total_ms);
    let mut vel = Vec::with_capacity(total_ms);
    let mut trials = Vec::new();
    let mut here = [0.0f64, 0.0];
    let scatter = Normal::new(0.0, 0.4).expect("valid sd");
    let hold = |pos: &mut Vec<[f64; 2]>, vel: &mut Vec<[f64; 2]>, at: [f64; 2], ms: usize| {
        for _ in 0..ms {
            pos.push(at);
            vel.push([0.0, 0.0]);
        }
    };
    let reach = |pos: &mut Vec<[f64; 2]>,
                 vel: &mut Vec<[f64; 2]>,
                 from: [f64; 2],
                 to: [f64; 2],
                 ms: usize| {
        let secs = ms as f64 / 1000.0;
        for k in 0..ms {
            let (f, df) = min_jerk((k as f64 + 0.5) / ms as f64);
            pos.push([
                from[0] + (to[0] - from[0]) * f,
                from[1] + (to[1] - from[1]) * f,
            ]);
            vel.push([(to[0] - from[0]) * df / secs, (to[1] - from[1]) * df / secs]);
        }
    };
    while pos.len() < total_ms {
        hold(&mut pos, &mut vel, here, rng.random_range(300..600));
        let direction = rng.random_range(0..8) as f64 * PI / 4.0;
        let target = [radius * direction.cos(), radius * direction.sin()];
        let endpoint = [
            target[0] + scatter.sample(rng),
            target[1] + scatter.sample(rng),
        ];
        let start = pos.len();
        reach(
            &mut pos,
            &mut vel,
            here,
            endpoint,
            rng.random_range(500..900),
        );
        hold(&mut pos, &mut vel, endpoint, rng.random_range(300..500));
        trials.push((start, pos.len(), target));
        let home = [scatter.sample(rng) * 0.5, scatter.sample(rng) * 0.5];
        reach(
            &mut pos,
            &mut vel,
            endpoint,
            home,
            rng.random_range(500..900),
        );
        here = home;
    }
    pos.truncate(total_ms);
    vel.truncate(total_ms);
    trials.retain(|t| t.1 <= total_ms);
    Movement { pos, vel, trials }
}

/// The simulated array of `population_seed`: the same channels every block
/// with that seed is drawn from (and the closed-loop user fires from).
pub fn population(population_seed: u64, n_channels: usize) -> SimChannels {
    draw_channels(&mut ChaCha8Rng::seed_from_u64(population_seed), n_channels)
}

fn draw_channels(rng: &mut ChaCha8Rng, n: usize) -> SimChannels {
    let peak_speed = 25.0; // cm/s, typical of these reaches
    let mut log_baseline = Vec::with_capacity(n);
    let mut beta = Vec::with_capacity(n);
    for _ in 0..n {
        let baseline_hz: f64 = rng.random_range(4.0..30.0);
        let depth: f64 = rng.random_range(0.4..1.4); // ln-rate change at peak speed
        let preferred: f64 = rng.random_range(0.0..2.0 * PI);
        log_baseline.push(baseline_hz.ln());
        beta.push([
            depth / peak_speed * preferred.cos(),
            depth / peak_speed * preferred.sin(),
        ]);
    }
    SimChannels { log_baseline, beta }
}

/// Draws a block. Returns the session (with kinematics pos_x, pos_y, vel_x,
/// vel_y as bin means, and the outward reaches as trials) and the channels'
/// true tuning.
pub fn simulate(options: &SimOptions) -> Result<(Block, SimChannels), SimError> {
    if !(options.minutes.is_finite() && options.minutes > 0.0 && options.minutes <= 24.0 * 60.0) {
        return Err(SimError::Option {
            key: "minutes",
            value: options.minutes.to_string(),
            expected: "between 0 and 1440",
        });
    }
    if options.n_channels == 0 || options.n_channels > 16384 {
        return Err(SimError::Option {
            key: "channels",
            value: options.n_channels.to_string(),
            expected: "1 to 16384",
        });
    }
    let bin_ms_int = match options.bin_width.whole_ms() {
        Some(ms) if (1..=1000).contains(&ms) => ms as usize,
        _ => {
            return Err(SimError::Option {
                key: "bin_ms",
                value: options.bin_width.ms().to_string(),
                expected: "a whole number of ms from 1 to 1000",
            });
        }
    };
    let channels = draw_channels(
        &mut ChaCha8Rng::seed_from_u64(options.population_seed),
        options.n_channels,
    );
    let mut rng = ChaCha8Rng::seed_from_u64(options.seed);
    let n_bins = ((options.minutes * 60_000.0) as usize) / bin_ms_int;
    let total_ms = n_bins * bin_ms_int;
    let movement = draw_movement(&mut rng, total_ms, options.target_radius);
    let n = options.n_channels;

    let mut counts = vec![0u16; n_bins * n];
    if !(options.recovery_ms.is_finite() && options.recovery_ms >= 0.0) {
        return Err(SimError::Option {
            key: "recovery_ms",
            value: options.recovery_ms.to_string(),
            expected: "0 or more",
        });
    }
    let mut refractory_left = vec![0usize; n];
    // ms since each channel's last spike past its absolute refractory period.
    let mut recovered_ms = vec![f64::INFINITY; n];
    for ms in 0..total_ms {
        let v = movement.vel[ms];
        let bin = ms / bin_ms_int;
        let row = &mut counts[bin * n..(bin + 1) * n];
        for ch in 0..n {
            if refractory_left[ch] > 0 {
                refractory_left[ch] -= 1;
                continue;
            }
            recovered_ms[ch] += 1.0;
            let b = channels.beta[ch];
            let mut rate_hz = (channels.log_baseline[ch] + b[0] * v[0] + b[1] * v[1]).exp();
            if options.recovery_ms > 0.0 {
                rate_hz *= 1.0 - (-recovered_ms[ch] / options.recovery_ms).exp();
            }
            let p = (rate_hz / 1000.0).min(1.0);
            if rng.random::<f64>() < p {
                row[ch] = row[ch].saturating_add(1);
                refractory_left[ch] = options.refractory_ms;
                recovered_ms[ch] = 0.0;
            }
        }
    }

    let mut kin = Mat::zeros(n_bins, 4);
    for bin in 0..n_bins {
        let mut acc = [0.0f64; 4];
        for ms in bin * bin_ms_int..(bin + 1) * bin_ms_int {
            acc[0] += movement.pos[ms][0];
            acc[1] += movement.pos[ms][1];
            acc[2] += movement.vel[ms][0];
            acc[3] += movement.vel[ms][1];
        }
        for (c, a) in acc.iter().enumerate() {
            kin.set(bin, c, a / bin_ms_int as f64);
        }
    }
    let trials = movement
        .trials
        .iter()
        .enumerate()
        .map(|(i, &(start, end, target))| Trial {
            trial: i as u32,
            start_bin: start / bin_ms_int,
            end_bin: end.div_ceil(bin_ms_int).min(n_bins),
            target_x: target[0],
            target_y: target[1],
        })
        .filter(|t| t.start_bin < t.end_bin)
        .collect();
    let session = Block {
        bin_width: options.bin_width,
        n_bins,
        n_channels: n,
        counts,
        kinematic_names: ["pos_x", "pos_y", "vel_x", "vel_y"]
            .map(String::from)
            .to_vec(),
        kinematics: Some(kin),
        trials: Some(trials),
        channel_labels: None,
        valid: None,
        notes: Some(format!(
            "synthetic center-out block: seed {}, population {}, {} channels, {} min, positions in cm, velocities in cm/s",
            options.seed, options.population_seed, n, options.minutes
        )),
    };
    Ok((session, channels))
}
