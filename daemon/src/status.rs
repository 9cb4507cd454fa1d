//! What the daemon reports about itself: per-bin latency histograms kept on
//! the real-time thread, and the status snapshot that `decoderd ctl status`
//! prints (JSON with `--json`, a table otherwise) and the periodic summary
//! line logs.

use std::collections::BTreeMap;
use std::fmt::Write as _;

use decoder_core::engine::slot_engine::{EngineCounters, SlotAnswer};
use decoder_core::engine::supervisor::Transition;
use decoder_core::fit::adapt::AdaptReport;
use decoder_core::wire::packet::RejectReason;
use decoder_core::wire::task_packet::{N_TASK_REJECT_REASONS, TaskReject, TaskState};
use hdrhistogram::Histogram;
use serde::{Deserialize, Serialize};

pub use crate::model_identity::ModelInfo;
use crate::recorder::RecorderSnapshot;

/// Latency histograms, in ns, 1 ns to 60 s at 3 significant digits.
pub struct Monitor {
    recv_to_send: Histogram<u64>,
    origin_to_send: Histogram<u64>,
    deadline_overrun: Histogram<u64>,
    pub send_errors: u64,
    /// When the last bin that came was read (0: none yet).
    pub last_bin_recv_ns: u64,
    /// The supervisor's last state change.
    pub last_transition: Option<Transition>,
    /// The last packet's command and estimate (first `dims` entries).
    pub last_command: [f64; 8],
    pub last_estimate: [f64; 8],
    pub dims: usize,
}

impl Default for Monitor {
    fn default() -> Self {
        let h = || Histogram::new_with_bounds(1, 60_000_000_000, 3).expect("valid bounds");
        Monitor {
            recv_to_send: h(),
            origin_to_send: h(),
            deadline_overrun: h(),
            send_errors: 0,
            last_bin_recv_ns: 0,
            last_transition: None,
            last_command: [0.0; 8],
            last_estimate: [0.0; 8],
            dims: 0,
        }
    }
}

impl Monitor {
    /// Notes one sent packet. Recording into an HDR histogram does not
    /// allocate.
    pub fn on_sent(&mut self, slot: &SlotAnswer, sent_ns: u64) {
        if slot.recv_ns != 0 {
            self.last_bin_recv_ns = slot.recv_ns;
            self.recv_to_send
                .saturating_record(sent_ns.saturating_sub(slot.recv_ns).max(1));
        } else {
            self.deadline_overrun
                .saturating_record(sent_ns.saturating_sub(slot.deadline_ns).max(1));
        }
        if slot.origin_ns != 0 && sent_ns >= slot.origin_ns {
            self.origin_to_send
                .saturating_record((sent_ns - slot.origin_ns).max(1));
        }
    }

    /// Keeps the command and estimate of a packet as sent (PROTOCOL.md
    /// §2: byte 7 the dimension, command from byte 48, then the estimate).
    pub fn note_values(&mut self, packet: &[u8]) {
        let d = usize::from(packet.get(7).copied().unwrap_or(0)).min(8);
        if packet.len() < 48 + 16 * d {
            return;
        }
        let f = |at: usize| f64::from_le_bytes(packet[at..at + 8].try_into().expect("8 bytes"));
        for i in 0..d {
            self.last_command[i] = f(48 + 8 * i);
            self.last_estimate[i] = f(48 + 8 * (d + i));
        }
        self.dims = d;
    }

    pub fn latency(&self) -> LatencyReport {
        LatencyReport {
            recv_to_send_us: Percentiles::of(&self.recv_to_send),
            origin_to_send_us: Percentiles::of(&self.origin_to_send),
            deadline_overrun_us: Percentiles::of(&self.deadline_overrun),
        }
    }
}

/// What the real-time loop has seen of the task computer: counts by
/// outcome and the latest state, kept without allocating.
#[derive(Default)]
pub struct TaskMonitor {
    pub received: u64,
    pub rejected: [u64; N_TASK_REJECT_REASONS],
    /// Wakes on which task packets were still waiting when the loop went
    /// back to the bins (a flood, bounded per wake).
    pub bursts_cut: u64,
    pub latest: Option<TaskState>,
    /// When the latest accepted task packet was read.
    pub latest_recv_ns: u64,
}

impl TaskMonitor {
    pub fn on_packet(&mut self, recv_ns: u64, parsed: Result<TaskState, TaskReject>) {
        self.received += 1;
        match parsed {
            Ok(state) => {
                self.latest = Some(state);
                self.latest_recv_ns = recv_ns;
            }
            Err(reason) => self.rejected[reason.index()] += 1,
        }
    }

    pub fn status(&self, listen: std::net::SocketAddr, now_ns: u64) -> TaskStatus {
        let rejected: u64 = self.rejected.iter().sum();
        TaskStatus {
            listen: Some(listen),
            received: self.received,
            accepted: self.received - rejected,
            rejected: TaskReject::NAMES
                .iter()
                .zip(self.rejected)
                .filter(|(_, v)| *v > 0)
                .map(|(n, v)| (n.to_string(), v))
                .collect(),
            bursts_cut: self.bursts_cut,
            last_phase: self.latest.map(|t| t.phase.name().to_string()),
            last_trial: self.latest.map(|t| t.trial),
            last_bin_seq: self.latest.map(|t| t.bin_seq),
            closed_loop: self.latest.map(|t| t.closed_loop()),
            last_age_s: self
                .latest
                .map(|_| now_ns.saturating_sub(self.latest_recv_ns) as f64 / 1e9),
        }
    }
}

/// The task computer's side of status (PROTOCOL.md §6).
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct TaskStatus {
    /// The task socket.
    pub listen: Option<std::net::SocketAddr>,
    pub received: u64,
    pub accepted: u64,
    /// Rejected task packets by reason (reasons with none left out).
    pub rejected: BTreeMap<String, u64>,
    pub bursts_cut: u64,
    pub last_phase: Option<String>,
    pub last_trial: Option<u32>,
    pub last_bin_seq: Option<u64>,
    pub closed_loop: Option<bool>,
    /// Seconds since the latest accepted task packet.
    pub last_age_s: Option<f64>,
}

impl TaskStatus {
    /// The status table's line.
    pub fn line(&self) -> String {
        let rejected: u64 = self.rejected.values().sum();
        let why: Vec<String> = self
            .rejected
            .iter()
            .map(|(k, v)| format!("{k} {v}"))
            .collect();
        let rejected = if rejected == 0 {
            "none rejected".to_string()
        } else {
            format!("{rejected} rejected ({})", why.join(", "))
        };
        match (&self.last_phase, self.last_trial, self.last_age_s) {
            (Some(phase), Some(trial), Some(age)) => format!(
                "{} received, {rejected}; trial {trial} {phase}, {}, {age:.1} s ago",
                self.received,
                if self.closed_loop == Some(true) {
                    "closed loop"
                } else {
                    "cursor moved by the task"
                }
            ),
            _ if self.received == 0 => "no task packets yet".to_string(),
            _ => format!("{} received, {rejected}; none usable yet", self.received),
        }
    }
}

#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Percentiles {
    pub count: u64,
    pub p50: f64,
    pub p90: f64,
    pub p99: f64,
    pub p999: f64,
    pub max: f64,
}

impl Percentiles {
    /// From raw samples in ns (exact order statistics, nearest rank), for
    /// the benches that keep every sample.
    pub fn of_samples_ns(samples: &[u64]) -> Percentiles {
        if samples.is_empty() {
            return Percentiles::default();
        }
        let mut v = samples.to_vec();
        v.sort_unstable();
        let at = |q: f64| v[((v.len() - 1) as f64 * q).round() as usize] as f64 / 1000.0;
        Percentiles {
            count: v.len() as u64,
            p50: at(0.5),
            p90: at(0.9),
            p99: at(0.99),
            p999: at(0.999),
            max: at(1.0),
        }
    }

    pub fn of(h: &Histogram<u64>) -> Percentiles {
        if h.is_empty() {
            return Percentiles::default();
        }
        let us = |v: u64| v as f64 / 1000.0;
        Percentiles {
            count: h.len(),
            p50: us(h.value_at_quantile(0.5)),
            p90: us(h.value_at_quantile(0.9)),
            p99: us(h.value_at_quantile(0.99)),
            p999: us(h.value_at_quantile(0.999)),
            max: us(h.max()),
        }
    }
}

#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct LatencyReport {
    /// Bin read → velocity packet sent, for bins that came.
    pub recv_to_send_us: Percentiles,
    /// Front end's end of bin → velocity packet sent (when origin_ns is set).
    pub origin_to_send_us: Percentiles,
    /// How long after its deadline a missing bin's slot was answered.
    pub deadline_overrun_us: Percentiles,
}

/// The supervisor's last state change, in words.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct StateChange {
    pub seq: u64,
    pub from: String,
    pub to: String,
    pub reason: String,
}

impl From<&Transition> for StateChange {
    fn from(t: &Transition) -> StateChange {
        StateChange {
            seq: t.seq,
            from: t.from.name().into(),
            to: t.to.name().into(),
            reason: t.reason.to_string(),
        }
    }
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Status {
    /// The status document's version (PROTOCOL.md §11).
    #[serde(default)]
    pub status_version: u32,
    pub daemon_version: String,
    pub uptime_s: f64,
    pub state: String,
    pub armed_at_start: bool,
    pub listen: std::net::SocketAddr,
    pub actuator: std::net::SocketAddr,
    pub model: ModelInfo,
    pub stream_started: bool,
    pub next_seq: Option<u64>,
    pub consecutive_missing: u32,
    /// Seconds since the last bin was read; `None` before the first.
    #[serde(default)]
    pub last_bin_age_s: Option<f64>,
    /// Why the state is what it is: the last state change.
    #[serde(default)]
    pub last_change: Option<StateChange>,
    /// The control socket, for the hints the table gives.
    #[serde(default)]
    pub control_socket: String,
    /// Models of another decoder kind swapped in while armed, in words.
    #[serde(default)]
    pub model_warnings: Vec<String>,
    pub counters: EngineCounters,
    pub rejected: BTreeMap<String, u64>,
    pub send_errors: u64,
    pub events_not_logged: u64,
    /// Point-process decoder: rate exponents clamped at ±30 by the running
    /// model (0 otherwise); a rising count means the model is far outside
    /// the data it was trained on.
    #[serde(default)]
    pub rate_clamps: u64,
    pub latency: LatencyReport,
    pub dead_channels: Vec<usize>,
    pub saturated_channels: Vec<usize>,
    pub recording: Option<RecorderSnapshot>,
    pub rss_bytes: Option<u64>,
    /// Heap allocations on the decode path since start (should stay at its
    /// warm-up value); `None` when not counted.
    pub decode_path_allocations: Option<u64>,
    pub realtime_warnings: Vec<String>,
    /// Task packets: counts, the last phase and trial, and their age.
    #[serde(default)]
    pub task: TaskStatus,
    /// Online adaptation: on or off, updates, skips.
    #[serde(default)]
    pub adaptation: AdaptStatus,
    /// The last velocity packet's command and estimate.
    #[serde(default)]
    pub last_command: Vec<f64>,
    #[serde(default)]
    pub last_estimate: Vec<f64>,
    /// The click decoder: its last probability and the clicks made.
    #[serde(default)]
    pub click: ClickStatus,
    /// Drift handling: on or off, the channels left out and why, the
    /// velocity bias, how far the baselines have moved.
    #[serde(default)]
    pub drift: DriftStatus,
}

/// The drift part of status.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct DriftStatus {
    pub enabled: bool,
    /// Channels left out now, with the reason (`dead`, `noisy`,
    /// `saturated`).
    pub left_out: Vec<LeftOutChannel>,
    /// Left out and restored since start.
    pub left_out_total: u64,
    pub restored_total: u64,
    /// The velocity bias being subtracted, one value per output.
    pub bias: Vec<f64>,
    /// Tracked baseline over training baseline across the channels in the
    /// decode: lowest, median, highest.
    pub baseline_ratio: [f64; 3],
    /// A Kalman decoder's reduced forms put in place for changes of the
    /// channels left out, and how many of them the decode thread had to
    /// build at their bin because the worker's came too late.
    pub reduced_forms: u64,
    pub reduced_forms_built_at_the_bin: u64,
}

impl DriftStatus {
    /// One line for `ctl status`.
    pub fn line(&self) -> String {
        if !self.enabled {
            return format!(
                "off ({} channels left out and {} restored while it was on)",
                self.left_out_total, self.restored_total
            );
        }
        let out = if self.left_out.is_empty() {
            "no channel left out".to_string()
        } else {
            format!(
                "left out: {}",
                self.left_out
                    .iter()
                    .map(|c| format!("{} ({})", c.channel, c.reason))
                    .collect::<Vec<_>>()
                    .join(", ")
            )
        };
        let bias: Vec<String> = self.bias.iter().map(|b| format!("{b:+.2}")).collect();
        format!(
            "on; {out}; baselines ×{:.2} median (×{:.2}..×{:.2}); velocity bias [{}]",
            self.baseline_ratio[1],
            self.baseline_ratio[0],
            self.baseline_ratio[2],
            bias.join(", ")
        )
    }
}

/// One channel left out, and why.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct LeftOutChannel {
    pub channel: usize,
    pub reason: String,
}

/// The click part of status.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct ClickStatus {
    /// The running model decodes clicks.
    pub decoder: bool,
    /// The click probability of the last slot answered.
    pub probability: f64,
    /// Clicks since start, and per minute of slots answered.
    pub clicks: u64,
    pub per_minute: f64,
    /// The seq of the last click.
    pub last_click_seq: Option<u64>,
}

/// The status document's version (PROTOCOL.md §11): a field removed or
/// changed in meaning raises it, a field added does not.
pub const STATUS_VERSION: u32 = 1;

pub fn rejected_by_name(c: &EngineCounters) -> BTreeMap<String, u64> {
    RejectReason::NAMES
        .iter()
        .zip(c.rejected_by_reason)
        .map(|(n, v)| (n.to_string(), v))
        .collect()
}

fn list(v: &[usize]) -> String {
    if v.is_empty() {
        return "none".into();
    }
    let shown: Vec<String> = v.iter().take(16).map(|c| c.to_string()).collect();
    let more = if v.len() > 16 {
        format!(" … ({} in all)", v.len())
    } else {
        String::new()
    };
    shown.join(", ") + &more
}

fn pct(p: &Percentiles) -> String {
    if p.count == 0 {
        return "no samples".into();
    }
    format!(
        "p50 {:.1} µs  p90 {:.1} µs  p99 {:.1} µs  p99.9 {:.1} µs  max {:.1} µs  ({} {})",
        p.p50,
        p.p90,
        p.p99,
        p.p999,
        p.max,
        p.count,
        if p.count == 1 { "sample" } else { "samples" }
    )
}

/// "1 bin", "2 bins".
pub fn plural(n: u64, one: &str, many: &str) -> String {
    format!("{n} {}", if n == 1 { one } else { many })
}

impl Status {
    /// The readable table of `decoderd ctl status`.
    pub fn table(&self) -> String {
        let c = &self.counters;
        let mut s = String::new();
        let _ = writeln!(
            s,
            "decoderd {}  up {:.1} s",
            self.daemon_version, self.uptime_s
        );
        let why = self
            .last_change
            .as_ref()
            .map(|c| format!(" since seq {} ({}, from {})", c.seq, c.reason, c.from))
            .unwrap_or_else(|| {
                if self.armed_at_start && self.state == "armed" {
                    " (armed at start with --arm)".into()
                } else {
                    String::new()
                }
            });
        let hint = match self.state.as_str() {
            "disarmed" | "halted" => format!(
                "; the command is zero until `{} arm`",
                crate::config::ctl_command(std::path::Path::new(&self.control_socket))
            ),
            _ => String::new(),
        };
        let _ = writeln!(
            s,
            "state              {}{why}{hint}",
            self.state.to_uppercase()
        );
        let _ = writeln!(
            s,
            "model              {} ({}, {} channels, {} ms bins, outputs {})",
            self.model.path,
            self.model.kind,
            self.model.channels,
            self.model.bin_ms,
            self.model.outputs.join(",")
        );
        let _ = writeln!(s, "model sha256       {}", self.model.sha256);
        for w in &self.model_warnings {
            let _ = writeln!(s, "MODEL WARNING      {w}");
        }
        let _ = writeln!(s, "bins in / out      {} -> {}", self.listen, self.actuator);
        let _ = writeln!(
            s,
            "task packets       {}{}",
            self.task
                .listen
                .map_or(String::new(), |a| format!("on {a}: ")),
            self.task.line()
        );
        let _ = writeln!(
            s,
            "stream             {}",
            match (self.next_seq, self.last_bin_age_s) {
                // Bins stopped a while ago: say since when, not a count that
                // grows with every heartbeat.
                (Some(n), Some(age)) if age >= 1.0 => format!(
                    "next seq {n}, last bin {age:.1} s ago (the sender stopped; heartbeats continue)"
                ),
                (Some(n), _) => format!(
                    "next seq {n}, {} in a row missing",
                    plural(self.consecutive_missing.into(), "bin", "bins")
                ),
                (None, _) => "no bins yet".into(),
            }
        );
        let _ = writeln!(
            s,
            "slots              {} answered: {} decoded, {} missing (coasted)",
            c.slots_answered, c.bins_decoded, c.bins_missing
        );
        let _ = writeln!(
            s,
            "dropped bins       {} late, {} duplicate, {} stray, {} flushed; {} new streams",
            c.bins_late, c.bins_duplicate, c.bins_stray, c.bins_flushed, c.new_streams
        );
        let _ = writeln!(s, "drift handling     {}", self.drift.line());
        let rejects: Vec<String> = self
            .rejected
            .iter()
            .filter(|(_, v)| **v > 0)
            .map(|(k, v)| format!("{k} {v}"))
            .collect();
        let _ = writeln!(
            s,
            "rejected           {}{}",
            c.rejected,
            if rejects.is_empty() {
                String::new()
            } else {
                format!(" ({})", rejects.join(", "))
            }
        );
        let _ = writeln!(
            s,
            "faults             {} numerical, {}, {}",
            c.numerical_faults,
            plural(self.send_errors, "send error", "send errors"),
            plural(c.model_changes, "model change", "model changes")
        );
        let _ = writeln!(s, "adaptation         {}", self.adaptation.line());
        let _ = writeln!(
            s,
            "recv -> send       {}",
            pct(&self.latency.recv_to_send_us)
        );
        let _ = writeln!(
            s,
            "origin -> send     {}",
            pct(&self.latency.origin_to_send_us)
        );
        let _ = writeln!(
            s,
            "deadline overrun   {}",
            pct(&self.latency.deadline_overrun_us)
        );
        if self.stream_started {
            let _ = writeln!(s, "dead channels      {}", list(&self.dead_channels));
            let _ = writeln!(s, "saturated channels {}", list(&self.saturated_channels));
        } else {
            let _ = writeln!(s, "channel health     not known before the first bin");
        }
        match &self.recording {
            Some(r) => {
                let _ = writeln!(
                    s,
                    "recording          {}: {} accepted, {} written, {} lost, {:.1} MB",
                    r.path.as_deref().unwrap_or("-"),
                    r.records_accepted,
                    r.records_written,
                    r.records_lost,
                    r.bytes_written as f64 / 1e6
                );
                if let Some(a) = &r.alarm {
                    let _ = writeln!(s, "RECORDING ALARM    {a}");
                }
            }
            None => {
                let _ = writeln!(s, "recording          off");
            }
        }
        if let Some(rss) = self.rss_bytes {
            let _ = writeln!(s, "memory (RSS)       {:.1} MB", rss as f64 / 1e6);
        }
        if let Some(n) = self.decode_path_allocations {
            let _ = writeln!(s, "decode-path allocs {n} since start");
        }
        for w in &self.realtime_warnings {
            let _ = writeln!(s, "warning            {w}");
        }
        s
    }

    /// The periodic summary line.
    pub fn summary_line(&self) -> String {
        let c = &self.counters;
        let l = &self.latency.recv_to_send_us;
        format!(
            "state={} slots={} decoded={} missing={} late={} dup={} stray={} rejected={} recv_to_send_p50_us={:.1} p99_us={:.1} max_us={:.1} rec_lost={}",
            self.state,
            c.slots_answered,
            c.bins_decoded,
            c.bins_missing,
            c.bins_late,
            c.bins_duplicate,
            c.bins_stray,
            c.rejected,
            l.p50,
            l.p99,
            l.max,
            self.recording.as_ref().map_or(0, |r| r.records_lost)
        )
    }
}

/// What the worker has done, shared with status.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct WorkerCounts {
    /// Batches the worker is done with (skipped, or its update handed to
    /// the loop); `batches_sent` minus this is the batch being refitted.
    #[serde(default)]
    pub batches_finished: u64,
    pub updates: u64,
    pub skipped_too_few_bins: u64,
    pub skipped_refused: u64,
    /// Updates computed but refused by the real-time thread (no longer
    /// armed, adaptation turned off, or another model loaded meanwhile).
    pub not_applied: u64,
    pub last_update: Option<AppliedUpdate>,
    pub last_skip: Option<String>,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct AppliedUpdate {
    pub update: u64,
    /// First seq the adapted model decodes.
    pub from_seq: u64,
    pub report: AdaptReport,
}

/// The adaptation part of status.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct AdaptStatus {
    pub on: bool,
    /// Why the running model cannot adapt (`None`: it can).
    pub unavailable: Option<String>,
    pub batch_s: f64,
    pub half_life_s: f64,
    pub bins_per_batch: usize,
    /// Slots from a batch's last slot to the slot its update goes in at.
    #[serde(default)]
    pub land_after_bins: u64,
    /// The landing slot of an update computed and waiting to go in.
    #[serde(default)]
    pub update_pending_at: Option<u64>,
    /// Updates the worker finished after their landing slot (each went in
    /// at once, at the next slot).
    #[serde(default)]
    pub updates_late: u64,
    /// The batch being collected: usable bins of slots so far.
    pub batch_rows: usize,
    pub batch_slots: usize,
    pub batches_sent: u64,
    /// Batches dropped because the worker was still busy with the last.
    pub batches_dropped_busy: u64,
    #[serde(flatten)]
    pub worker: WorkerCounts,
}

impl AdaptStatus {
    /// The status table's line.
    pub fn line(&self) -> String {
        if let Some(why) = &self.unavailable {
            return format!("not available: {why}");
        }
        if !self.on {
            return format!(
                "off ({} so far); `ctl adapt on` to start",
                plural(self.worker.updates, "update", "updates")
            );
        }
        let last = self.worker.last_update.as_ref().map_or(String::new(), |u| {
            format!(
                "; last from seq {} ({} bins, change {:.3}{})",
                u.from_seq,
                u.report.rows,
                u.report.relative_change,
                if u.report.limited { ", limited" } else { "" }
            )
        });
        format!(
            "ON: {}, {} skipped (too few bins), {} refused, {} not applied; batch {}/{} slots ({} usable){last}",
            plural(self.worker.updates, "update", "updates"),
            self.worker.skipped_too_few_bins,
            self.worker.skipped_refused,
            self.worker.not_applied,
            self.batch_slots,
            self.bins_per_batch,
            self.batch_rows
        )
    }
}
