//! Drift handling: decoding through a day in which channels drift, die and
//! come back, without retraining and without targets.
//!
//! A decoder trained in the morning assumes the morning's rates. Through
//! the day each channel's baseline and depth of modulation wander, and some
//! channels go silent or start firing at rates that carry no movement. The
//! [`DriftTracker`] watches every decoded bin's counts and:
//!
//! - follows each channel's baseline (and, for decoders that normalise
//!   counts, its spread) with an exponentially weighted mean whose time
//!   constant is `baseline_tau_s`, and hands the decoder the counts moved
//!   back onto the training baseline: `y = μ° + (c − μ)·σ°/σ`;
//! - leaves out a channel that is dead (no count for `dead_after_s` while
//!   its training rate was at least `dead_min_rate_hz`), saturated, or
//!   noisy (its short-term rate above `noisy_factor` times its training
//!   rate, or times `noisy_floor_hz` when that is higher), and restores it
//!   once it has behaved for `restore_after_s`;
//! - subtracts a velocity bias: the exponentially weighted mean of the
//!   decoded velocity over bins whose speed is above a running quantile
//!   (Jarosiewicz et al. 2015), never larger than `bias_limit` times that
//!   quantile speed.
//!
//! Baselines and bias follow only while the decoder is armed (a rest in
//! which the operator disarms does not become the new baseline); channel
//! health is judged on every decoded bin. Everything is a pure function of
//! the bins in order, so a replay of a session log repeats it bit for bit;
//! nothing allocates per bin.

use serde::{Deserialize, Serialize};

use crate::bin_width::BinWidth;

/// The `[drift]` settings; recorded in the session log with the rest of
/// the engine's settings.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct DriftSettings {
    /// Off by default; `decoderd ctl drift on|off` changes it while running.
    pub enabled: bool,
    /// Time constant of each channel's tracked baseline, seconds.
    pub baseline_tau_s: f64,
    /// Subtract the tracked velocity bias.
    pub correct_bias: bool,
    /// Time constant of the velocity bias and of the speed quantile, seconds.
    pub bias_tau_s: f64,
    /// Bins faster than this quantile of the decoded speed feed the bias.
    pub bias_speed_quantile: f64,
    /// The bias never exceeds this fraction of that quantile speed.
    pub bias_limit: f64,
    /// Time constant of the short-term rate that judges a channel's health.
    pub health_tau_s: f64,
    /// A channel with no count for this long is dead ...
    pub dead_after_s: f64,
    /// ... when its training rate was at least this (Hz).
    pub dead_min_rate_hz: f64,
    /// A short-term rate above this many times the training rate is noisy ...
    pub noisy_factor: f64,
    /// ... or above this many times `noisy_floor_hz`, whichever is higher.
    pub noisy_floor_hz: f64,
    /// A left-out channel comes back after behaving for this long.
    pub restore_after_s: f64,
    /// More than this share of channels left out halts the decoder.
    pub max_left_out: f64,
    /// A Kalman decoder's reduced form for a new set of channels left out
    /// takes effect this long after the change was judged (built
    /// meanwhile on a worker thread; the channels newly out are fed their
    /// training mean until then). 0 builds it on the decode thread at the
    /// bin it is judged.
    pub left_out_after_s: f64,
}

impl Default for DriftSettings {
    fn default() -> Self {
        DriftSettings {
            enabled: false,
            baseline_tau_s: 600.0,
            correct_bias: false,
            bias_tau_s: 600.0,
            bias_speed_quantile: 0.66,
            bias_limit: 0.1,
            health_tau_s: 2.0,
            dead_after_s: 5.0,
            dead_min_rate_hz: 2.0,
            noisy_factor: 4.0,
            noisy_floor_hz: 20.0,
            restore_after_s: 10.0,
            max_left_out: 0.3,
            left_out_after_s: 0.25,
        }
    }
}

/// A `[drift]` value out of range: the key (`drift.…`) and what it must be.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[error("{key} is {value}; it must be {want}")]
pub struct DriftSettingsError {
    pub key: &'static str,
    pub value: f64,
    pub want: &'static str,
}

impl DriftSettings {
    pub fn validate(&self) -> Result<(), DriftSettingsError> {
        let positive: [(&'static str, f64); 6] = [
            ("drift.baseline_tau_s", self.baseline_tau_s),
            ("drift.bias_tau_s", self.bias_tau_s),
            ("drift.health_tau_s", self.health_tau_s),
            ("drift.dead_after_s", self.dead_after_s),
            ("drift.restore_after_s", self.restore_after_s),
            ("drift.noisy_factor", self.noisy_factor),
        ];
        for (key, value) in positive {
            if !(value.is_finite() && value > 0.0) {
                return Err(DriftSettingsError {
                    key,
                    value,
                    want: "a finite number above 0",
                });
            }
        }
        let unit: [(&'static str, f64); 3] = [
            ("drift.bias_speed_quantile", self.bias_speed_quantile),
            ("drift.bias_limit", self.bias_limit),
            ("drift.max_left_out", self.max_left_out),
        ];
        for (key, value) in unit {
            if !(0.0..=1.0).contains(&value) {
                return Err(DriftSettingsError {
                    key,
                    value,
                    want: "between 0 and 1",
                });
            }
        }
        for (key, value) in [
            ("drift.dead_min_rate_hz", self.dead_min_rate_hz),
            ("drift.noisy_floor_hz", self.noisy_floor_hz),
            ("drift.left_out_after_s", self.left_out_after_s),
        ] {
            if !(value.is_finite() && value >= 0.0) {
                return Err(DriftSettingsError {
                    key,
                    value,
                    want: "a finite number, 0 or above",
                });
            }
        }
        Ok(())
    }
}

/// Why a channel is left out of the decode.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum LeftOutReason {
    /// No counts for `dead_after_s` although it used to fire.
    Dead,
    /// A rate far above its training rate.
    Noisy,
    /// A count at the saturation count.
    Saturated,
}

impl LeftOutReason {
    pub fn name(self) -> &'static str {
        match self {
            LeftOutReason::Dead => "dead",
            LeftOutReason::Noisy => "noisy",
            LeftOutReason::Saturated => "saturated",
        }
    }
}

/// One channel left out or restored on a bin.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct ChannelChange {
    pub channel: u32,
    /// Why it was left out; `None` when it was restored.
    pub left_out: Option<LeftOutReason>,
}

/// How far the tracked baselines stand from the training baselines, as
/// ratios over the channels in the decode (status and `ctl watch`).
#[derive(Clone, Copy, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct BaselineSpread {
    pub min_ratio: f64,
    pub median_ratio: f64,
    pub max_ratio: f64,
}

/// The tracked statistics of every channel and of the decoded velocity.
/// See the module documentation.
#[derive(Clone, Debug)]
pub struct DriftTracker {
    settings: DriftSettings,
    saturation_count: u16,
    a_base: f64,
    a_fast: f64,
    a_bias: f64,
    dead_bins: u64,
    restore_bins: u64,
    /// Bins from a change of the channels left out to the bin at which a
    /// Kalman decoder's reduced form takes effect.
    left_out_lag_bins: u64,
    /// Training mean count per bin, per channel.
    ref_mean: Vec<f64>,
    /// Training variance per channel, when the decoder normalises counts.
    ref_var: Option<Vec<f64>>,
    /// Short-term rate above which a channel is noisy (counts per bin).
    noisy_limit: Vec<f64>,
    /// Whether a channel's training rate is high enough to call it dead.
    can_die: Vec<bool>,
    mean: Vec<f64>,
    var: Vec<f64>,
    fast: Vec<f64>,
    zero_run: Vec<u64>,
    good_run: Vec<u64>,
    reason: Vec<Option<LeftOutReason>>,
    left_out: Vec<bool>,
    n_left_out: usize,
    values: Vec<f64>,
    changes: Vec<ChannelChange>,
    bias: Vec<f64>,
    speed_quantile: f64,
    speed_mean: f64,
}

/// The weight of the newest value in an exponentially weighted mean with
/// time constant `tau_s`, at `bin_width`.
fn ew_weight(tau_s: f64, bin_width: BinWidth) -> f64 {
    1.0 - (-bin_width.seconds() / tau_s).exp()
}

impl DriftTracker {
    /// A tracker for a decoder whose training mean count per bin is
    /// `ref_mean` (and training variance `ref_var` when it normalises
    /// counts), for `outputs` velocity components.
    pub fn new(
        settings: DriftSettings,
        bin_width: BinWidth,
        saturation_count: u16,
        ref_mean: Vec<f64>,
        ref_var: Option<Vec<f64>>,
        outputs: usize,
    ) -> DriftTracker {
        let n = ref_mean.len();
        let bin_s = bin_width.seconds();
        let bins = |s: f64| (s / bin_s).ceil().max(1.0) as u64;
        let noisy_limit = ref_mean
            .iter()
            .map(|&m| settings.noisy_factor * m.max(settings.noisy_floor_hz * bin_s))
            .collect();
        let can_die = ref_mean
            .iter()
            .map(|&m| m >= settings.dead_min_rate_hz * bin_s && m > 0.0)
            .collect();
        let mut t = DriftTracker {
            a_base: ew_weight(settings.baseline_tau_s, bin_width),
            a_fast: ew_weight(settings.health_tau_s, bin_width),
            a_bias: ew_weight(settings.bias_tau_s, bin_width),
            dead_bins: bins(settings.dead_after_s),
            restore_bins: bins(settings.restore_after_s),
            left_out_lag_bins: (settings.left_out_after_s / bin_s - 1e-9).ceil().max(0.0) as u64,
            settings,
            saturation_count,
            noisy_limit,
            can_die,
            mean: ref_mean.clone(),
            var: ref_var.clone().unwrap_or_default(),
            fast: ref_mean.clone(),
            zero_run: vec![0; n],
            good_run: vec![0; n],
            reason: vec![None; n],
            left_out: vec![false; n],
            n_left_out: 0,
            values: vec![0.0; n],
            changes: Vec::with_capacity(n),
            bias: vec![0.0; outputs],
            speed_quantile: 0.0,
            speed_mean: 0.0,
            ref_mean,
            ref_var,
        };
        t.reset();
        t
    }

    /// Back to the training statistics: every channel in, no bias.
    pub fn reset(&mut self) {
        self.mean.copy_from_slice(&self.ref_mean);
        if let Some(v) = &self.ref_var {
            self.var.copy_from_slice(v);
        }
        self.fast.copy_from_slice(&self.ref_mean);
        self.zero_run.fill(0);
        self.good_run.fill(0);
        self.reason.fill(None);
        self.left_out.fill(false);
        self.n_left_out = 0;
        self.changes.clear();
        self.bias.fill(0.0);
        self.speed_quantile = 0.0;
        self.speed_mean = 0.0;
    }

    pub fn settings(&self) -> &DriftSettings {
        &self.settings
    }

    /// Takes one decoded bin's counts: judges each channel's health,
    /// follows its baseline when `track` (the decoder is armed), and fills
    /// the corrected values ([`DriftTracker::values`]). Returns whether a
    /// channel was left out or restored on this bin ([`DriftTracker::changes`]).
    pub fn observe(&mut self, counts: &[u16], track: bool) -> bool {
        debug_assert_eq!(counts.len(), self.ref_mean.len());
        self.changes.clear();
        for (ch, &c) in counts.iter().enumerate() {
            let x = f64::from(c);
            self.fast[ch] += self.a_fast * (x - self.fast[ch]);
            self.zero_run[ch] = if c > 0 { 0 } else { self.zero_run[ch] + 1 };
            let saturated = c >= self.saturation_count;
            let dead = self.can_die[ch] && self.zero_run[ch] >= self.dead_bins;
            match self.reason[ch] {
                None => {
                    let why = if dead {
                        Some(LeftOutReason::Dead)
                    } else if saturated {
                        Some(LeftOutReason::Saturated)
                    } else if self.fast[ch] > self.noisy_limit[ch] {
                        Some(LeftOutReason::Noisy)
                    } else {
                        None
                    };
                    if let Some(why) = why {
                        self.reason[ch] = Some(why);
                        self.left_out[ch] = true;
                        self.n_left_out += 1;
                        self.good_run[ch] = 0;
                        self.changes.push(ChannelChange {
                            channel: ch as u32,
                            left_out: Some(why),
                        });
                    }
                }
                Some(_) => {
                    // Behaving: counts again, at a rate back near the
                    // training rate (hysteresis: half the noisy limit, a
                    // quarter of the training rate), nothing saturated.
                    let fires = !self.can_die[ch]
                        || (self.zero_run[ch] < self.dead_bins
                            && self.fast[ch] >= 0.25 * self.ref_mean[ch]);
                    let calm = self.fast[ch] < 0.5 * self.noisy_limit[ch];
                    if fires && calm && !saturated {
                        self.good_run[ch] += 1;
                    } else {
                        self.good_run[ch] = 0;
                    }
                    if self.good_run[ch] >= self.restore_bins {
                        self.reason[ch] = None;
                        self.left_out[ch] = false;
                        self.n_left_out -= 1;
                        self.changes.push(ChannelChange {
                            channel: ch as u32,
                            left_out: None,
                        });
                    }
                }
            }
            if self.left_out[ch] {
                // Its baseline waits where it was; the decoder ignores it
                // (the Wiener filter sees its training mean).
                self.values[ch] = self.ref_mean[ch];
                continue;
            }
            if track {
                self.mean[ch] += self.a_base * (x - self.mean[ch]);
                if self.ref_var.is_some() {
                    let dev = x - self.mean[ch];
                    self.var[ch] += self.a_base * (dev * dev - self.var[ch]);
                }
            }
            let mut y = x - self.mean[ch];
            if let Some(rv) = &self.ref_var {
                // The spread's correction, within a factor of 4 either way
                // (a nearly silent channel must not be amplified without
                // bound).
                let k = (rv[ch] / self.var[ch].max(f64::MIN_POSITIVE)).sqrt();
                y *= k.clamp(0.25, 4.0);
            }
            self.values[ch] = self.ref_mean[ch] + y;
        }
        !self.changes.is_empty()
    }

    /// The last bin's counts, corrected onto the training baselines.
    pub fn values(&self) -> &[f64] {
        &self.values
    }

    /// Channels left out or restored on the last bin.
    pub fn changes(&self) -> &[ChannelChange] {
        &self.changes
    }

    /// Bins from a change of the channels left out to the bin whose decode
    /// first uses the Kalman filter's reduced form for them
    /// (`left_out_after_s`).
    pub fn left_out_lag_bins(&self) -> u64 {
        self.left_out_lag_bins
    }

    /// One flag per channel: left out of the decode.
    pub fn left_out(&self) -> &[bool] {
        &self.left_out
    }

    pub fn n_left_out(&self) -> usize {
        self.n_left_out
    }

    /// Why each left-out channel is out, in channel order.
    pub fn left_out_channels(&self) -> impl Iterator<Item = (usize, LeftOutReason)> + '_ {
        self.reason
            .iter()
            .enumerate()
            .filter_map(|(c, r)| r.map(|r| (c, r)))
    }

    /// More channels are out than `max_left_out` allows.
    pub fn too_many_left_out(&self) -> bool {
        self.n_left_out as f64 > self.settings.max_left_out * self.ref_mean.len() as f64
    }

    /// With bias correction on, follows the velocity bias from the decoded
    /// `estimate` (when `track`) and subtracts it; off, does nothing.
    pub fn correct_velocity(&mut self, estimate: &mut [f64], track: bool) {
        if !self.settings.correct_bias {
            return;
        }
        if track {
            let speed = estimate.iter().map(|v| v * v).sum::<f64>().sqrt();
            let a = self.a_bias;
            self.speed_mean += a * (speed - self.speed_mean);
            // Robbins–Monro: settles where a share 1 − q of speeds lies
            // above, in steps scaled by the mean speed.
            let q = self.settings.bias_speed_quantile;
            let step = a * self.speed_mean;
            if speed > self.speed_quantile {
                self.speed_quantile += step * q;
                for (b, v) in self.bias.iter_mut().zip(estimate.iter()) {
                    *b += a * (v - *b);
                }
            } else {
                self.speed_quantile = (self.speed_quantile - step * (1.0 - q)).max(0.0);
            }
            let limit = self.settings.bias_limit * self.speed_quantile;
            let norm = self.bias.iter().map(|v| v * v).sum::<f64>().sqrt();
            if norm > limit {
                let k = if norm > 0.0 { limit / norm } else { 0.0 };
                self.bias.iter_mut().for_each(|b| *b *= k);
            }
        }
        for (v, b) in estimate.iter_mut().zip(&self.bias) {
            *v -= b;
        }
    }

    /// The velocity bias being subtracted (zeros with correction off).
    pub fn bias(&self) -> &[f64] {
        &self.bias
    }

    /// Tracked baseline over training baseline, across the channels in
    /// the decode whose training rate is above zero. Allocates: for status,
    /// not for the per-bin path.
    pub fn baseline_spread(&self) -> BaselineSpread {
        let mut r: Vec<f64> = (0..self.ref_mean.len())
            .filter(|&c| !self.left_out[c] && self.ref_mean[c] > 0.0)
            .map(|c| self.mean[c] / self.ref_mean[c])
            .collect();
        if r.is_empty() {
            return BaselineSpread::default();
        }
        r.sort_by(f64::total_cmp);
        BaselineSpread {
            min_ratio: r[0],
            median_ratio: r[r.len() / 2],
            max_ratio: r[r.len() - 1],
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn tracker(n: usize) -> DriftTracker {
        let s = DriftSettings {
            enabled: true,
            ..DriftSettings::default()
        };
        // 20 ms bins, training rate 0.5 count per bin (25 Hz).
        DriftTracker::new(
            s,
            BinWidth::from_ms(20.0).unwrap(),
            200,
            vec![0.5; n],
            None,
            2,
        )
    }

    #[test]
    fn a_silent_channel_leaves_after_the_dead_time_and_returns_after_the_restore_time() {
        let mut t = tracker(3);
        // 5 s at 20 ms = 250 bins of silence on channel 1.
        let mut left_at = None;
        for bin in 0..400u64 {
            let counts = [1u16, 0, (bin % 2) as u16];
            if t.observe(&counts, true) {
                left_at = Some(bin);
                assert_eq!(
                    t.changes(),
                    &[ChannelChange {
                        channel: 1,
                        left_out: Some(LeftOutReason::Dead)
                    }]
                );
                break;
            }
        }
        assert_eq!(left_at, Some(249), "dead after 250 silent bins");
        assert_eq!(t.n_left_out(), 1);
        // It fires again: back after 10 s (500 bins) of behaving, counting
        // from when its short-term rate is a quarter of training again.
        let mut back_at = None;
        for bin in 0..2000u64 {
            let counts = [1u16, 1, (bin % 2) as u16];
            if t.observe(&counts, true) {
                back_at = Some(bin);
                break;
            }
        }
        let back_at = back_at.expect("restored");
        assert!((500..600).contains(&back_at), "restored at bin {back_at}");
        assert_eq!(t.n_left_out(), 0);
    }

    #[test]
    fn a_baseline_follows_a_step_with_its_time_constant() {
        let mut t = tracker(1);
        // Counts of 2 per bin for one time constant (600 s = 30 000
        // bins): the mean moves 1 − e⁻¹ of the way from 0.5 to 2.
        for _ in 0..30_000 {
            t.observe(&[2], true);
        }
        let want = 0.5 + 1.5 * (1.0 - (-1.0f64).exp());
        assert!((t.mean[0] - want).abs() < 1e-3, "{} vs {want}", t.mean[0]);
        // Untracked (disarmed) bins leave it where it is.
        let before = t.mean[0];
        for _ in 0..100 {
            t.observe(&[9], false);
        }
        assert_eq!(t.mean[0], before);
    }

    #[test]
    fn the_bias_is_held_below_its_limit() {
        let mut t = tracker(1);
        t.settings.correct_bias = true;
        // A sustained intention to the right at constant speed: the bias
        // follows it, but never past a tenth of the quantile speed, which
        // settles on the speed itself (within its Robbins–Monro step).
        for _ in 0..200_000 {
            let mut v = [3.0, 0.0];
            t.correct_velocity(&mut v, true);
        }
        let b = t.bias()[0];
        assert!(b > 0.28 && b <= 0.1 * 3.0 * 1.001, "bias {b}");
    }

    #[test]
    fn a_bias_is_followed_only_when_correction_is_on() {
        // Off (the default), a sustained push leaves the estimate as
        // decoded and no bias is followed (status shows zeros).
        let mut off = tracker(1);
        assert!(!off.settings().correct_bias);
        let mut on = tracker(1);
        on.settings.correct_bias = true;
        for _ in 0..50_000 {
            let mut v = [3.0, -1.0];
            off.correct_velocity(&mut v, true);
            assert_eq!(v, [3.0, -1.0]);
            let mut v = [3.0, -1.0];
            on.correct_velocity(&mut v, true);
        }
        assert_eq!(off.bias(), &[0.0, 0.0]);
        assert!(on.bias()[0] > 0.1, "bias {:?}", on.bias());
    }

    #[test]
    fn bad_settings_name_their_key() {
        let s = DriftSettings {
            max_left_out: 1.5,
            ..DriftSettings::default()
        };
        assert_eq!(s.validate().unwrap_err().key, "drift.max_left_out");
    }
}
