//! The real-time loop: one dedicated thread (never a tokio worker) that
//! waits for the next of its events (`LoopEvent`: a deadline passed,
//! bins or task packets readable, a status or operator request, a model
//! load, an adaptation result or switch; then shutdown) and handles each
//! to the end, in its own handler, before waiting again. Bins come first: task packets are read
//! after the bin socket is drained, at most [`TASK_BURST`] per wake, so a
//! flood of them never delays a velocity packet by more than a burst. Per datagram: read, stamp `recv_ns`, record the raw bytes, hand
//! them to the slot engine (validate → decode → supervise → encode), stamp
//! `sent_ns`, send, record the packet. Nothing here allocates per bin, logs
//! per bin or takes a lock; events go to a logging thread over a bounded
//! channel and are dropped (and counted) if it falls behind.

use std::net::{SocketAddr, UdpSocket};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use crossbeam_channel::Sender;
use decoder_core::engine::slot_engine::{EngineEvent, SlotAnswer, SlotEngine, SlotSink};
use decoder_core::engine::supervisor::SupervisorState;
use decoder_core::formats::session_log::{self, RecordKind};
use decoder_core::wire::{packet, task_packet};

use crate::adaptation::Collector;
use crate::model_identity::ModelInfo;
use crate::recorder::{RecordBatcher, RecorderStats};
use crate::requests::{
    AdaptOutcome, ControlRequest, FromOthers, LoadRequest, OperatorOutcome, Refused, Swapped,
    UpdateTicket,
};
use crate::status::{
    ClickStatus, DriftStatus, LeftOutChannel, Monitor, Status, TaskMonitor, rejected_by_name,
};
use crate::{alloc_count, sys};

/// The longest the loop sleeps without looking at control requests and
/// the shutdown flag.
const IDLE_WAKE: Duration = Duration::from_millis(20);
/// Datagrams handled per wake before control and shutdown are looked at.
const MAX_BURST: usize = 256;
/// Task packets handled per wake before the loop looks at bins again.
pub const TASK_BURST: usize = 16;

/// An event with its time, for the logging thread.
pub type TimedEvent = (u64, EngineEvent);

/// Facts about the running daemon that only status needs.
pub struct StaticInfo {
    pub version: String,
    pub started: Instant,
    pub listen: SocketAddr,
    pub task_listen: SocketAddr,
    pub actuator: SocketAddr,
    pub armed_at_start: bool,
    pub model: ModelInfo,
    pub realtime_warnings: Vec<String>,
    pub recording: Option<(std::path::PathBuf, Arc<RecorderStats>)>,
    pub control_socket: std::path::PathBuf,
    /// Models of another kind swapped in while armed.
    pub model_warnings: Vec<String>,
}

/// The real-time loop: one OS thread that owns the bin socket, the
/// actuator socket and the slot engine. It sleeps in `ppoll` until a
/// datagram or the next deadline, stamps each datagram's receive time,
/// hands it to the engine, sends every packet the engine answers with,
/// serves control requests between bins, and passes record batches to the
/// recorder without ever waiting on it. Nothing else touches the engine.
pub struct RtLoop {
    pub input: UdpSocket,
    /// Task packets from the task computer (PROTOCOL.md §6).
    pub task_input: UdpSocket,
    pub task: TaskMonitor,
    /// Online adaptation's batch collector.
    pub adapt: Collector,
    pub output: UdpSocket,
    pub actuator: SocketAddr,
    pub engine: SlotEngine,
    pub batcher: Option<RecordBatcher>,
    pub monitor: Monitor,
    /// Requests from the control socket and the adaptation worker.
    pub control: FromOthers,
    /// An adaptation update accepted but not yet due: it goes in at the
    /// first slot at or after its `lands_at`.
    pub pending_update: Option<(UpdateTicket, Box<LoadRequest>)>,
    /// Builds a Kalman filter's reduced form off this thread.
    pub reduce: crate::reduction::ReducedFormWorker,
    pub events: Sender<TimedEvent>,
    pub shutdown: Arc<AtomicBool>,
    pub info: StaticInfo,
    pub events_not_logged: u64,
}

/// Borrows the output side of an [`RtLoop`] field by field, so the engine
/// (another field) can be borrowed beside it.
macro_rules! out {
    ($rt:expr, $json:expr) => {
        Out {
            output: &$rt.output,
            actuator: $rt.actuator,
            monitor: &mut $rt.monitor,
            batcher: $rt.batcher.as_mut(),
            events: &$rt.events,
            events_not_logged: &mut $rt.events_not_logged,
            json: $json,
            adapt: &mut $rt.adapt,
            task: $rt.task.latest.as_ref(),
        }
    };
}

/// The engine's output side for one call: send, measure, record.
struct Out<'a> {
    output: &'a UdpSocket,
    actuator: SocketAddr,
    monitor: &'a mut Monitor,
    batcher: Option<&'a mut RecordBatcher>,
    events: &'a Sender<TimedEvent>,
    events_not_logged: &'a mut u64,
    json: &'a mut Vec<u8>,
    adapt: &'a mut Collector,
    task: Option<&'a decoder_core::wire::task_packet::TaskState>,
}

impl SlotSink for Out<'_> {
    fn answer(&mut self, packet_bytes: &mut [u8], slot: &SlotAnswer) {
        let sent_ns = sys::monotonic_ns();
        packet::patch_sent_ns(packet_bytes, sent_ns);
        if self.output.send_to(packet_bytes, self.actuator).is_err() {
            self.monitor.send_errors += 1;
        }
        self.monitor.on_sent(slot, sent_ns);
        self.monitor.note_values(packet_bytes);
        self.adapt.on_answer(slot, self.task);
        if let Some(b) = self.batcher.as_deref_mut() {
            b.record(RecordKind::Sent, slot.decided_ns, &[packet_bytes]);
        }
    }

    fn decoded(&mut self, seq: u64, counts: &[u16], estimate: &[f64]) {
        self.adapt.on_decoded(seq, counts, estimate);
    }

    fn event(&mut self, event: &EngineEvent) {
        let now = sys::monotonic_ns();
        if let Some(b) = self.batcher.as_deref_mut() {
            self.json.clear();
            if serde_json::to_writer(&mut *self.json, event).is_ok() {
                b.record(RecordKind::Event, now, &[self.json]);
            }
        }
        if let EngineEvent::Transition(t) = event {
            self.monitor.last_transition = Some(*t);
        }
        if self.events.try_send((now, *event)).is_err() {
            *self.events_not_logged += 1;
        }
    }
}

/// What wakes the decode loop: one closed set, each with its handler.
/// Bins are handled before task packets, and both before control
/// requests, so nothing an operator or a task computer sends delays a
/// velocity packet by more than one burst.
enum LoopEvent {
    /// The next slot's deadline passed with no bin readable.
    DeadlinePassed { now_ns: u64 },
    /// Datagrams wait on the bin socket.
    BinsReadable,
    /// Datagrams wait on the task socket.
    TaskPacketsReadable,
    /// `ctl status`.
    StatusAsked(tokio::sync::oneshot::Sender<Status>),
    /// `ctl arm|disarm|halt`.
    OperatorCommand {
        command: decoder_core::engine::slot_engine::OperatorCommand,
        reply: tokio::sync::oneshot::Sender<Result<OperatorOutcome, Refused>>,
    },
    /// `ctl load`: an operator's model, checked off this thread.
    ModelLoad(Box<LoadRequest>),
    /// An adaptation update from the worker.
    AdaptationResult(Box<LoadRequest>),
    /// `ctl adapt on|off`.
    AdaptationSwitch {
        on: bool,
        reply: tokio::sync::oneshot::Sender<Result<AdaptOutcome, Refused>>,
    },
    /// A Kalman filter's reduced form, built by the worker.
    ReducedForm {
        generation: u64,
        terms: Box<decoder_core::decoders::kalman::filter::ReducedTerms>,
    },
}

impl From<ControlRequest> for LoopEvent {
    fn from(r: ControlRequest) -> LoopEvent {
        match r {
            ControlRequest::Status(reply) => LoopEvent::StatusAsked(reply),
            ControlRequest::Operator { command, reply } => {
                LoopEvent::OperatorCommand { command, reply }
            }
            ControlRequest::Load(load) if load.adaptation.is_some() => {
                LoopEvent::AdaptationResult(load)
            }
            ControlRequest::Load(load) => LoopEvent::ModelLoad(load),
            ControlRequest::Adapt { on, reply } => LoopEvent::AdaptationSwitch { on, reply },
            ControlRequest::ReducedForm { generation, terms } => {
                LoopEvent::ReducedForm { generation, terms }
            }
        }
    }
}

/// The loop's buffers, made once before the decode path starts.
struct Scratch {
    datagram: Vec<u8>,
    json: Vec<u8>,
}

impl RtLoop {
    /// Runs until the shutdown flag is set; returns the final status.
    pub fn run(mut self) -> Status {
        let mut scratch = Scratch {
            datagram: vec![0u8; 65_536],
            json: Vec::with_capacity(1024),
        };
        if let Err(e) = self.input.set_nonblocking(true) {
            tracing::error!("cannot make the bin socket non-blocking: {e}");
        }
        if let Err(e) = self.task_input.set_nonblocking(true) {
            tracing::error!("cannot make the task socket non-blocking: {e}");
        }
        // Warm-up (the buffers above) is over: from here on the loop is the
        // decode path, except while it serves control requests.
        alloc_count::set_on_decode_path(true);
        while !self.shutdown.load(Ordering::Relaxed) {
            let (first, second) = self.wait();
            for event in [first, second].into_iter().flatten() {
                self.handle(event, &mut scratch);
            }
            self.flush_records();
            self.reduce.tend(&mut self.engine);
            if !self.control.queue.is_empty() {
                alloc_count::set_on_decode_path(false);
                while let Ok(request) = self.control.queue.try_recv() {
                    self.handle(request.into(), &mut scratch);
                    self.flush_records();
                }
                alloc_count::set_on_decode_path(true);
            }
        }
        alloc_count::set_on_decode_path(false);
        self.on_shutdown()
    }

    /// Sleeps until the next deadline or a readable socket, at most
    /// [`IDLE_WAKE`]; says what woke it (bins before task packets).
    fn wait(&mut self) -> (Option<LoopEvent>, Option<LoopEvent>) {
        let now_ns = sys::monotonic_ns();
        let wait = match self.engine.next_deadline() {
            Some(d) if d <= now_ns => return (Some(LoopEvent::DeadlinePassed { now_ns }), None),
            Some(d) => Duration::from_nanos(d - now_ns).min(IDLE_WAKE),
            None => IDLE_WAKE,
        };
        match sys::wait_readable([&self.input, &self.task_input, &self.control.wake], wait) {
            Ok([bins, task, woken]) => {
                if woken {
                    // The request itself is in the queue, served after
                    // the sockets.
                    self.control.drain_wake();
                }
                let first = if bins {
                    LoopEvent::BinsReadable
                } else {
                    LoopEvent::DeadlinePassed {
                        now_ns: sys::monotonic_ns(),
                    }
                };
                (Some(first), task.then_some(LoopEvent::TaskPacketsReadable))
            }
            Err(e) => {
                tracing::error!("waiting on the bin socket failed: {e}");
                std::thread::sleep(Duration::from_millis(1));
                (None, None)
            }
        }
    }

    fn handle(&mut self, event: LoopEvent, scratch: &mut Scratch) {
        match event {
            LoopEvent::DeadlinePassed { now_ns } => self.on_deadline(now_ns, &mut scratch.json),
            LoopEvent::BinsReadable => self.on_bins_readable(scratch),
            LoopEvent::TaskPacketsReadable => self.on_task_packets_readable(scratch),
            LoopEvent::StatusAsked(reply) => {
                let _ = reply.send(self.status());
            }
            LoopEvent::OperatorCommand { command, reply } => {
                let _ = reply.send(self.on_operator_command(command, &mut scratch.json));
            }
            LoopEvent::ModelLoad(load) => self.on_model_load(*load, &mut scratch.json),
            LoopEvent::AdaptationResult(load) => {
                self.on_adaptation_result(*load, &mut scratch.json)
            }
            LoopEvent::AdaptationSwitch { on, reply } => {
                let _ = reply.send(self.on_adaptation_switch(on));
            }
            LoopEvent::ReducedForm { generation, terms } => {
                if let Some(stale) = self.engine.offer_reduction(generation, *terms) {
                    self.reduce.discard(stale);
                }
            }
        }
    }

    /// A slot's deadline passed: the engine answers every slot due.
    fn on_deadline(&mut self, now_ns: u64, json: &mut Vec<u8>) {
        if let Some(next) = self.engine.next_seq() {
            self.land_due_update(next, json);
        }
        let mut out = out!(self, json);
        self.engine.on_timeout(now_ns, &mut out);
    }

    /// Shutdown: the final status, and the log's end record.
    fn on_shutdown(&mut self) -> Status {
        let status = self.status();
        if let Some(b) = self.batcher.as_mut() {
            let end = serde_json::to_vec(&status).unwrap_or_default();
            b.record_owned(RecordKind::End, sys::monotonic_ns(), end);
            b.close();
        }
        status
    }

    fn flush_records(&mut self) {
        if let Some(b) = self.batcher.as_mut() {
            b.flush();
        }
    }

    /// Reads up to [`MAX_BURST`] bin datagrams: each is stamped, recorded
    /// as read and handed to the engine.
    fn on_bins_readable(&mut self, scratch: &mut Scratch) {
        let Scratch {
            datagram: buf,
            json,
        } = scratch;
        for _ in 0..MAX_BURST {
            match self.input.recv_from(buf) {
                Ok((n, _from)) => {
                    let recv_ns = sys::monotonic_ns();
                    let datagram = &buf[..n];
                    if self.pending_update.is_some() {
                        if let Ok(header) = packet::parse_bin(datagram) {
                            self.land_due_update(header.seq, json);
                        }
                    }
                    if let Some(b) = self.batcher.as_mut() {
                        b.record(RecordKind::Datagram, recv_ns, &[datagram]);
                    }
                    let mut out = out!(self, json);
                    self.engine.on_datagram(recv_ns, datagram, &mut out);
                    self.flush_records();
                }
                Err(e) if e.kind() == std::io::ErrorKind::WouldBlock => return,
                Err(e) if e.kind() == std::io::ErrorKind::Interrupted => continue,
                Err(e) => {
                    tracing::warn!("reading the bin socket failed: {e}");
                    return;
                }
            }
        }
    }

    /// Reads up to [`TASK_BURST`] task packets: each is recorded as read,
    /// parsed and counted. None of them touches the engine.
    fn on_task_packets_readable(&mut self, scratch: &mut Scratch) {
        let buf = &mut scratch.datagram;
        for _ in 0..TASK_BURST {
            match self.task_input.recv_from(buf) {
                Ok((n, _from)) => {
                    let recv_ns = sys::monotonic_ns();
                    let datagram = &buf[..n];
                    if let Some(b) = self.batcher.as_mut() {
                        b.record(RecordKind::Task, recv_ns, &[datagram]);
                    }
                    self.task
                        .on_packet(recv_ns, task_packet::parse_task(datagram));
                }
                Err(e) if e.kind() == std::io::ErrorKind::WouldBlock => return,
                Err(e) if e.kind() == std::io::ErrorKind::Interrupted => continue,
                Err(e) => {
                    tracing::warn!("reading the task socket failed: {e}");
                    return;
                }
            }
        }
        self.task.bursts_cut += 1;
    }

    /// Arm, disarm or halt, recorded as applied or refused.
    fn on_operator_command(
        &mut self,
        command: decoder_core::engine::slot_engine::OperatorCommand,
        json: &mut Vec<u8>,
    ) -> Result<OperatorOutcome, Refused> {
        let mut out = out!(self, json);
        let result = self.engine.operator(command, &mut out);
        let code = session_log::operator_code(command);
        let outcome = u8::from(result.is_err());
        if let Some(b) = self.batcher.as_mut() {
            b.record(
                RecordKind::Operator,
                sys::monotonic_ns(),
                &[&[code, outcome]],
            );
        }
        if self.engine.state() != SupervisorState::Armed {
            self.refuse_pending_update("the daemon left the armed state meanwhile");
        }
        let state = self.engine.state().name();
        use decoder_core::engine::slot_engine::OperatorCommand as Op;
        match result {
            Ok(_) if matches!(command, Op::DriftOn | Op::DriftOff) => {
                Ok(OperatorOutcome::Drift(command == Op::DriftOn))
            }
            Ok(Some(t)) => Ok(OperatorOutcome::Changed(t)),
            Ok(None) => Ok(OperatorOutcome::Unchanged { state }),
            Err(e) => Err(Refused::Operator(e)),
        }
    }

    /// `adapt on|off`, recorded as an event when it took.
    fn on_adaptation_switch(&mut self, on: bool) -> Result<AdaptOutcome, Refused> {
        let result = self.adapt.set(on);
        if result.is_ok() {
            self.refuse_pending_update("adaptation was switched meanwhile");
            if let Some(b) = self.batcher.as_mut() {
                let e = serde_json::json!({"event": "adaptation", "on": on});
                b.record_owned(
                    RecordKind::Event,
                    sys::monotonic_ns(),
                    e.to_string().into_bytes(),
                );
            }
        }
        result.map(AdaptOutcome).map_err(Refused::Adaptation)
    }

    /// An adaptation update: held until its landing slot when that is
    /// still ahead, so where it goes in depends on the bins alone; landed
    /// at once (and counted late) when the worker finished after it. The
    /// loop never waits for it.
    fn on_adaptation_result(&mut self, load: LoadRequest, json: &mut Vec<u8>) {
        let ticket = load.adaptation.expect("an adaptation update");
        let next = self.engine.next_seq().unwrap_or(0);
        if next < ticket.lands_at {
            self.refuse_pending_update("a newer update came");
            self.pending_update = Some((ticket, Box::new(load)));
            return;
        }
        if next > ticket.lands_at {
            self.adapt.updates_late += 1;
        }
        self.land_update(ticket, load, json);
    }

    /// The pending update goes in when the slot about to be handled is
    /// `seq` ≥ its landing slot.
    fn land_due_update(&mut self, seq: u64, json: &mut Vec<u8>) {
        if let Some((ticket, load)) = self.pending_update.take_if(|(t, _)| seq >= t.lands_at) {
            self.land_update(ticket, *load, json);
        }
    }

    /// Swaps an update in as a load is, or refuses it when it is stale or
    /// the daemon is not armed.
    fn land_update(&mut self, ticket: UpdateTicket, load: LoadRequest, json: &mut Vec<u8>) {
        match self.adapt.accepts(ticket.generation, self.engine.state()) {
            Ok(()) => self.on_model_load(load, json),
            Err(why) => {
                let _ = load.reply.send(Err(Refused::Adaptation(why)));
            }
        }
    }

    /// Refuses a pending update (another model, a switch, or a state
    /// other than armed made it stale).
    fn refuse_pending_update(&mut self, why: &str) {
        if let Some((_, load)) = self.pending_update.take() {
            let _ = load.reply.send(Err(Refused::Adaptation(why.into())));
        }
    }

    /// A checked model swapped in at the next bin boundary, recorded as a
    /// model record (so a replay swaps it in where the daemon did).
    fn on_model_load(&mut self, load: LoadRequest, json: &mut Vec<u8>) {
        let LoadRequest {
            pipeline,
            model_bytes,
            model,
            info,
            reply,
            adaptation,
        } = load;
        let mut out = out!(self, json);
        match self.engine.swap_pipeline(pipeline, &mut out) {
            Ok(old) => {
                if let Some(b) = self.batcher.as_mut() {
                    b.record_owned(RecordKind::Model, sys::monotonic_ns(), model_bytes);
                    if adaptation.is_some() {
                        let e = serde_json::json!({
                            "event": "adaptation_update",
                            "model": info.path,
                            "sha256": info.sha256,
                        });
                        b.record_owned(
                            RecordKind::Event,
                            sys::monotonic_ns(),
                            e.to_string().into_bytes(),
                        );
                    }
                }
                if adaptation.is_none() {
                    self.adapt.new_base(&model, &info);
                    self.refuse_pending_update("an operator loaded another model meanwhile");
                }
                let live = matches!(
                    self.engine.state(),
                    SupervisorState::Armed | SupervisorState::Coasting
                );
                if live && info.kind != self.info.model.kind {
                    let w = format!(
                        "{} model {} swapped in while {} over a {} model; check the decoded velocity before relying on it",
                        info.kind,
                        info.path,
                        self.engine.state().name(),
                        self.info.model.kind
                    );
                    tracing::warn!("{w}");
                    self.info.model_warnings.push(w);
                }
                self.info.model = info;
                let seq = self.engine.next_seq().unwrap_or(0);
                let _ = reply.send(Ok(Swapped {
                    first_seq: seq,
                    old,
                }));
            }
            Err(refused) => {
                let _ = reply.send(Err(Refused::Swap(refused.0)));
            }
        }
    }

    fn status(&self) -> Status {
        let c = self.engine.counters().clone();
        let (dead, saturated) = self.engine.channel_health();
        Status {
            status_version: crate::status::STATUS_VERSION,
            daemon_version: self.info.version.clone(),
            uptime_s: self.info.started.elapsed().as_secs_f64(),
            state: self.engine.state().name().into(),
            armed_at_start: self.info.armed_at_start,
            listen: self.info.listen,
            actuator: self.info.actuator,
            model: self.info.model.clone(),
            stream_started: self.engine.next_seq().is_some(),
            next_seq: self.engine.next_seq(),
            consecutive_missing: self.engine.consecutive_missing(),
            last_bin_age_s: (self.monitor.last_bin_recv_ns != 0).then(|| {
                sys::monotonic_ns().saturating_sub(self.monitor.last_bin_recv_ns) as f64 / 1e9
            }),
            last_change: self.monitor.last_transition.as_ref().map(Into::into),
            control_socket: self.info.control_socket.display().to_string(),
            model_warnings: self.info.model_warnings.clone(),
            rejected: rejected_by_name(&c),
            counters: c,
            send_errors: self.monitor.send_errors,
            events_not_logged: self.events_not_logged,
            rate_clamps: self.engine.rate_clamps(),
            latency: self.monitor.latency(),
            // Channel health means nothing before the first bin.
            dead_channels: if self.engine.next_seq().is_some() {
                dead
            } else {
                Vec::new()
            },
            saturated_channels: saturated,
            recording: self
                .info
                .recording
                .as_ref()
                .map(|(p, s)| s.snapshot(Some(p))),
            // Read from /proc by the control side, not on this thread.
            rss_bytes: None,
            decode_path_allocations: alloc_count::decode_path_allocations(),
            realtime_warnings: self.info.realtime_warnings.clone(),
            task: self.task.status(self.info.task_listen, sys::monotonic_ns()),
            adaptation: {
                let mut a = self.adapt.status();
                a.update_pending_at = self.pending_update.as_ref().map(|(t, _)| t.lands_at);
                a
            },
            last_command: self.monitor.last_command[..self.monitor.dims].to_vec(),
            last_estimate: self.monitor.last_estimate[..self.monitor.dims].to_vec(),
            click: {
                let (clicks, last_click_seq, probability) = self.engine.clicks();
                let minutes = self.engine.counters().slots_answered as f64
                    * self.engine.settings().bin_width.seconds()
                    / 60.0;
                ClickStatus {
                    decoder: self.engine.has_click(),
                    probability: f64::from(probability),
                    clicks,
                    per_minute: if minutes > 0.0 {
                        clicks as f64 / minutes
                    } else {
                        0.0
                    },
                    last_click_seq,
                }
            },
            drift: {
                let counters = self.engine.counters();
                let tracker = self.engine.pipeline().drift();
                DriftStatus {
                    enabled: tracker.is_some(),
                    left_out: tracker.map_or_else(Vec::new, |t| {
                        t.left_out_channels()
                            .map(|(channel, r)| LeftOutChannel {
                                channel,
                                reason: r.name().to_string(),
                            })
                            .collect()
                    }),
                    left_out_total: counters.channels_left_out,
                    restored_total: counters.channels_restored,
                    bias: tracker.map_or_else(Vec::new, |t| t.bias().to_vec()),
                    baseline_ratio: tracker.map_or([1.0; 3], |t| {
                        let b = t.baseline_spread();
                        [b.min_ratio, b.median_ratio, b.max_ratio]
                    }),
                    reduced_forms: self.engine.pipeline().reductions().0,
                    reduced_forms_built_at_the_bin: self.engine.pipeline().reductions().1,
                }
            },
        }
    }
}
