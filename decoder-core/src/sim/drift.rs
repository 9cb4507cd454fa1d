//! A world that changes, for the simulator and the simulated user.
//!
//! A real array is not stationary: within hours each channel's
//! threshold-crossing rate drifts (its baseline and gain), some channels
//! fall silent (a broken wire) and some turn noisy (a loose reference:
//! a high rate unrelated to movement), and sometimes they come back; counts
//! vary more than a Poisson process's; and from one day to the next the
//! preferred directions move a little. Decoders meant to last a day are
//! tested in such a world. Everything here is drawn from its own seed, so
//! the same options give the same world, and with no drift the simulator
//! draws exactly what it drew before.

use rand::seq::SliceRandom;
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Gamma, Normal};

/// Some channels, from one time to (optionally) another.
#[derive(Clone, Debug, PartialEq)]
pub struct ChannelEvent {
    /// Share of the array, 0 to 1.
    pub share: f64,
    pub from_minute: f64,
    /// When the channels come back (`None`: they do not).
    pub until_minute: Option<f64>,
}

#[derive(Clone, Debug, PartialEq)]
pub struct DriftOptions {
    /// Seed of the drift: gains, which channels, preferred-direction
    /// changes, over-dispersion.
    pub seed: u64,
    /// Each channel's rate is multiplied by a factor that moves linearly
    /// from 1 to a value drawn uniformly in `[gain_min, gain_max]` over
    /// `ramp_minutes`, then stays.
    pub gain_min: f64,
    pub gain_max: f64,
    pub ramp_minutes: f64,
    /// Channels that fire nothing.
    pub silent: Option<ChannelEvent>,
    /// Other channels that fire at `noisy_hz`, unrelated to movement.
    pub noisy: Option<ChannelEvent>,
    pub noisy_hz: f64,
    /// Counts over-dispersed: each bin's rate of each channel is
    /// multiplied by a Gamma(shape, 1/shape) factor (mean 1), so a bin's
    /// count is a gamma-Poisson mixture with variance μ + μ²/shape.
    pub overdispersion_shape: Option<f64>,
    /// Each channel's preferred direction turned by a normal angle of this
    /// standard deviation, in degrees (a new day's array).
    pub pd_change_deg: f64,
}

impl Default for DriftOptions {
    fn default() -> Self {
        DriftOptions {
            seed: 1,
            gain_min: 1.0,
            gain_max: 1.0,
            ramp_minutes: 60.0,
            silent: None,
            noisy: None,
            noisy_hz: 400.0,
            overdispersion_shape: None,
            pd_change_deg: 0.0,
        }
    }
}

/// Why drift options are refused.
#[derive(Debug, thiserror::Error, PartialEq)]
#[error("drift {key} is {value}; {expected}")]
pub struct DriftError {
    pub key: &'static str,
    pub value: String,
    pub expected: &'static str,
}

impl DriftOptions {
    pub fn check(&self) -> Result<(), DriftError> {
        let bad = |key, value: f64, expected| {
            Err(DriftError {
                key,
                value: value.to_string(),
                expected,
            })
        };
        if !(self.gain_min.is_finite() && self.gain_min >= 0.0) {
            return bad("gain_min", self.gain_min, "a factor of 0 or more");
        }
        if !(self.gain_max.is_finite() && self.gain_max >= self.gain_min) {
            return bad("gain_max", self.gain_max, "a factor of at least gain_min");
        }
        if !(self.ramp_minutes.is_finite() && self.ramp_minutes > 0.0) {
            return bad("ramp_minutes", self.ramp_minutes, "above 0");
        }
        for (key, e) in [("silent", &self.silent), ("noisy", &self.noisy)] {
            if let Some(e) = e {
                if !(0.0..=1.0).contains(&e.share) {
                    return bad(key, e.share, "a share from 0 to 1");
                }
                if !(e.from_minute.is_finite() && e.from_minute >= 0.0) {
                    return bad(key, e.from_minute, "a start minute of 0 or more");
                }
                if let Some(u) = e.until_minute {
                    if !(u.is_finite() && u > e.from_minute) {
                        return bad(key, u, "an end minute after its start");
                    }
                }
            }
        }
        let shares = self.silent.as_ref().map_or(0.0, |e| e.share)
            + self.noisy.as_ref().map_or(0.0, |e| e.share);
        if shares > 1.0 {
            return bad("silent + noisy", shares, "shares that add to at most 1");
        }
        if !(self.noisy_hz.is_finite() && (0.0..=1000.0).contains(&self.noisy_hz)) {
            return bad("noisy_hz", self.noisy_hz, "0 to 1000 Hz");
        }
        if let Some(k) = self.overdispersion_shape {
            if !(k.is_finite() && k > 0.0) {
                return bad("overdispersion_shape", k, "above 0");
            }
        }
        if !(self.pd_change_deg.is_finite() && self.pd_change_deg >= 0.0) {
            return bad("pd_change_deg", self.pd_change_deg, "0 degrees or more");
        }
        Ok(())
    }
}

/// A window of time, in ms.
#[derive(Clone, Copy, Debug, PartialEq)]
struct Window {
    from_ms: f64,
    until_ms: f64,
}

impl Window {
    fn of(e: &ChannelEvent) -> Window {
        Window {
            from_ms: e.from_minute * 60_000.0,
            until_ms: e.until_minute.map_or(f64::INFINITY, |u| u * 60_000.0),
        }
    }

    fn holds(&self, t_ms: f64) -> bool {
        t_ms >= self.from_ms && t_ms < self.until_ms
    }
}

/// One drawn world: each channel's final gain, which channels go silent
/// or noisy, and the per-bin over-dispersion.
#[derive(Clone, Debug)]
pub struct Drift {
    gains: Vec<f64>,
    ramp_ms: f64,
    silent: Vec<bool>,
    silent_window: Option<Window>,
    noisy: Vec<bool>,
    noisy_window: Option<Window>,
    noisy_hz: f64,
    overdispersion: Option<Gamma<f64>>,
    pd_turns: Vec<f64>,
    rng: ChaCha8Rng,
    /// This bin's over-dispersion draw of each channel (1 without).
    dispersion: Vec<f64>,
}

impl Drift {
    /// The world of `options` for `n` channels; `stream` keys the
    /// per-bin draws (the block's seed), the rest comes from the drift's
    /// own seed.
    pub fn draw(options: &DriftOptions, n: usize, stream: u64) -> Result<Drift, DriftError> {
        options.check()?;
        let mut rng = ChaCha8Rng::seed_from_u64(options.seed);
        let gains = (0..n)
            .map(|_| {
                if options.gain_max > options.gain_min {
                    rng.random_range(options.gain_min..options.gain_max)
                } else {
                    options.gain_min
                }
            })
            .collect();
        let mut order: Vec<usize> = (0..n).collect();
        order.shuffle(&mut rng);
        let take = |share: f64| (share * n as f64).round() as usize;
        let n_silent = options.silent.as_ref().map_or(0, |e| take(e.share));
        let n_noisy = options
            .noisy
            .as_ref()
            .map_or(0, |e| take(e.share))
            .min(n - n_silent);
        let mut silent = vec![false; n];
        let mut noisy = vec![false; n];
        for &c in &order[..n_silent] {
            silent[c] = true;
        }
        for &c in &order[n_silent..n_silent + n_noisy] {
            noisy[c] = true;
        }
        let turn = Normal::new(0.0, options.pd_change_deg.to_radians()).expect("a finite sd");
        let pd_turns = (0..n).map(|_| turn.sample(&mut rng)).collect();
        Ok(Drift {
            gains,
            ramp_ms: options.ramp_minutes * 60_000.0,
            silent,
            silent_window: options.silent.as_ref().map(Window::of),
            noisy,
            noisy_window: options.noisy.as_ref().map(Window::of),
            noisy_hz: options.noisy_hz,
            overdispersion: options
                .overdispersion_shape
                .map(|k| Gamma::new(k, 1.0 / k).expect("a positive shape")),
            pd_turns,
            rng: ChaCha8Rng::seed_from_u64(options.seed ^ stream.rotate_left(17) ^ 0xD41F7),
            dispersion: vec![1.0; n],
        })
    }

    /// Each channel's gain once the ramp is over.
    pub fn final_gains(&self) -> &[f64] {
        &self.gains
    }

    pub fn is_silent_channel(&self, ch: usize) -> bool {
        self.silent[ch]
    }

    pub fn is_noisy_channel(&self, ch: usize) -> bool {
        self.noisy[ch]
    }

    /// Each channel's velocity tuning (βx, βy) with its preferred
    /// direction turned (the depth of modulation kept).
    pub fn turn(&self, beta: &[[f64; 2]]) -> Vec<[f64; 2]> {
        beta.iter()
            .zip(&self.pd_turns)
            .map(|(b, a)| {
                let (s, c) = a.sin_cos();
                [c * b[0] - s * b[1], s * b[0] + c * b[1]]
            })
            .collect()
    }

    /// The factors of one bin (into `out`, one per channel): the gain
    /// reached at `t_ms` times a fresh over-dispersion draw.
    pub fn bin_factors(&mut self, t_ms: f64, out: &mut [f64]) {
        let ramp = (t_ms / self.ramp_ms).min(1.0);
        for ((f, g), d) in out.iter_mut().zip(&self.gains).zip(&mut self.dispersion) {
            if let Some(gamma) = &self.overdispersion {
                *d = gamma.sample(&mut self.rng);
            }
            *f = (1.0 + (g - 1.0) * ramp) * *d;
        }
    }

    /// Channel `ch`'s rate at `t_ms`: silent; noisy (its noise rate, over-
    /// dispersed like any other, but neither tuned nor drifting); or its
    /// tuned rate times its factor for the bin.
    pub fn rate_hz(&self, ch: usize, t_ms: f64, tuned_hz: f64, factor: f64) -> f64 {
        if self.silent[ch] && self.silent_window.is_some_and(|w| w.holds(t_ms)) {
            0.0
        } else if self.noisy[ch] && self.noisy_window.is_some_and(|w| w.holds(t_ms)) {
            self.noisy_hz * self.dispersion[ch]
        } else {
            tuned_hz * factor
        }
    }
}
