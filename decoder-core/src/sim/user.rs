//! A simulated participant for closed-loop tests, in the spirit of
//! Cunningham et al. 2011: the channels fire from the simulator's tuning
//! model driven by the velocity the user *intends* — toward the target
//! from wherever the cursor is — while the cursor moves by the decoder's
//! commands. A decoder is then judged by what the user achieves with it
//! (success rate, time to target, path efficiency), not by how well it
//! reproduces recorded arm movements.
//!
//! The task is center-out with a hold: each trial starts with the cursor
//! at the center and a target on a ring; the trial succeeds when the cursor
//! stays inside the target window for the hold time, and fails at the
//! timeout. The user's intended velocity points at the target with a speed
//! that falls off near it (a proportional controller capped at a peak
//! speed), and is zero inside the window. Everything is seeded; time comes
//! in as bins.

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use crate::bin_width::BinWidth;
use crate::sim::drift::{Drift, DriftError, DriftOptions};
use crate::sim::reaching::SimChannels;

#[derive(Clone, Debug, PartialEq)]
pub struct TaskOptions {
    pub seed: u64,
    /// Whole milliseconds (spikes are drawn on a 1 ms grid).
    pub bin_width: BinWidth,
    pub n_trials: usize,
    /// Ring radius, cm.
    pub radius: f64,
    /// Acceptance radius around the target, cm.
    pub window: f64,
    pub hold_ms: f64,
    pub timeout_ms: f64,
    /// The user's intended speed: min(peak, gain · distance), cm/s.
    pub peak_speed: f64,
    pub speed_gain: f64,
    pub refractory_ms: usize,
    /// How a target is selected: by dwelling in it for `hold_ms`, or by a
    /// click while inside it (a click outside fails the trial).
    pub select: Selection,
}

/// How the task selects a target.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Selection {
    #[default]
    Dwell,
    Click,
}

impl Default for TaskOptions {
    fn default() -> Self {
        TaskOptions {
            seed: 1,
            bin_width: BinWidth::from_us(20_000).expect("20 ms"),
            n_trials: 16,
            radius: 10.0,
            window: 2.0,
            hold_ms: 300.0,
            timeout_ms: 6000.0,
            peak_speed: 25.0,
            speed_gain: 5.0,
            refractory_ms: 2,
            select: Selection::Dwell,
        }
    }
}

/// One trial's outcome.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct TrialResult {
    pub target: [f64; 2],
    pub success: bool,
    /// Seconds from the trial's start to the first entry into the window.
    pub time_to_target_s: Option<f64>,
    /// Straight distance to the window's edge over the path travelled
    /// until that first entry (1 is a straight line).
    pub path_efficiency: Option<f64>,
    /// Seconds until the hold was complete, or the timeout.
    pub trial_time_s: f64,
    /// The trial ended in a selection of the wrong place (a click outside
    /// the target), not a timeout.
    pub wrong_selection: bool,
}

#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct TaskSummary {
    pub trials: usize,
    pub success_rate: f64,
    /// Mean over successful trials.
    pub mean_time_to_target_s: Option<f64>,
    pub mean_path_efficiency: Option<f64>,
    /// Mean over all trials of the time to a completed hold, a failed
    /// trial counting its whole timeout: what the user waits per target.
    pub mean_trial_time_s: f64,
    /// Achieved bitrate, bits/s: log2(N − 1) · max(Sc − Si, 0) / t, with N
    /// the selectable targets, Sc and Si the correct and incorrect
    /// selections and t the whole time (from memory, as intracortical
    /// typing studies report it).
    pub bitrate_bps: f64,
    /// Fitts throughput, bits/s: the mean over successful trials of the
    /// index of difficulty log2(D/W + 1) over the trial's time (D the
    /// distance to the target, W its width; MacKenzie 1992).
    pub fitts_throughput_bps: Option<f64>,
}

/// Targets on the ring (the task draws one of eight directions).
pub const N_TARGETS: usize = 8;

/// Spikes from intended velocity, every millisecond with a refractory
/// period, as the simulator draws them.
pub struct SimulatedUser {
    channels: SimChannels,
    rng: ChaCha8Rng,
    refractory_left: Vec<usize>,
    bin_ms: usize,
    refractory_ms: usize,
    /// A world that changes as the session goes on, if any.
    drift: Option<Drift>,
    factors: Vec<f64>,
    bins_done: usize,
    seed: u64,
    /// The array's click channels and their rate factor during an
    /// attempt (empty: the user never attempts a click).
    click_channels: Vec<bool>,
    click_gain: f64,
}

impl SimulatedUser {
    pub fn new(channels: SimChannels, options: &TaskOptions) -> SimulatedUser {
        let n = channels.beta.len();
        SimulatedUser {
            channels,
            rng: ChaCha8Rng::seed_from_u64(options.seed ^ 0x005E_ED0F_0CE5),
            refractory_left: vec![0; n],
            bin_ms: options.bin_width.whole_ms().unwrap_or(1).max(1) as usize,
            refractory_ms: options.refractory_ms,
            drift: None,
            factors: vec![1.0; n],
            bins_done: 0,
            seed: options.seed,
            click_channels: Vec::new(),
            click_gain: 1.0,
        }
    }

    /// The same user able to attempt clicks with the array's click
    /// channels (those `simulate --click` modulates, for the same array
    /// seed), which fire at `gain` times their rate during an attempt.
    pub fn with_clicks(mut self, click_channels: Vec<bool>, gain: f64) -> SimulatedUser {
        self.click_channels = click_channels;
        self.click_gain = gain;
        self
    }

    /// The same user in a world that drifts from the first bin on: its
    /// channels' preferred directions turned, their rates ramping, some
    /// silent or noisy in their windows ([`crate::sim::drift`]).
    pub fn with_drift(mut self, options: &DriftOptions) -> Result<SimulatedUser, DriftError> {
        let drift = Drift::draw(options, self.channels.beta.len(), self.seed)?;
        self.channels.beta = drift.turn(&self.channels.beta);
        self.drift = Some(drift);
        Ok(self)
    }

    /// The same user with the world's clock starting `minutes` into the
    /// day: a changing world ([`SimulatedUser::with_drift`]) is as it is
    /// then, so a later hour of one simulated day can be run on its own.
    pub fn starting_at_minute(mut self, minutes: f64) -> SimulatedUser {
        self.bins_done = (minutes * 60_000.0 / self.bin_ms as f64).round() as usize;
        self
    }

    pub fn n_channels(&self) -> usize {
        self.channels.beta.len()
    }

    /// The counts of one bin during which the user intends `velocity`.
    pub fn bin_counts(&mut self, velocity: [f64; 2], out: &mut [u16]) {
        self.bin_counts_attempting(velocity, false, out);
    }

    /// The counts of one bin, the user attempting a click or not.
    pub fn bin_counts_attempting(&mut self, velocity: [f64; 2], attempting: bool, out: &mut [u16]) {
        out.fill(0);
        let bin_start_ms = (self.bins_done * self.bin_ms) as f64;
        self.bins_done += 1;
        if let Some(d) = self.drift.as_mut() {
            d.bin_factors(bin_start_ms, &mut self.factors);
        }
        for j in 0..self.bin_ms {
            for (ch, count) in out.iter_mut().enumerate() {
                if self.refractory_left[ch] > 0 {
                    self.refractory_left[ch] -= 1;
                    continue;
                }
                let b = self.channels.beta[ch];
                let mut rate_hz =
                    (self.channels.log_baseline[ch] + b[0] * velocity[0] + b[1] * velocity[1])
                        .exp();
                if attempting && self.click_channels.get(ch).copied().unwrap_or(false) {
                    rate_hz *= self.click_gain;
                }
                if let Some(d) = &self.drift {
                    rate_hz = d.rate_hz(ch, bin_start_ms + j as f64, rate_hz, self.factors[ch]);
                }
                if self.rng.random::<f64>() < (rate_hz / 1000.0).min(1.0) {
                    *count = count.saturating_add(1);
                    self.refractory_left[ch] = self.refractory_ms;
                }
            }
        }
    }
}

/// The center-out task and its bookkeeping.
pub struct CenterOut {
    options: TaskOptions,
    rng: ChaCha8Rng,
    cursor: [f64; 2],
    target: [f64; 2],
    trial_bins: usize,
    hold_bins: usize,
    path: f64,
    first_entry: Option<(f64, f64)>,
    results: Vec<TrialResult>,
}

impl CenterOut {
    pub fn new(options: TaskOptions) -> CenterOut {
        let mut t = CenterOut {
            rng: ChaCha8Rng::seed_from_u64(options.seed),
            options,
            cursor: [0.0, 0.0],
            target: [0.0, 0.0],
            trial_bins: 0,
            hold_bins: 0,
            path: 0.0,
            first_entry: None,
            results: Vec::new(),
        };
        t.next_trial();
        t
    }

    fn next_trial(&mut self) {
        let direction = self.rng.random_range(0..8) as f64 * std::f64::consts::PI / 4.0;
        self.target = [
            self.options.radius * direction.cos(),
            self.options.radius * direction.sin(),
        ];
        self.cursor = [0.0, 0.0];
        self.trial_bins = 0;
        self.hold_bins = 0;
        self.path = 0.0;
        self.first_entry = None;
    }

    pub fn cursor(&self) -> [f64; 2] {
        self.cursor
    }

    pub fn target(&self) -> [f64; 2] {
        self.target
    }

    /// Index of the trial in progress.
    pub fn trial(&self) -> usize {
        self.results.len()
    }

    pub fn done(&self) -> bool {
        self.results.len() >= self.options.n_trials
    }

    fn distance(&self) -> f64 {
        let d = [
            self.target[0] - self.cursor[0],
            self.target[1] - self.cursor[1],
        ];
        d[0].hypot(d[1])
    }

    pub fn inside(&self) -> bool {
        self.distance() <= self.options.window
    }

    /// Whether the user is attempting a click now: selecting by click, and
    /// inside the target.
    pub fn attempting_click(&self) -> bool {
        self.options.select == Selection::Click && self.inside()
    }

    /// What the user intends now.
    pub fn intended_velocity(&self) -> [f64; 2] {
        let dist = self.distance();
        if dist <= self.options.window || dist == 0.0 {
            return [0.0, 0.0];
        }
        let speed = (self.options.speed_gain * dist).min(self.options.peak_speed);
        [
            (self.target[0] - self.cursor[0]) / dist * speed,
            (self.target[1] - self.cursor[1]) / dist * speed,
        ]
    }

    /// Moves the cursor by one bin of `command` (cm/s) and scores the
    /// trial; returns the finished trial's result when one ends.
    pub fn advance(&mut self, command: [f64; 2]) -> Option<TrialResult> {
        self.advance_with(command, false)
    }

    /// [`CenterOut::advance`] with whether the decoder clicked at this
    /// bin: when selecting by click, a click ends the trial — a success
    /// inside the target, a failure outside.
    pub fn advance_with(&mut self, command: [f64; 2], clicked: bool) -> Option<TrialResult> {
        let dt = self.options.bin_width.seconds();
        let step = [command[0] * dt, command[1] * dt];
        if step[0].is_finite() && step[1].is_finite() {
            self.cursor[0] += step[0];
            self.cursor[1] += step[1];
            self.path += step[0].hypot(step[1]);
        }
        self.trial_bins += 1;
        let elapsed_s = self.trial_bins as f64 * dt;
        if self.inside() {
            if self.first_entry.is_none() {
                let straight = (self.options.radius - self.options.window).max(0.0);
                self.first_entry = Some((elapsed_s, straight / self.path.max(straight).max(1e-9)));
            }
            self.hold_bins += 1;
        } else {
            self.hold_bins = 0;
        }
        let (held, clicked_outside) = match self.options.select {
            Selection::Dwell => (
                self.hold_bins as f64 * self.options.bin_width.ms() >= self.options.hold_ms,
                false,
            ),
            Selection::Click => (clicked && self.inside(), clicked && !self.inside()),
        };
        let timed_out = elapsed_s * 1000.0 >= self.options.timeout_ms;
        if !(held || clicked_outside || timed_out) {
            return None;
        }
        let result = TrialResult {
            target: self.target,
            success: held,
            time_to_target_s: self.first_entry.map(|e| e.0).filter(|_| held),
            path_efficiency: self.first_entry.map(|e| e.1).filter(|_| held),
            trial_time_s: elapsed_s,
            wrong_selection: clicked_outside,
        };
        self.results.push(result.clone());
        if !self.done() {
            self.next_trial();
        }
        Some(result)
    }

    pub fn results(&self) -> &[TrialResult] {
        &self.results
    }

    pub fn summary(&self) -> TaskSummary {
        let ok: Vec<&TrialResult> = self.results.iter().filter(|r| r.success).collect();
        let mean = |f: &dyn Fn(&TrialResult) -> Option<f64>| {
            let v: Vec<f64> = ok.iter().filter_map(|r| f(r)).collect();
            (!v.is_empty()).then(|| v.iter().sum::<f64>() / v.len() as f64)
        };
        TaskSummary {
            trials: self.results.len(),
            success_rate: ok.len() as f64 / self.results.len().max(1) as f64,
            mean_time_to_target_s: mean(&|r| r.time_to_target_s),
            mean_path_efficiency: mean(&|r| r.path_efficiency),
            mean_trial_time_s: self.results.iter().map(|r| r.trial_time_s).sum::<f64>()
                / self.results.len().max(1) as f64,
            bitrate_bps: {
                let correct = ok.len() as f64;
                let wrong = self.results.iter().filter(|r| r.wrong_selection).count() as f64;
                let t: f64 = self.results.iter().map(|r| r.trial_time_s).sum();
                if t > 0.0 {
                    ((N_TARGETS - 1) as f64).log2() * (correct - wrong).max(0.0) / t
                } else {
                    0.0
                }
            },
            fitts_throughput_bps: {
                let id = (self.options.radius / (2.0 * self.options.window) + 1.0).log2();
                let rates: Vec<f64> = ok.iter().map(|r| id / r.trial_time_s).collect();
                (!rates.is_empty()).then(|| rates.iter().sum::<f64>() / rates.len() as f64)
            },
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_perfect_decoder_reaches_every_target_straight() {
        let mut task = CenterOut::new(TaskOptions::default());
        while !task.done() {
            let v = task.intended_velocity();
            task.advance(v);
        }
        let s = task.summary();
        assert_eq!(s.success_rate, 1.0);
        assert!(s.mean_path_efficiency.unwrap() > 0.95, "{s:?}");
        // Every trial a correct selection: log2(7) bits a trial.
        let t: f64 = task.results().iter().map(|r| r.trial_time_s).sum();
        let want = 7f64.log2() * 16.0 / t;
        assert!((s.bitrate_bps - want).abs() < 1e-12, "{s:?}");
    }

    /// Selecting by click: a click inside the target is a success at that
    /// bin, one outside a failure; dwelling alone selects nothing.
    #[test]
    fn a_click_selects_inside_the_target_and_fails_outside() {
        let options = TaskOptions {
            n_trials: 3,
            select: Selection::Click,
            ..TaskOptions::default()
        };
        let mut task = CenterOut::new(options);
        // Trial 0: a click on the way out fails it.
        assert!(!task.attempting_click());
        let r = task
            .advance_with([0.0, 0.0], true)
            .expect("a click outside ends the trial");
        assert!(!r.success);
        // Trial 1: reach the target, dwell well past hold_ms: no success
        // until the click.
        for _ in 0..200 {
            let v = task.intended_velocity();
            assert!(task.advance_with(v, false).is_none());
            if task.inside() {
                break;
            }
        }
        assert!(task.inside() && task.attempting_click());
        for _ in 0..40 {
            assert!(task.advance_with([0.0, 0.0], false).is_none());
        }
        let r = task
            .advance_with([0.0, 0.0], true)
            .expect("a click inside ends the trial");
        assert!(r.success);
        assert_eq!(task.results().len(), 2);
    }

    #[test]
    fn a_still_cursor_times_out() {
        let mut task = CenterOut::new(TaskOptions {
            n_trials: 2,
            timeout_ms: 1000.0,
            ..TaskOptions::default()
        });
        while !task.done() {
            task.advance([0.0, 0.0]);
        }
        assert_eq!(task.summary().success_rate, 0.0);
    }

    #[test]
    fn intended_rates_follow_the_tuning() {
        let channels = crate::sim::reaching::population(1, 8);
        let mut user = SimulatedUser::new(channels.clone(), &TaskOptions::default());
        // Channel 0 fires more moving along its preferred direction.
        let b = channels.beta[0];
        let norm = b[0].hypot(b[1]);
        let along = [b[0] / norm * 20.0, b[1] / norm * 20.0];
        let against = [-along[0], -along[1]];
        let mut counts = vec![0u16; 8];
        let (mut with, mut without) = (0u64, 0u64);
        for _ in 0..500 {
            user.bin_counts(along, &mut counts);
            with += u64::from(counts[0]);
            user.bin_counts(against, &mut counts);
            without += u64::from(counts[0]);
        }
        assert!(with > without, "{with} vs {without}");
    }
}
