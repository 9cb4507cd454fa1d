//! The safety supervisor: turns a decoded estimate into the command an
//! actuator may follow, and owns the states disarmed, armed, coasting and
//! halted (PROTOCOL.md §2).
//!
//! It is the last thing between the decoder and a device attached to a
//! person, so its rules are few and strict: the command is zero unless the
//! state is armed or coasting; it is never NaN or infinite; its speed never
//! exceeds `max_speed` and its change per bin never exceeds
//! `max_accel · bin`, also when stopping (a controlled stop at the
//! acceleration limit, so the acceleration bound of PROTOCOL.md §2 holds for every
//! packet). Any doubt — missing bins beyond the coast limit, a non-finite
//! estimate, a numerical fault, a new stream — halts, and only an operator
//! re-arms.

use serde::{Deserialize, Serialize};

use crate::wire::packet::{FLAG_ACCEL_CLAMPED, FLAG_SPEED_CLAMPED};

/// The supervisor state, with its wire value (PROTOCOL.md §2).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum SupervisorState {
    Disarmed = 0,
    Armed = 1,
    Coasting = 2,
    Halted = 3,
}

impl SupervisorState {
    pub fn wire(self) -> u8 {
        self as u8
    }

    pub fn name(self) -> &'static str {
        match self {
            SupervisorState::Disarmed => "disarmed",
            SupervisorState::Armed => "armed",
            SupervisorState::Coasting => "coasting",
            SupervisorState::Halted => "halted",
        }
    }
}

/// Why the state changed; recorded and logged with every transition.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case", tag = "reason")]
pub enum TransitionReason {
    /// `--arm` on the command line (bench use).
    ArmedAtStart,
    OperatorArm,
    OperatorDisarm,
    OperatorHalt,
    /// A bin is missing while armed: the command coasts.
    BinMissing,
    /// Bins arrive again after coasting.
    BinsResumed,
    /// More consecutive bins missing than may be coasted.
    TooManyMissing {
        missing: u32,
    },
    /// The decoder reported a numerical fault or a non-finite estimate.
    NumericalFault,
    /// The sender's seq went back (or far ahead): a new stream.
    NewStream,
    /// Drift handling left out more channels than `drift.max_left_out`
    /// allows.
    TooManyLeftOut {
        left_out: u32,
        channels: u32,
    },
}

impl std::fmt::Display for TransitionReason {
    /// The reason in words, as logs and status show it.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            TransitionReason::ArmedAtStart => write!(f, "armed at start with --arm"),
            TransitionReason::OperatorArm => write!(f, "operator arm"),
            TransitionReason::OperatorDisarm => write!(f, "operator disarm"),
            TransitionReason::OperatorHalt => write!(f, "operator halt"),
            TransitionReason::BinMissing => write!(f, "bin missing"),
            TransitionReason::BinsResumed => write!(f, "bins resumed"),
            TransitionReason::TooManyMissing { missing } => {
                write!(f, "{missing} bins missing in a row")
            }
            TransitionReason::NumericalFault => write!(f, "numerical fault in the decoder"),
            TransitionReason::NewStream => write!(f, "new stream (seq jumped)"),
            TransitionReason::TooManyLeftOut { left_out, channels } => write!(
                f,
                "{left_out} of {channels} channels left out as dead or noisy, more than drift.max_left_out allows"
            ),
        }
    }
}

/// One state change.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Transition {
    pub seq: u64,
    pub from: SupervisorState,
    pub to: SupervisorState,
    pub reason: TransitionReason,
}

/// The limits, validated by whoever builds them (the daemon's config).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SafetyLimits {
    /// Largest command speed (Euclidean norm over the output dims), in the
    /// model's velocity units.
    pub max_speed: f64,
    /// Largest change of command per second, in velocity units per second.
    pub max_accel: f64,
    /// Consecutive missing bins that may be coasted; one more halts.
    pub max_coast_bins: u32,
    /// Factor applied to the command for each coasted bin (0..=1).
    pub coast_decay: f64,
    /// Bin width (turns `max_accel` into a per-bin step); f64 seconds on
    /// disk.
    #[serde(with = "crate::bin_width::as_seconds", rename = "bin_s")]
    pub bin_width: crate::bin_width::BinWidth,
}

/// What the supervisor decided for one bin.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Supervised {
    pub state: SupervisorState,
    /// [`FLAG_SPEED_CLAMPED`] and [`FLAG_ACCEL_CLAMPED`] as they apply.
    pub flags: u32,
    pub transition: Option<Transition>,
}

/// The safety state machine between the decoder and the actuator:
/// disarmed, armed, coasting or halted, with the operator's arm, disarm and
/// halt, and the rules that halt on their own (a non-finite estimate, too
/// many missing bins, a new stream). It turns each estimate into the
/// command actually sent: zero unless armed, clamped to the speed limit,
/// slewed to the acceleration limit, decayed while coasting, and ramped to
/// zero on a stop. When in doubt it commands zero.
#[derive(Clone, Debug)]
pub struct Supervisor {
    limits: SafetyLimits,
    state: SupervisorState,
    command: Vec<f64>,
    target: Vec<f64>,
    consecutive_missing: u32,
}

/// Why an operator's arm was refused.
#[derive(Clone, Copy, Debug, PartialEq, Eq, thiserror::Error)]
pub enum ArmRefused {
    #[error("no bins have arrived yet; start the front end, then arm")]
    NoStream,
    #[error("the last {missing} bins did not arrive; arm once the front end is streaming again")]
    StreamStale { missing: u32 },
    #[error("already {0}")]
    AlreadyActive(&'static str),
    #[error(
        "{left_out} of {channels} channels are left out as dead or noisy; check the array's connections and the front end, or retrain on the channels that remain"
    )]
    TooManyLeftOut { left_out: u32, channels: u32 },
    #[error(
        "drift handling follows spike counts (baselines, silence, saturation) and the running model decodes continuous features; it stays off"
    )]
    DriftNeedsCounts,
}

impl Supervisor {
    pub fn new(limits: SafetyLimits, dims: usize, armed: bool) -> Supervisor {
        Supervisor {
            limits,
            state: if armed {
                SupervisorState::Armed
            } else {
                SupervisorState::Disarmed
            },
            command: vec![0.0; dims],
            target: vec![0.0; dims],
            consecutive_missing: 0,
        }
    }

    pub fn state(&self) -> SupervisorState {
        self.state
    }

    pub fn limits(&self) -> &SafetyLimits {
        &self.limits
    }

    /// The command of the last bin.
    pub fn command(&self) -> &[f64] {
        &self.command
    }

    pub fn consecutive_missing(&self) -> u32 {
        self.consecutive_missing
    }

    fn go(
        &mut self,
        seq: u64,
        to: SupervisorState,
        reason: TransitionReason,
    ) -> Option<Transition> {
        if self.state == to {
            return None;
        }
        let t = Transition {
            seq,
            from: self.state,
            to,
            reason,
        };
        self.state = to;
        Some(t)
    }

    /// An operator's arm. `stream_started` says whether any bin has come.
    pub fn arm(&mut self, seq: u64, stream_started: bool) -> Result<Transition, ArmRefused> {
        match self.state {
            SupervisorState::Armed | SupervisorState::Coasting => {
                return Err(ArmRefused::AlreadyActive(self.state.name()));
            }
            _ => {}
        }
        if !stream_started {
            return Err(ArmRefused::NoStream);
        }
        if self.consecutive_missing > 0 {
            return Err(ArmRefused::StreamStale {
                missing: self.consecutive_missing,
            });
        }
        Ok(self
            .go(seq, SupervisorState::Armed, TransitionReason::OperatorArm)
            .expect("state differs"))
    }

    pub fn disarm(&mut self, seq: u64) -> Option<Transition> {
        self.go(
            seq,
            SupervisorState::Disarmed,
            TransitionReason::OperatorDisarm,
        )
    }

    pub fn halt(&mut self, seq: u64, reason: TransitionReason) -> Option<Transition> {
        self.go(seq, SupervisorState::Halted, reason)
    }

    /// Supervises one bin slot. `estimate` is the decoder's output (from
    /// counts, or a prediction when `bin_missing`); `fault` says the decoder
    /// could not produce a usable estimate.
    pub fn on_bin(
        &mut self,
        seq: u64,
        estimate: &[f64],
        bin_missing: bool,
        fault: bool,
    ) -> Supervised {
        let finite = estimate.iter().all(|v| v.is_finite());
        let mut transition = None;
        if bin_missing {
            self.consecutive_missing = self.consecutive_missing.saturating_add(1);
        } else {
            self.consecutive_missing = 0;
        }
        if fault || !finite {
            transition = self.halt(seq, TransitionReason::NumericalFault);
        } else if bin_missing {
            let active = matches!(
                self.state,
                SupervisorState::Armed | SupervisorState::Coasting
            );
            if active && self.consecutive_missing > self.limits.max_coast_bins {
                transition = self.halt(
                    seq,
                    TransitionReason::TooManyMissing {
                        missing: self.consecutive_missing,
                    },
                );
            } else if self.state == SupervisorState::Armed {
                transition = self.go(seq, SupervisorState::Coasting, TransitionReason::BinMissing);
            }
        } else if self.state == SupervisorState::Coasting {
            transition = self.go(seq, SupervisorState::Armed, TransitionReason::BinsResumed);
        }

        match self.state {
            SupervisorState::Armed => self.target.copy_from_slice(estimate),
            SupervisorState::Coasting => {
                for (t, c) in self.target.iter_mut().zip(&self.command) {
                    *t = c * self.limits.coast_decay;
                }
            }
            SupervisorState::Disarmed | SupervisorState::Halted => self.target.fill(0.0),
        }
        let flags = self.limit_toward_target();
        Supervised {
            state: self.state,
            flags,
            transition,
        }
    }

    /// Moves the command toward the target within the speed and
    /// acceleration limits; returns the clamp flags.
    fn limit_toward_target(&mut self) -> u32 {
        let mut flags = 0;
        let speed = norm(&self.target);
        if speed > self.limits.max_speed {
            let s = self.limits.max_speed / speed;
            self.target.iter_mut().for_each(|t| *t *= s);
            flags |= FLAG_SPEED_CLAMPED;
        }
        let max_step = self.limits.max_accel * self.limits.bin_width.seconds();
        let step: f64 = self
            .target
            .iter()
            .zip(&self.command)
            .map(|(t, c)| (t - c) * (t - c))
            .sum::<f64>()
            .sqrt();
        if step > max_step {
            let s = max_step / step;
            for (c, t) in self.command.iter_mut().zip(&self.target) {
                *c += (t - *c) * s;
            }
            flags |= FLAG_ACCEL_CLAMPED;
        } else {
            self.command.copy_from_slice(&self.target);
        }
        // Rounding in the scaling above must not leave the command a hair
        // over the speed limit.
        let speed = norm(&self.command);
        if speed > self.limits.max_speed {
            let s = self.limits.max_speed / speed;
            self.command.iter_mut().for_each(|c| *c *= s);
        }
        flags
    }
}

fn norm(v: &[f64]) -> f64 {
    v.iter().map(|x| x * x).sum::<f64>().sqrt()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn limits() -> SafetyLimits {
        SafetyLimits {
            max_speed: 10.0,
            max_accel: 100.0,
            max_coast_bins: 5,
            coast_decay: 0.5,
            bin_width: crate::bin_width::BinWidth::from_us(20_000).unwrap(),
        }
    }

    #[test]
    fn disarmed_commands_zero() {
        let mut s = Supervisor::new(limits(), 2, false);
        let out = s.on_bin(0, &[1.0, 1.0], false, false);
        assert_eq!(out.state, SupervisorState::Disarmed);
        assert_eq!(s.command(), &[0.0, 0.0]);
    }

    #[test]
    fn speed_and_accel_are_limited() {
        let mut s = Supervisor::new(limits(), 2, true);
        // max step per bin = 100 × 0.02 = 2.
        let out = s.on_bin(0, &[30.0, 40.0], false, false);
        assert_eq!(out.flags, FLAG_SPEED_CLAMPED | FLAG_ACCEL_CLAMPED);
        assert!((norm(s.command()) - 2.0).abs() < 1e-12);
        for seq in 1..20 {
            s.on_bin(seq, &[30.0, 40.0], false, false);
        }
        assert!((s.command()[0] - 6.0).abs() < 1e-9 && (s.command()[1] - 8.0).abs() < 1e-9);
    }

    #[test]
    fn coasting_then_halt_after_the_limit() {
        let mut s = Supervisor::new(limits(), 1, true);
        for seq in 0..10 {
            s.on_bin(seq, &[1.0], false, false);
        }
        for k in 1..=5 {
            let out = s.on_bin(9 + k, &[1.0], true, false);
            assert_eq!(out.state, SupervisorState::Coasting, "miss {k}");
        }
        assert!((s.command()[0] - 0.5f64.powi(5)).abs() < 1e-12);
        let out = s.on_bin(15, &[1.0], true, false);
        assert_eq!(out.state, SupervisorState::Halted);
        assert_eq!(
            out.transition.unwrap().reason,
            TransitionReason::TooManyMissing { missing: 6 }
        );
        let out = s.on_bin(16, &[1.0], false, false);
        assert_eq!(out.state, SupervisorState::Halted);
        assert_eq!(s.command(), &[0.0]);
    }

    #[test]
    fn bins_resuming_end_coasting() {
        let mut s = Supervisor::new(limits(), 1, true);
        s.on_bin(0, &[1.0], false, false);
        assert_eq!(
            s.on_bin(1, &[1.0], true, false).state,
            SupervisorState::Coasting
        );
        let out = s.on_bin(2, &[1.0], false, false);
        assert_eq!(out.state, SupervisorState::Armed);
        assert_eq!(
            out.transition.unwrap().reason,
            TransitionReason::BinsResumed
        );
    }

    #[test]
    fn non_finite_estimate_halts_and_command_stays_finite() {
        let mut s = Supervisor::new(limits(), 2, true);
        s.on_bin(0, &[1.0, 1.0], false, false);
        let out = s.on_bin(1, &[f64::NAN, 0.0], false, false);
        assert_eq!(out.state, SupervisorState::Halted);
        assert!(s.command().iter().all(|c| c.is_finite()));
        let out = s.on_bin(2, &[f64::INFINITY, 0.0], false, false);
        assert_eq!(out.state, SupervisorState::Halted);
        assert_eq!(s.command(), &[0.0, 0.0]);
    }

    #[test]
    fn arm_refused_without_a_live_stream() {
        let mut s = Supervisor::new(limits(), 1, false);
        assert_eq!(s.arm(0, false), Err(ArmRefused::NoStream));
        s.on_bin(0, &[0.0], true, false);
        assert_eq!(s.arm(1, true), Err(ArmRefused::StreamStale { missing: 1 }));
        s.on_bin(1, &[0.0], false, false);
        assert!(s.arm(2, true).is_ok());
        assert!(matches!(s.arm(3, true), Err(ArmRefused::AlreadyActive(_))));
    }

    #[test]
    fn a_stop_is_a_controlled_ramp() {
        let mut s = Supervisor::new(limits(), 1, true);
        for seq in 0..10 {
            s.on_bin(seq, &[10.0], false, false);
        }
        assert_eq!(s.command(), &[10.0]);
        s.halt(10, TransitionReason::OperatorHalt);
        let out = s.on_bin(10, &[10.0], false, false);
        assert_eq!(out.flags, FLAG_ACCEL_CLAMPED);
        assert!((s.command()[0] - 8.0).abs() < 1e-12);
        for seq in 11..20 {
            s.on_bin(seq, &[10.0], false, false);
        }
        assert_eq!(s.command(), &[0.0]);
    }
}
