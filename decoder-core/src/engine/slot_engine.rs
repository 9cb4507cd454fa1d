//! The bin-slot engine: the daemon's whole per-bin logic with time as data.
//!
//! The daemon reads a datagram, notes the monotonic time, and hands both to
//! a [`SlotEngine`]; when nothing arrives it hands over the time alone. The
//! engine parses the bin (PROTOCOL.md §1), keeps the bin clock, decides for every
//! slot whether it is decoded from counts or answered with a predict-only
//! step, runs the supervisor and encodes the velocity packet (PROTOCOL.md §2). It
//! reads no clock and touches no socket, so feeding it the recorded
//! datagrams and times of a session gives back the recorded packets bit for
//! bit — this is what offline replay of a session log does.
//!
//! The bin clock: the first accepted bin fixes `t0` (its arrival time) and
//! `seq0`; bin k is due at `t0 + (k − seq0)·bin + slack`. With
//! `clock_tracking` > 0 each bin that arrives on time nudges `t0` by that
//! fraction of its offset (limited to ± slack), so a front end whose clock
//! runs a few ppm from ours does not drift into the late zone over an hour.
//! Bins ahead of the expected one (within the reorder window) wait for their
//! slot; a bin for a slot already answered is late (it was coasted) or a
//! duplicate (it was decoded). A seq outside the window either way is
//! dropped — late if it is from this stream's past, a stray otherwise —
//! unless it follows the previous such bin in seq *and* came at least half
//! a bin after it: then the sender has restarted at its own pace, and a new
//! stream begins with that bin (decoder reset, supervisor halted). A single
//! stale or foreign packet never resets the decoder, and neither does the
//! burst of queued bins the socket delivers after the daemon was stalled
//! for longer than the window.
//!
//! Ordering rule, the same live and offline: before a datagram received at
//! `recv_ns` is looked at, every slot whose deadline is earlier than
//! `recv_ns` is answered; a timeout at `now` answers every slot due at or
//! before `now`.

use serde::{Deserialize, Serialize};

use crate::bin_width::BinWidth;
use crate::decoders::click::ClickGate;
use crate::engine::drift::{DriftSettings, LeftOutReason};
use crate::engine::pipeline::DecodePipeline;
use crate::engine::supervisor::{
    ArmRefused, SafetyLimits, Supervisor, SupervisorState, Transition, TransitionReason,
};
use crate::wire::packet::{
    self, BinKind, BinValues, FLAG_BIN_MISSING, FLAG_CLICK, FLAG_MODEL_CHANGED, N_REJECT_REASONS,
    RejectReason, VelocityFields,
};

/// Everything that shapes the engine's decisions; recorded in the session
/// log header so a replay decides the same way.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct EngineSettings {
    /// Bin width (from the model); u64 ns on disk.
    #[serde(with = "crate::bin_width::as_ns", rename = "bin_ns")]
    pub bin_width: BinWidth,
    /// How long after a bin's nominal time its slot waits before coasting.
    pub deadline_slack_ns: u64,
    /// Bins ahead of (or behind) the expected seq that are still this
    /// stream; beyond it a seq starts a new stream.
    pub reorder_window: u32,
    /// Fraction (0..=0.5) of an on-time bin's arrival offset folded into t0.
    pub clock_tracking: f64,
    pub limits: SafetyLimits,
    /// Start armed (`--arm`, bench use).
    pub armed_at_start: bool,
    /// A channel with no counts for this many bins is reported dead.
    pub dead_channel_bins: u64,
    /// A count at or above this in one bin marks the channel saturated.
    pub saturation_count: u16,
    /// When the click probability makes a click (logs written before
    /// clicks existed read as the defaults).
    #[serde(default)]
    pub click_gate: ClickGateSettings,
    /// Drift handling (`[drift]`); the operator's `drift on|off` changes
    /// `enabled` while running (logs written before it read as off).
    #[serde(default)]
    pub drift: DriftSettings,
}

/// The click gate's settings: a click when the probability stays at or
/// above `threshold` for `hold_bins` bins while armed, then none for
/// `refractory_ms`.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct ClickGateSettings {
    pub threshold: f64,
    pub hold_bins: u32,
    pub refractory_ms: f64,
    /// No click while the command is faster than this (position units
    /// per second); 0 turns the rule off.
    #[serde(default)]
    pub max_speed: f64,
}

impl Default for ClickGateSettings {
    fn default() -> Self {
        ClickGateSettings {
            threshold: 0.9,
            hold_bins: 5,
            refractory_ms: 500.0,
            max_speed: 0.0,
        }
    }
}

impl ClickGateSettings {
    /// The gate at `bin_width`.
    pub fn gate(&self, bin_width: BinWidth) -> ClickGate {
        ClickGate::new(
            self.threshold,
            self.hold_bins as usize,
            (self.refractory_ms / bin_width.ms()).ceil() as usize,
        )
    }
}

/// Per-slot facts for the daemon's monitoring and recording.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct SlotAnswer {
    pub seq: u64,
    /// When the bin's datagram was read, 0 for a missing bin.
    pub recv_ns: u64,
    pub origin_ns: u64,
    /// The time the decision was made on: the datagram's `recv_ns`, or the
    /// timeout's `now` for a slot answered at its deadline.
    pub decided_ns: u64,
    /// When this slot fell due (nominal time plus slack).
    pub deadline_ns: u64,
    pub state: SupervisorState,
    pub flags: u32,
}

/// Things worth a log line and a record, none of them per-bin routine.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
#[serde(tag = "event", rename_all = "snake_case")]
pub enum EngineEvent {
    StreamStarted {
        seq: u64,
        t0_ns: u64,
    },
    NewStream {
        expected_seq: u64,
        seq: u64,
    },
    Transition(Transition),
    #[serde(serialize_with = "reject_as_text")]
    Rejected(RejectReason),
    Late {
        seq: u64,
    },
    Duplicate {
        seq: u64,
    },
    Stray {
        seq: u64,
    },
    ModelChanged {
        seq: u64,
    },
    /// Drift handling left a channel out of the decode.
    ChannelLeftOut {
        seq: u64,
        channel: u32,
        reason: LeftOutReason,
    },
    /// A channel left out behaves again and is back in the decode.
    ChannelRestored {
        seq: u64,
        channel: u32,
    },
    /// The operator turned drift handling on or off.
    DriftHandling {
        seq: u64,
        enabled: bool,
    },
}

fn reject_as_text<S: serde::Serializer>(r: &RejectReason, s: S) -> Result<S::Ok, S::Error> {
    use serde::ser::SerializeMap;
    let mut m = s.serialize_map(Some(2))?;
    m.serialize_entry("reason", r.name())?;
    m.serialize_entry("detail", &r.to_string())?;
    m.end()
}

/// Where the engine's output goes: the daemon sends and records, a replay
/// compares or collects.
pub trait SlotSink {
    /// The velocity packet for one slot, with `sent_ns` still 0 (the sender
    /// patches it just before sending).
    fn answer(&mut self, packet: &mut [u8], slot: &SlotAnswer);
    fn event(&mut self, event: &EngineEvent);
    /// A bin decoded from its counts, just before its slot is answered:
    /// the counts and the estimate decoded from them (for the daemon's
    /// online adaptation; nothing else needs them). Not called for a bin of
    /// features: adaptation refits from counts.
    fn decoded(&mut self, _seq: u64, _counts: &[u16], _estimate: &[f64]) {}
}

/// Counters of the stream, all since start.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct EngineCounters {
    pub datagrams: u64,
    pub bins_decoded: u64,
    pub slots_answered: u64,
    /// Slots answered with a predict-only step because the bin did not come.
    pub bins_missing: u64,
    pub bins_late: u64,
    pub bins_duplicate: u64,
    /// Bins outside the reorder window not (yet) confirmed as a new stream.
    pub bins_stray: u64,
    /// Bins waiting for their slot when a new stream began, discarded.
    pub bins_flushed: u64,
    pub rejected: u64,
    pub rejected_by_reason: [u64; N_REJECT_REASONS],
    pub new_streams: u64,
    pub numerical_faults: u64,
    pub model_changes: u64,
    pub transitions: u64,
    /// Channels drift handling left out, and restored, since start.
    #[serde(default)]
    pub channels_left_out: u64,
    #[serde(default)]
    pub channels_restored: u64,
}

/// An operator's request, as the control socket delivers it.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum OperatorCommand {
    Arm,
    Disarm,
    Halt,
    /// Drift handling on (`ctl drift on`).
    DriftOn,
    /// Drift handling off (`ctl drift off`).
    DriftOff,
}

/// Why a model could not be swapped in.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum SwapRefused {
    #[error(
        "the new model expects {new} channels but the running stream has {running}; load a model trained for this array"
    )]
    Channels { new: usize, running: usize },
    #[error(
        "the new model has {new} bins but the running stream has {running} bins; retrain at the stream's bin width"
    )]
    BinWidth { new: BinWidth, running: BinWidth },
    #[error(
        "the new model outputs {new} velocities but the running one outputs {running}; the actuator expects a fixed layout"
    )]
    Outputs { new: usize, running: usize },
    #[error(
        "the new model decodes {new} but the running one decodes {running}; the front end sends one kind of bin"
    )]
    Input {
        new: &'static str,
        running: &'static str,
    },
}

#[derive(Clone, Copy, Debug)]
struct BinClock {
    t0_ns: i64,
    seq0: u64,
    next_seq: u64,
}

#[derive(Clone, Debug)]
struct PendingBin {
    seq: u64,
    occupied: bool,
    recv_ns: u64,
    origin_ns: u64,
    /// The bin's values, of the model's kind (the other empty).
    counts: Vec<u16>,
    features: Vec<f32>,
}

#[derive(Clone, Copy, Debug)]
struct AnsweredSlot {
    /// `None` for a ring entry no slot has used yet (every u64 is a valid
    /// seq, so none can mark "empty").
    seq: Option<u64>,
    decoded: bool,
}

/// Which counts answer a slot.
#[derive(Clone, Copy)]
enum SlotSource {
    Arrived { recv_ns: u64, origin_ns: u64 },
    Pending(usize),
    Missing,
}

/// Everything the daemon decides, as a pure function of datagrams and
/// times: the bin clock (which slot each seq belongs to and when it falls
/// due), the reorder ring, the decode pipeline, the safety supervisor and
/// the counters. The daemon hands it each datagram with its receive time
/// (`on_datagram`) and wakes it at each deadline (`on_timeout`); it
/// answers every slot exactly once with one velocity packet, decoded or
/// coasted. Offline replay drives the same engine from a session log with
/// the logged times, so a replay decides bit for bit as the daemon did.
pub struct SlotEngine {
    settings: EngineSettings,
    pipeline: DecodePipeline,
    supervisor: Supervisor,
    clock: Option<BinClock>,
    pending: Vec<PendingBin>,
    answered: Vec<AnsweredSlot>,
    /// The bin in hand, of the model's kind (the other empty).
    counts: Vec<u16>,
    features: Vec<f32>,
    packet: Vec<u8>,
    model_changed: bool,
    /// The last out-of-window seq and when it came, awaiting confirmation
    /// as a new stream.
    stray: Option<(u64, u64)>,
    counters: EngineCounters,
    last_nonzero: Vec<u64>,
    last_saturated: Vec<u64>,
    /// Clicks: the gate, how many it made, the last one's seq, and the
    /// probability of the last slot answered.
    click_gate: ClickGate,
    clicks: u64,
    last_click: Option<u64>,
    click_prob: f32,
}

impl SlotEngine {
    pub fn new(settings: EngineSettings, pipeline: DecodePipeline) -> SlotEngine {
        let mut settings = settings;
        if pipeline.input() == BinKind::Features {
            // Drift handling follows counts; a model of features runs
            // without it (the daemon says so at start).
            settings.drift.enabled = false;
        }
        let mut pipeline = pipeline;
        pipeline.configure_drift(settings.drift, settings.saturation_count);
        let n = pipeline.n_channels();
        let d = pipeline.n_outputs();
        let w = settings.reorder_window.max(1) as usize;
        let supervisor = Supervisor::new(settings.limits.clone(), d, settings.armed_at_start);
        let (n_counts, n_features) = match pipeline.input() {
            BinKind::Counts => (n, 0),
            BinKind::Features => (0, n),
        };
        SlotEngine {
            pending: (0..w)
                .map(|_| PendingBin {
                    seq: 0,
                    occupied: false,
                    recv_ns: 0,
                    origin_ns: 0,
                    counts: vec![0; n_counts],
                    features: vec![0.0; n_features],
                })
                .collect(),
            answered: vec![
                AnsweredSlot {
                    seq: None,
                    decoded: false,
                };
                w
            ],
            counts: vec![0; n_counts],
            features: vec![0.0; n_features],
            packet: vec![0; packet::velocity_len(d)],
            model_changed: false,
            stray: None,
            counters: EngineCounters::default(),
            last_nonzero: vec![0; n],
            last_saturated: vec![u64::MAX; n],
            clock: None,
            click_gate: settings.click_gate.gate(settings.bin_width),
            clicks: 0,
            last_click: None,
            click_prob: 0.0,
            settings,
            pipeline,
            supervisor,
        }
    }

    /// Whether the running model decodes clicks.
    pub fn has_click(&self) -> bool {
        self.pipeline.has_click()
    }

    /// Clicks made so far, the seq of the last one, and the click
    /// probability of the last slot answered (0 without a click decoder).
    pub fn clicks(&self) -> (u64, Option<u64>, f32) {
        (self.clicks, self.last_click, self.click_prob)
    }

    pub fn settings(&self) -> &EngineSettings {
        &self.settings
    }

    pub fn counters(&self) -> &EngineCounters {
        &self.counters
    }

    pub fn state(&self) -> SupervisorState {
        self.supervisor.state()
    }

    pub fn n_channels(&self) -> usize {
        self.pipeline.n_channels()
    }

    pub fn n_outputs(&self) -> usize {
        self.pipeline.n_outputs()
    }

    pub fn bin_width(&self) -> BinWidth {
        self.settings.bin_width
    }

    /// The seq of the next slot to answer, once a stream has started.
    pub fn next_seq(&self) -> Option<u64> {
        self.clock.map(|c| c.next_seq)
    }

    /// When the next slot falls due, once a stream has started.
    pub fn next_deadline(&self) -> Option<u64> {
        self.clock.map(|c| self.deadline_of(&c, c.next_seq))
    }

    /// Bins that arrived ahead of their slot and wait in the reorder ring.
    pub fn pending_bins(&self) -> usize {
        self.pending.iter().filter(|p| p.occupied).count()
    }

    pub fn consecutive_missing(&self) -> u32 {
        self.supervisor.consecutive_missing()
    }

    /// Rate exponent clamps of the running point-process decoder.
    pub fn rate_clamps(&self) -> u64 {
        self.pipeline.rate_clamps()
    }

    fn w(&self) -> u64 {
        self.pending.len() as u64
    }

    fn deadline_of(&self, c: &BinClock, seq: u64) -> u64 {
        let nominal = c.t0_ns as i128
            + i128::from(seq.wrapping_sub(c.seq0)) * i128::from(self.settings.bin_width.ns());
        (nominal + i128::from(self.settings.deadline_slack_ns)).clamp(0, i128::from(u64::MAX))
            as u64
    }

    /// Answers every slot due at or before `now` (a receive timeout).
    pub fn on_timeout(&mut self, now_ns: u64, sink: &mut impl SlotSink) {
        while let Some(deadline) = self.next_deadline() {
            if deadline > now_ns {
                break;
            }
            self.answer(SlotSource::Missing, now_ns, sink);
        }
    }

    /// Handles one datagram read at `recv_ns`.
    pub fn on_datagram(&mut self, recv_ns: u64, datagram: &[u8], sink: &mut impl SlotSink) {
        while let Some(deadline) = self.next_deadline() {
            if deadline >= recv_ns {
                break;
            }
            self.answer(SlotSource::Missing, recv_ns, sink);
        }
        self.counters.datagrams += 1;
        let header =
            // A bin of the other kind than the model's is a kind mismatch.
            match packet::parse_bin_for(
                datagram,
                self.pipeline.input(),
                self.n_channels(),
                self.settings.bin_width,
            ) {
                Ok(h) => h,
                Err(reason) => {
                    self.counters.rejected += 1;
                    self.counters.rejected_by_reason[reason.index()] += 1;
                    sink.event(&EngineEvent::Rejected(reason));
                    return;
                }
            };
        let seq = header.seq;
        let arrived = SlotSource::Arrived {
            recv_ns,
            origin_ns: header.origin_ns,
        };
        let Some(clock) = self.clock else {
            self.start_stream(recv_ns, seq);
            sink.event(&EngineEvent::StreamStarted {
                seq,
                t0_ns: recv_ns,
            });
            read_values(datagram, &mut self.counts, &mut self.features);
            self.answer(arrived, recv_ns, sink);
            return;
        };
        let next = clock.next_seq;
        let w = self.w();
        // Distances on the circle of u64 seqs, so a stream may run through
        // u64::MAX to 0 like any other.
        let ahead = seq.wrapping_sub(next);
        let behind = next.wrapping_sub(seq);
        let in_window = ahead < w || behind <= w;
        if in_window {
            self.stray = None;
        }
        if seq == next {
            self.track_clock(recv_ns, seq);
            read_values(datagram, &mut self.counts, &mut self.features);
            self.answer(arrived, recv_ns, sink);
        } else if ahead < w {
            let slot = &mut self.pending[(seq % w) as usize];
            if slot.occupied && slot.seq == seq {
                self.counters.bins_duplicate += 1;
                sink.event(&EngineEvent::Duplicate { seq });
                return;
            }
            slot.seq = seq;
            slot.occupied = true;
            slot.recv_ns = recv_ns;
            slot.origin_ns = header.origin_ns;
            read_values(datagram, &mut slot.counts, &mut slot.features);
        } else if behind <= w {
            let slot = self.answered[(seq % w) as usize];
            if slot.seq == Some(seq) && slot.decoded {
                self.counters.bins_duplicate += 1;
                sink.event(&EngineEvent::Duplicate { seq });
            } else {
                self.counters.bins_late += 1;
                sink.event(&EngineEvent::Late { seq });
            }
        } else if !self.confirms_restart(seq, recv_ns) {
            self.stray = Some((seq, recv_ns));
            let from_this_stream = behind <= next.wrapping_sub(clock.seq0);
            if from_this_stream {
                self.counters.bins_late += 1;
                sink.event(&EngineEvent::Late { seq });
            } else {
                self.counters.bins_stray += 1;
                sink.event(&EngineEvent::Stray { seq });
            }
        } else {
            self.counters.new_streams += 1;
            sink.event(&EngineEvent::NewStream {
                expected_seq: next,
                seq,
            });
            self.pipeline.reset();
            self.click_gate.reset();
            if let Some(t) = self.supervisor.halt(next, TransitionReason::NewStream) {
                self.counters.transitions += 1;
                sink.event(&EngineEvent::Transition(t));
            }
            self.start_stream(recv_ns, seq);
            read_values(datagram, &mut self.counts, &mut self.features);
            self.answer(arrived, recv_ns, sink);
        }
    }

    /// An out-of-window bin confirms a restart when it follows the last
    /// out-of-window bin in seq, paced like a front end (at least half a bin
    /// later), not in a burst from the socket's queue.
    fn confirms_restart(&self, seq: u64, recv_ns: u64) -> bool {
        match self.stray {
            Some((last_seq, last_recv)) => {
                seq == last_seq.wrapping_add(1)
                    && recv_ns.saturating_sub(last_recv) >= self.settings.bin_width.ns() / 2
            }
            None => false,
        }
    }

    fn start_stream(&mut self, recv_ns: u64, seq: u64) {
        self.stray = None;
        self.clock = Some(BinClock {
            t0_ns: recv_ns as i64,
            seq0: seq,
            next_seq: seq,
        });
        for p in &mut self.pending {
            if p.occupied {
                self.counters.bins_flushed += 1;
            }
            p.occupied = false;
        }
        for a in &mut self.answered {
            a.seq = None;
        }
        self.last_nonzero.fill(seq);
        self.last_saturated.fill(u64::MAX);
    }

    fn track_clock(&mut self, recv_ns: u64, seq: u64) {
        let gain = self.settings.clock_tracking;
        if gain <= 0.0 {
            return;
        }
        let Some(c) = self.clock.as_mut() else { return };
        let nominal = c.t0_ns as i128
            + i128::from(seq.wrapping_sub(c.seq0)) * i128::from(self.settings.bin_width.ns());
        let slack = i128::from(self.settings.deadline_slack_ns);
        let offset = (i128::from(recv_ns) - nominal).clamp(-slack, slack);
        c.t0_ns += (offset as f64 * gain).round() as i64;
    }

    /// Answers the next slot from `source`, then every following slot whose
    /// bin already waits in the ring.
    fn answer(&mut self, source: SlotSource, decided_ns: u64, sink: &mut impl SlotSink) {
        let mut source = source;
        while let Some(next) = self.answer_one(source, decided_ns, sink) {
            let i = (next % self.w()) as usize;
            if !(self.pending[i].occupied && self.pending[i].seq == next) {
                break;
            }
            source = SlotSource::Pending(i);
        }
    }

    /// Answers one slot; returns the seq of the slot after it.
    fn answer_one(
        &mut self,
        source: SlotSource,
        decided_ns: u64,
        sink: &mut impl SlotSink,
    ) -> Option<u64> {
        let clock = self.clock?;
        let seq = clock.next_seq;
        let w = self.w();
        let (recv_ns, origin_ns, missing) = match source {
            SlotSource::Arrived { recv_ns, origin_ns } => (recv_ns, origin_ns, false),
            SlotSource::Pending(i) => (self.pending[i].recv_ns, self.pending[i].origin_ns, false),
            SlotSource::Missing => (0, 0, true),
        };
        let values: Option<BinValues<'_>> = match (source, self.pipeline.input()) {
            (SlotSource::Arrived { .. }, BinKind::Counts) => Some(BinValues::Counts(&self.counts)),
            (SlotSource::Arrived { .. }, BinKind::Features) => {
                Some(BinValues::Features(&self.features))
            }
            (SlotSource::Pending(i), BinKind::Counts) => {
                Some(BinValues::Counts(&self.pending[i].counts))
            }
            (SlotSource::Pending(i), BinKind::Features) => {
                Some(BinValues::Features(&self.pending[i].features))
            }
            (SlotSource::Missing, _) => None,
        };
        let estimate = match values {
            Some(values) => {
                let sat = self.settings.saturation_count;
                match values {
                    BinValues::Counts(counts) => {
                        for (ch, &c) in counts.iter().enumerate() {
                            if c > 0 {
                                self.last_nonzero[ch] = seq;
                            }
                            if c >= sat {
                                self.last_saturated[ch] = seq;
                            }
                        }
                    }
                    // A feature is never "no spikes": silence and
                    // saturation are judged on counts.
                    BinValues::Features(_) => self.last_nonzero.fill(seq),
                }
                self.counters.bins_decoded += 1;
                self.pipeline
                    .set_tracking(self.supervisor.state() == SupervisorState::Armed);
                self.pipeline.step_bin(seq, values);
                Self::drift_changes(
                    &self.pipeline,
                    &mut self.supervisor,
                    &mut self.counters,
                    seq,
                    sink,
                );
                let e = self.pipeline.last_estimate();
                if let BinValues::Counts(counts) = values {
                    sink.decoded(seq, counts, e.estimate);
                }
                e
            }
            None => {
                self.counters.bins_missing += 1;
                self.pipeline.predict_only(seq)
            }
        };
        let fault = estimate.numerical_fault;
        let p_click = estimate.click_prob;
        let supervised = self
            .supervisor
            .on_bin(seq, estimate.estimate, missing, fault);
        let mut flags = supervised.flags;
        if missing {
            flags |= FLAG_BIN_MISSING;
        }
        self.click_prob = 0.0;
        if let Some(p) = p_click {
            // A click only while armed on a bin that came: never while
            // coasting, halted or disarmed.
            self.click_prob = if p.is_finite() { p as f32 } else { 0.0 };
            // The speed is worked out only when the rule is on.
            let max_speed = self.settings.click_gate.max_speed;
            let slow = max_speed <= 0.0 || {
                let sq: f64 = self.supervisor.command().iter().map(|v| v * v).sum();
                sq <= max_speed * max_speed
            };
            let allowed = !missing && !fault && slow && supervised.state == SupervisorState::Armed;
            if self.click_gate.step(p, allowed) {
                flags |= FLAG_CLICK;
                self.clicks += 1;
                self.last_click = Some(seq);
            }
        }
        if self.model_changed {
            flags |= FLAG_MODEL_CHANGED;
            self.model_changed = false;
        }
        packet::encode_velocity(
            &VelocityFields {
                state: supervised.state.wire(),
                seq,
                origin_ns,
                recv_ns,
                sent_ns: 0,
                flags,
                command: self.supervisor.command(),
                estimate: estimate.estimate,
                click_prob: self.click_prob,
            },
            &mut self.packet,
        );
        if fault {
            // A faulted filter state stays faulted; start it afresh. The
            // supervisor has halted, so nothing moves until an operator arms.
            self.counters.numerical_faults += 1;
            self.pipeline.reset();
            self.click_gate.reset();
        }
        if let Some(t) = supervised.transition {
            self.counters.transitions += 1;
            sink.event(&EngineEvent::Transition(t));
        }
        self.answered[(seq % w) as usize] = AnsweredSlot {
            seq: Some(seq),
            decoded: !missing,
        };
        if let SlotSource::Pending(i) = source {
            self.pending[i].occupied = false;
        }
        self.counters.slots_answered += 1;
        let deadline_ns = self.deadline_of(&clock, seq);
        sink.answer(
            &mut self.packet,
            &SlotAnswer {
                seq,
                recv_ns,
                origin_ns,
                decided_ns,
                deadline_ns,
                state: supervised.state,
                flags,
            },
        );
        let next = seq.wrapping_add(1);
        if let Some(c) = self.clock.as_mut() {
            c.next_seq = next;
        }
        Some(next)
    }

    /// Events for the channels drift handling left out or restored on
    /// bin `seq`, and a halt when too many are out.
    fn drift_changes(
        pipeline: &DecodePipeline,
        supervisor: &mut Supervisor,
        counters: &mut EngineCounters,
        seq: u64,
        sink: &mut impl SlotSink,
    ) {
        let Some(t) = pipeline.drift() else { return };
        if t.changes().is_empty() {
            return;
        }
        for c in t.changes() {
            match c.left_out {
                Some(reason) => {
                    counters.channels_left_out += 1;
                    sink.event(&EngineEvent::ChannelLeftOut {
                        seq,
                        channel: c.channel,
                        reason,
                    });
                }
                None => {
                    counters.channels_restored += 1;
                    sink.event(&EngineEvent::ChannelRestored {
                        seq,
                        channel: c.channel,
                    });
                }
            }
        }
        if t.too_many_left_out()
            && let Some(tr) = supervisor.halt(
                seq,
                TransitionReason::TooManyLeftOut {
                    left_out: t.n_left_out() as u32,
                    channels: pipeline.n_channels() as u32,
                },
            )
        {
            counters.transitions += 1;
            sink.event(&EngineEvent::Transition(tr));
        }
    }

    /// The drift settings in force (with `enabled` as the operator last
    /// set it).
    pub fn drift_settings(&self) -> &DriftSettings {
        &self.settings.drift
    }

    /// The running decoder (for status: drift tracking, left-out channels).
    pub fn pipeline(&self) -> &DecodePipeline {
        &self.pipeline
    }

    /// Applies an operator's arm, disarm or halt, or turns drift handling
    /// on or off, before the next slot.
    pub fn operator(
        &mut self,
        command: OperatorCommand,
        sink: &mut impl SlotSink,
    ) -> Result<Option<Transition>, ArmRefused> {
        let seq = self.next_seq().unwrap_or(0);
        let t = match command {
            OperatorCommand::Arm => {
                if let Some(d) = self.pipeline.drift()
                    && d.too_many_left_out()
                {
                    return Err(ArmRefused::TooManyLeftOut {
                        left_out: d.n_left_out() as u32,
                        channels: self.n_channels() as u32,
                    });
                }
                Some(self.supervisor.arm(seq, self.clock.is_some())?)
            }
            OperatorCommand::Disarm => self.supervisor.disarm(seq),
            OperatorCommand::Halt => self.supervisor.halt(seq, TransitionReason::OperatorHalt),
            OperatorCommand::DriftOn if self.pipeline.input() == BinKind::Features => {
                return Err(ArmRefused::DriftNeedsCounts);
            }
            OperatorCommand::DriftOn | OperatorCommand::DriftOff => {
                let enabled = command == OperatorCommand::DriftOn;
                if self.settings.drift.enabled != enabled {
                    self.settings.drift.enabled = enabled;
                    self.pipeline
                        .configure_drift(self.settings.drift, self.settings.saturation_count);
                }
                sink.event(&EngineEvent::DriftHandling { seq, enabled });
                None
            }
        };
        if let Some(t) = t {
            self.counters.transitions += 1;
            sink.event(&EngineEvent::Transition(t));
        }
        Ok(t)
    }

    /// Checks that `pipeline` could replace the running one.
    pub fn check_swap(&self, pipeline: &DecodePipeline) -> Result<(), SwapRefused> {
        check_swap_against(
            pipeline,
            self.n_channels(),
            self.settings.bin_width,
            self.n_outputs(),
            self.pipeline.input(),
        )
    }

    /// A pending change of the Kalman filter's channels left out, for a
    /// worker to build ([`DecodePipeline::reduction_request`]).
    pub fn reduction_request(&self) -> Option<crate::engine::pipeline::ReductionRequest> {
        self.pipeline.reduction_request()
    }

    /// The generation of the pending change, if any (cheap; poll it every
    /// slot).
    pub fn pending_reduction(&self) -> Option<u64> {
        self.pipeline.pending_reduction()
    }

    /// Terms a worker built ([`DecodePipeline::offer_reduction`]); handed
    /// back when no longer wanted.
    pub fn offer_reduction(
        &mut self,
        generation: u64,
        terms: crate::decoders::kalman::filter::ReducedTerms,
    ) -> Option<crate::decoders::kalman::filter::ReducedTerms> {
        self.pipeline.offer_reduction(generation, terms)
    }

    /// Terms the filter no longer uses, to drop off the decode thread.
    pub fn take_spent_reduction(
        &mut self,
    ) -> Option<crate::decoders::kalman::filter::ReducedTerms> {
        self.pipeline.take_spent_reduction()
    }

    /// Swaps in a new decoder before the next slot, which carries
    /// [`FLAG_MODEL_CHANGED`]. Returns the old pipeline so the caller can
    /// free it off the real-time path.
    pub fn swap_pipeline(
        &mut self,
        pipeline: DecodePipeline,
        sink: &mut impl SlotSink,
    ) -> Result<DecodePipeline, Box<(SwapRefused, DecodePipeline)>> {
        if let Err(e) = self.check_swap(&pipeline) {
            return Err(Box::new((e, pipeline)));
        }
        let mut pipeline = pipeline;
        // A new model starts drift handling afresh from its own training
        // statistics.
        pipeline.configure_drift(self.settings.drift, self.settings.saturation_count);
        let old = std::mem::replace(&mut self.pipeline, pipeline);
        self.model_changed = true;
        self.click_gate.reset();
        self.counters.model_changes += 1;
        sink.event(&EngineEvent::ModelChanged {
            seq: self.next_seq().unwrap_or(0),
        });
        Ok(old)
    }

    /// Channels that have had no counts for `dead_channel_bins` bins, and
    /// channels that reached the saturation count within that window.
    pub fn channel_health(&self) -> (Vec<usize>, Vec<usize>) {
        let Some(c) = self.clock else {
            return (Vec::new(), Vec::new());
        };
        let last = c.next_seq.wrapping_sub(1);
        let window = self.settings.dead_channel_bins;
        let dead = (0..self.n_channels())
            .filter(|&ch| last.wrapping_sub(self.last_nonzero[ch]) >= window)
            .filter(|_| last.wrapping_sub(c.seq0) >= window)
            .collect();
        let saturated = (0..self.n_channels())
            .filter(|&ch| {
                self.last_saturated[ch] != u64::MAX
                    && last.wrapping_sub(self.last_saturated[ch]) < window
            })
            .collect();
        (dead, saturated)
    }
}

/// Copies an accepted bin's values into whichever buffer is in use (the
/// model's kind; the other is empty).
fn read_values(datagram: &[u8], counts: &mut [u16], features: &mut [f32]) {
    if counts.is_empty() {
        packet::read_features(datagram, features);
    } else {
        packet::read_counts(datagram, counts);
    }
}

/// [`SlotEngine::check_swap`] for callers that hold only the running
/// stream's shape (the daemon's control task).
pub fn check_swap_against(
    pipeline: &DecodePipeline,
    n_channels: usize,
    bin_width: BinWidth,
    n_outputs: usize,
    input: BinKind,
) -> Result<(), SwapRefused> {
    if pipeline.input() != input {
        return Err(SwapRefused::Input {
            new: pipeline.input().name(),
            running: input.name(),
        });
    }
    if pipeline.n_channels() != n_channels {
        return Err(SwapRefused::Channels {
            new: pipeline.n_channels(),
            running: n_channels,
        });
    }
    if pipeline.bin_width() != bin_width {
        return Err(SwapRefused::BinWidth {
            new: pipeline.bin_width(),
            running: bin_width,
        });
    }
    if pipeline.n_outputs() != n_outputs {
        return Err(SwapRefused::Outputs {
            new: pipeline.n_outputs(),
            running: n_outputs,
        });
    }
    Ok(())
}
