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

use crate::sim::features::{FEATURE_NAME, FeatureMaker};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};

use crate::formats::block::{Block, Trial};
use crate::linalg::Mat;
use crate::sim::drift::{Drift, DriftOptions};

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
    /// A world that changes over the block ([`crate::sim::drift`]); `None`
    /// for a stationary array.
    pub drift: Option<DriftOptions>,
    /// Click attempts at the start of each hold in the target, and the
    /// channels whose rates change during them; `None` for a block
    /// without clicks.
    pub click: Option<ClickSim>,
    /// Write continuous features (simulated spike band power,
    /// [`crate::sim::features`]) instead of the counts they come from.
    pub features: bool,
}

/// How the simulated participant attempts a click: for `attempt_ms` from
/// the start of each hold in the target, a `share` of the channels (the
/// array's click channels, the same for every block of its population
/// seed) fire at `gain` times their rate.
#[derive(Clone, Debug, PartialEq)]
pub struct ClickSim {
    pub share: f64,
    pub gain: f64,
    pub attempt_ms: usize,
}

impl Default for ClickSim {
    fn default() -> Self {
        ClickSim {
            share: 0.25,
            gain: 2.0,
            attempt_ms: 300,
        }
    }
}

/// The array's click channels: a `share` of its `n` channels, drawn from
/// its population seed.
pub fn click_channels(population_seed: u64, n: usize, share: f64) -> Vec<bool> {
    use rand::seq::SliceRandom;
    let mut rng = ChaCha8Rng::seed_from_u64(population_seed ^ 0xC11C_C11C);
    let mut order: Vec<usize> = (0..n).collect();
    order.shuffle(&mut rng);
    let mut out = vec![false; n];
    for &c in &order[..((share * n as f64).round() as usize).min(n)] {
        out[c] = true;
    }
    out
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
            drift: None,
            click: None,
            features: false,
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
    #[error(transparent)]
    Write(#[from] crate::formats::block::BlockError),
    #[error(transparent)]
    Drift(#[from] crate::sim::drift::DriftError),
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

/// One piece of the hand's path: held still, or a minimum-jerk reach.
#[derive(Clone, Copy, Debug)]
enum Segment {
    Hold {
        at: [f64; 2],
        ms: usize,
    },
    Reach {
        from: [f64; 2],
        to: [f64; 2],
        ms: usize,
    },
}

impl Segment {
    fn ms(&self) -> usize {
        match *self {
            Segment::Hold { ms, .. } | Segment::Reach { ms, .. } => ms,
        }
    }

    /// Position and velocity (cm, cm/s) `k` ms into the segment.
    fn at(&self, k: usize) -> ([f64; 2], [f64; 2]) {
        match *self {
            Segment::Hold { at, .. } => (at, [0.0, 0.0]),
            Segment::Reach { from, to, ms } => {
                let secs = ms as f64 / 1000.0;
                let (f, df) = min_jerk((k as f64 + 0.5) / ms as f64);
                (
                    [
                        from[0] + (to[0] - from[0]) * f,
                        from[1] + (to[1] - from[1]) * f,
                    ],
                    [(to[0] - from[0]) * df / secs, (to[1] - from[1]) * df / secs],
                )
            }
        }
    }
}

/// The whole movement as segments (a few per trial, not a sample per ms,
/// so a long block costs no memory for it).
struct Movement {
    segments: Vec<Segment>,
    /// (start ms, end ms, target) of each outward reach and its hold.
    trials: Vec<(usize, usize, [f64; 2])>,
    /// The ms at which each hold in the target starts.
    holds: Vec<usize>,
}

fn draw_movement(rng: &mut ChaCha8Rng, total_ms: usize, radius: f64) -> Movement {
    let mut segments = Vec::new();
    let mut trials = Vec::new();
    let mut holds = Vec::new();
    let mut here = [0.0f64, 0.0];
    let scatter = Normal::new(0.0, 0.4).expect("valid sd");
    let mut len = 0usize;
    let push = |segments: &mut Vec<Segment>, len: &mut usize, s: Segment| {
        *len += s.ms();
        segments.push(s);
        *len
    };
    while len < total_ms {
        let ms = rng.random_range(300..600);
        push(&mut segments, &mut len, Segment::Hold { at: here, ms });
        let direction = rng.random_range(0..8) as f64 * PI / 4.0;
        let target = [radius * direction.cos(), radius * direction.sin()];
        let endpoint = [
            target[0] + scatter.sample(rng),
            target[1] + scatter.sample(rng),
        ];
        let start = len;
        let ms = rng.random_range(500..900);
        push(
            &mut segments,
            &mut len,
            Segment::Reach {
                from: here,
                to: endpoint,
                ms,
            },
        );
        let ms = rng.random_range(300..500);
        holds.push(len);
        let end = push(&mut segments, &mut len, Segment::Hold { at: endpoint, ms });
        trials.push((start, end, target));
        let home = [scatter.sample(rng) * 0.5, scatter.sample(rng) * 0.5];
        let ms = rng.random_range(500..900);
        push(
            &mut segments,
            &mut len,
            Segment::Reach {
                from: endpoint,
                to: home,
                ms,
            },
        );
        here = home;
    }
    trials.retain(|t| t.1 <= total_ms);
    Movement {
        segments,
        trials,
        holds,
    }
}

/// Walks a movement's segments a millisecond at a time.
struct MovementCursor<'a> {
    segments: &'a [Segment],
    index: usize,
    k: usize,
}

impl MovementCursor<'_> {
    fn next_ms(&mut self) -> ([f64; 2], [f64; 2]) {
        while self.k >= self.segments[self.index].ms() {
            self.index += 1;
            self.k = 0;
        }
        let out = self.segments[self.index].at(self.k);
        self.k += 1;
        out
    }
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

/// What [`simulate_to_dir`] wrote.
#[derive(Clone, Debug, PartialEq)]
pub struct SimWritten {
    pub n_bins: usize,
    pub n_channels: usize,
    pub bin_width: BinWidth,
    pub trials: usize,
}

/// Bins drawn and written per chunk by [`simulate_to_dir`].
const SIM_CHUNK_BINS: usize = 4096;

/// Draws a block straight into a session directory, a chunk of bins at a
/// time, so a block of any length costs a few MB of memory. The same
/// options give the same files as [`simulate`] followed by
/// [`Block::write`].
pub fn simulate_to_dir(
    options: &SimOptions,
    dir: &std::path::Path,
) -> Result<SimWritten, SimError> {
    use crate::formats::block::{
        COUNTS_FILE, FEATURES_FILE, KINEMATICS_FILE, write_manifest_naming, write_trials,
    };
    use crate::formats::npy_stream::NpyWriter;
    let (channels, rng, n_bins, bin_ms) = prepare(options)?;
    let n = options.n_channels;
    let mut sim = SimStream::new(options, channels, rng, n_bins, bin_ms)?;
    write_manifest_naming(
        dir,
        options.bin_width,
        &kinematic_names(),
        None,
        Some(notes(options)),
        options.features.then(|| FEATURE_NAME.to_string()),
    )?;
    let mut maker = options
        .features
        .then(|| FeatureMaker::new(options.population_seed, options.seed, n));
    let mut values_out = match maker {
        None => NpyWriter::create_u16(&dir.join(COUNTS_FILE), n_bins, n)?,
        Some(_) => NpyWriter::create_f32(&dir.join(FEATURES_FILE), n_bins, n)?,
    };
    let mut features = vec![
        0f32;
        if options.features {
            SIM_CHUNK_BINS * n
        } else {
            0
        }
    ];
    let mut kin_out = NpyWriter::create(&dir.join(KINEMATICS_FILE), n_bins, 4)?;
    let mut counts = vec![0u16; SIM_CHUNK_BINS * n];
    let mut kin = vec![0.0; SIM_CHUNK_BINS * 4];
    let mut row_kin = [0.0; 4];
    let mut bin = 0;
    while bin < n_bins {
        let chunk = SIM_CHUNK_BINS.min(n_bins - bin);
        for r in 0..chunk {
            sim.next_bin(&mut counts[r * n..(r + 1) * n], &mut row_kin);
            kin[r * 4..(r + 1) * 4].copy_from_slice(&row_kin);
        }
        match maker.as_mut() {
            None => values_out.write_u16_rows(&counts[..chunk * n])?,
            Some(m) => {
                for r in 0..chunk {
                    m.features(
                        &counts[r * n..(r + 1) * n],
                        &mut features[r * n..(r + 1) * n],
                    );
                }
                values_out.write_f32_rows(&features[..chunk * n])?;
            }
        }
        kin_out.write_rows(&kin[..chunk * 4])?;
        bin += chunk;
    }
    values_out.finish()?;
    kin_out.finish()?;
    let trials = sim.trials();
    write_trials(dir, &trials)?;
    if options.click.is_some() {
        crate::formats::block::write_flags(
            &dir.join(crate::formats::block::CLICK_FILE),
            &sim.click_labels,
        )?;
    }
    Ok(SimWritten {
        n_bins,
        n_channels: n,
        bin_width: options.bin_width,
        trials: trials.len(),
    })
}

/// Checks the options; the array, the block's generator, its length in
/// bins and the bin width in whole ms.
fn prepare(options: &SimOptions) -> Result<(SimChannels, ChaCha8Rng, usize, usize), SimError> {
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
    let mut channels = draw_channels(
        &mut ChaCha8Rng::seed_from_u64(options.population_seed),
        options.n_channels,
    );
    if let Some(d) = &options.drift {
        // This block's array: the population's channels, each preferred
        // direction turned as the drift says.
        channels.beta = Drift::draw(d, options.n_channels, options.seed)?.turn(&channels.beta);
    }
    let rng = ChaCha8Rng::seed_from_u64(options.seed);
    let n_bins = ((options.minutes * 60_000.0) as usize) / bin_ms_int;
    Ok((channels, rng, n_bins, bin_ms_int))
}

/// Draws a block. Returns the session (with kinematics pos_x, pos_y, vel_x,
/// vel_y as bin means, and the outward reaches as trials) and the channels'
/// true tuning.
pub fn simulate(options: &SimOptions) -> Result<(Block, SimChannels), SimError> {
    let (channels, rng, n_bins, bin_ms_int) = prepare(options)?;
    let mut sim = SimStream::new(options, channels.clone(), rng, n_bins, bin_ms_int)?;
    let n = options.n_channels;
    let mut counts = vec![0u16; n_bins * n];
    let mut kin = Mat::zeros(n_bins, 4);
    let mut row_kin = [0.0; 4];
    for bin in 0..n_bins {
        sim.next_bin(&mut counts[bin * n..(bin + 1) * n], &mut row_kin);
        for (c, v) in row_kin.iter().enumerate() {
            kin.set(bin, c, *v);
        }
    }
    let trials = sim.trials();
    let (input, counts, features) = if options.features {
        let mut maker = FeatureMaker::new(options.population_seed, options.seed, n);
        let mut features = vec![0f32; n_bins * n];
        for (c, f) in counts.chunks_exact(n).zip(features.chunks_exact_mut(n)) {
            maker.features(c, f);
        }
        (crate::wire::packet::BinKind::Features, Vec::new(), features)
    } else {
        (crate::wire::packet::BinKind::Counts, counts, Vec::new())
    };
    let session = Block {
        bin_width: options.bin_width,
        n_bins,
        n_channels: n,
        input,
        counts,
        features,
        kinematic_names: kinematic_names(),
        kinematics: Some(kin),
        trials: Some(trials),
        channel_labels: None,
        valid: None,
        click: options.click.as_ref().map(|_| sim.click_labels.clone()),
        notes: Some(notes(options)),
    };
    Ok((session, channels))
}

fn kinematic_names() -> Vec<String> {
    ["pos_x", "pos_y", "vel_x", "vel_y"]
        .map(String::from)
        .to_vec()
}

fn notes(options: &SimOptions) -> String {
    let mut notes = format!(
        "synthetic center-out block: seed {}, population {}, {} channels, {} min, positions in cm, velocities in cm/s",
        options.seed, options.population_seed, options.n_channels, options.minutes
    );
    if options.features {
        notes.push_str(
            "; features: simulated spike band power (each channel an offset of 20–60 µV, 2–6 µV a spike, Gaussian noise of 1–3 µV)",
        );
    }
    if let Some(c) = &options.click {
        notes.push_str(&format!(
            "; click attempts for {} ms from the start of each hold in the target, {:.0} % of channels at {}× their rate during them (click.npy)",
            c.attempt_ms,
            c.share * 100.0,
            c.gain
        ));
    }
    if let Some(d) = &options.drift {
        let event = |e: &Option<crate::sim::drift::ChannelEvent>| {
            e.as_ref().map_or("none".to_string(), |e| {
                format!(
                    "{:.0} % from minute {}{}",
                    e.share * 100.0,
                    e.from_minute,
                    e.until_minute.map_or(String::new(), |u| format!(" to {u}"))
                )
            })
        };
        notes.push_str(&format!(
            "; drift (seed {}): gains ramp to {}–{} over {} min, silent {}, noisy at {} Hz {}, over-dispersion {}, preferred directions turned by sd {}°",
            d.seed,
            d.gain_min,
            d.gain_max,
            d.ramp_minutes,
            event(&d.silent),
            d.noisy_hz,
            event(&d.noisy),
            d.overdispersion_shape
                .map_or("none".to_string(), |k| format!("gamma shape {k}")),
            d.pd_change_deg
        ));
    }
    notes
}

/// Whether ms `t` lies in the click attempt that starts a hold, moving
/// `next` past attempts that have ended (times asked in increasing order).
fn attempting(holds: &[usize], next: &mut usize, attempt_ms: usize, t: usize) -> bool {
    while *next < holds.len() && holds[*next] + attempt_ms <= t {
        *next += 1;
    }
    *next < holds.len() && holds[*next] <= t
}

/// The simulator as a stream of bins: movement drawn up front as segments,
/// spikes drawn a millisecond at a time as bins are asked for. The same
/// seeds give the same bins whether the block is built in memory
/// ([`simulate`]) or written a chunk at a time ([`simulate_to_dir`]).
struct SimStream {
    movement: Movement,
    channels: SimChannels,
    rng: ChaCha8Rng,
    options: SimOptions,
    bin_ms: usize,
    n_bins: usize,
    seg: usize,
    k: usize,
    refractory_left: Vec<usize>,
    /// ms since each channel's last spike past its absolute refractory period.
    recovered_ms: Vec<f64>,
    drift: Option<Drift>,
    /// The drift's factor of each channel for the current bin.
    factors: Vec<f64>,
    /// Bins drawn so far.
    bins_done: usize,
    /// With clicks: the array's click channels, and the next hold whose
    /// attempt has not ended.
    click_channels: Vec<bool>,
    next_hold: usize,
    /// Whether each bin drawn so far was cued as a click.
    click_labels: Vec<bool>,
}

impl SimStream {
    fn new(
        options: &SimOptions,
        channels: SimChannels,
        mut rng: ChaCha8Rng,
        n_bins: usize,
        bin_ms: usize,
    ) -> Result<SimStream, SimError> {
        let total_ms = n_bins * bin_ms;
        let movement = draw_movement(&mut rng, total_ms, options.target_radius);
        if let Some(c) = &options.click {
            if !(0.0..=1.0).contains(&c.share) {
                return Err(SimError::Option {
                    key: "click share",
                    value: c.share.to_string(),
                    expected: "a share from 0 to 1",
                });
            }
            if !(c.gain.is_finite() && c.gain >= 0.0) {
                return Err(SimError::Option {
                    key: "click gain",
                    value: c.gain.to_string(),
                    expected: "a rate factor of 0 or more",
                });
            }
            if c.attempt_ms == 0 {
                return Err(SimError::Option {
                    key: "click ms",
                    value: "0".into(),
                    expected: "at least 1 ms",
                });
            }
        }
        if !(options.recovery_ms.is_finite() && options.recovery_ms >= 0.0) {
            return Err(SimError::Option {
                key: "recovery_ms",
                value: options.recovery_ms.to_string(),
                expected: "0 or more",
            });
        }
        let n = options.n_channels;
        Ok(SimStream {
            movement,
            channels,
            rng,
            options: options.clone(),
            bin_ms,
            n_bins,
            seg: 0,
            k: 0,
            refractory_left: vec![0; n],
            recovered_ms: vec![f64::INFINITY; n],
            drift: match &options.drift {
                Some(d) => Some(Drift::draw(d, n, options.seed)?),
                None => None,
            },
            factors: vec![1.0; n],
            bins_done: 0,
            click_channels: options.click.as_ref().map_or(Vec::new(), |c| {
                click_channels(options.population_seed, n, c.share)
            }),
            next_hold: 0,
            click_labels: Vec::new(),
        })
    }

    /// The next bin's counts (into `row`, zeroed first) and its mean
    /// pos_x, pos_y, vel_x, vel_y.
    fn next_bin(&mut self, row: &mut [u16], kin: &mut [f64; 4]) {
        row.fill(0);
        let mut acc = [0.0f64; 4];
        let mut cursor = MovementCursor {
            segments: &self.movement.segments,
            index: self.seg,
            k: self.k,
        };
        let bin_start_ms = (self.bins_done * self.bin_ms) as f64;
        let first_ms = self.bins_done * self.bin_ms;
        self.bins_done += 1;
        if let Some(d) = self.drift.as_mut() {
            d.bin_factors(bin_start_ms, &mut self.factors);
        }
        if self.options.click.is_some() {
            // A bin is cued when its middle lies in an attempt; the next
            // hold is found from the bin's start.
            let middle = first_ms + self.bin_ms / 2;
            let holds = &self.movement.holds;
            let attempt = self.options.click.as_ref().map_or(0, |c| c.attempt_ms);
            let cued = holds[self.next_hold.min(holds.len())..]
                .iter()
                .take_while(|&&h| h <= middle)
                .any(|&h| middle < h + attempt);
            self.click_labels.push(cued);
        }
        for j in 0..self.bin_ms {
            let click_gain = match &self.options.click {
                Some(c)
                    if attempting(
                        &self.movement.holds,
                        &mut self.next_hold,
                        c.attempt_ms,
                        first_ms + j,
                    ) =>
                {
                    c.gain
                }
                _ => 1.0,
            };
            let (p, v) = cursor.next_ms();
            acc[0] += p[0];
            acc[1] += p[1];
            acc[2] += v[0];
            acc[3] += v[1];
            for (ch, count) in row.iter_mut().enumerate() {
                if self.refractory_left[ch] > 0 {
                    self.refractory_left[ch] -= 1;
                    continue;
                }
                self.recovered_ms[ch] += 1.0;
                let b = self.channels.beta[ch];
                let mut rate_hz =
                    (self.channels.log_baseline[ch] + b[0] * v[0] + b[1] * v[1]).exp();
                if click_gain != 1.0 && self.click_channels[ch] {
                    rate_hz *= click_gain;
                }
                if let Some(d) = &self.drift {
                    rate_hz = d.rate_hz(ch, bin_start_ms + j as f64, rate_hz, self.factors[ch]);
                }
                if self.options.recovery_ms > 0.0 {
                    rate_hz *= 1.0 - (-self.recovered_ms[ch] / self.options.recovery_ms).exp();
                }
                let p = (rate_hz / 1000.0).min(1.0);
                if self.rng.random::<f64>() < p {
                    *count = count.saturating_add(1);
                    self.refractory_left[ch] = self.options.refractory_ms;
                    self.recovered_ms[ch] = 0.0;
                }
            }
        }
        (self.seg, self.k) = (cursor.index, cursor.k);
        for (k, a) in kin.iter_mut().zip(acc) {
            *k = a / self.bin_ms as f64;
        }
    }

    fn trials(&self) -> Vec<Trial> {
        let b = self.bin_ms;
        self.movement
            .trials
            .iter()
            .enumerate()
            .map(|(i, &(start, end, target))| Trial {
                trial: i as u32,
                start_bin: start / b,
                end_bin: end.div_ceil(b).min(self.n_bins),
                target_x: target[0],
                target_y: target[1],
            })
            .filter(|t| t.start_bin < t.end_bin)
            .collect()
    }
}
