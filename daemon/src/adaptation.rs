//! Online adaptation in the daemon: the real-time thread's side collects
//! batches of usable bins without allocating, a worker thread refits and
//! checks each update (`decoder_core::fit::adapt`), and the update goes in
//! through the same hot-swap path as an operator's `load`, so it takes
//! effect at a bin boundary and is a model record in the session log —
//! which is why `replay-tool verify` reproduces an adaptive session bit
//! for bit.
//!
//! A bin is usable when the daemon was armed (not coasting, not disarmed,
//! not halted), the bin's counts came, and the task computer's latest
//! state (drawn before this bin: `bin_seq < seq`) says closed loop, a
//! valid target, and a reach or hold phase. Each update carries the
//! generation it was computed in; an operator's load, `adapt on` or `adapt
//! off` starts a new generation, and the real-time thread refuses an
//! update from an older one or one that arrives while not armed.

use std::sync::{Arc, Mutex};

use crossbeam_channel::{Receiver, Sender, TryRecvError};
use decoder_core::ModelFile;
use decoder_core::decoders::DecoderModel;
use decoder_core::engine::slot_engine::SlotAnswer;
use decoder_core::engine::supervisor::SupervisorState;
use decoder_core::fit::adapt::{
    AdaptOptions, AdaptSkip, Batch, BatchRow, adapt_kalman, adapt_point_process, check_adaptable,
};
use decoder_core::wire::packet::FLAG_BIN_MISSING;
use decoder_core::wire::task_packet::{MAX_TASK_DIMS, Phase, TaskState};

use crate::model_identity::ModelInfo;
use crate::requests::{ControlRequest, LoadRequest, Swapped, ToLoop, UpdateTicket};
use crate::status::{AdaptStatus, AppliedUpdate, WorkerCounts};

/// What the worker is told.
pub enum AdaptMsg {
    /// The running model changed (an operator's load, or start).
    Base {
        model: Box<ModelFile>,
        info: ModelInfo,
    },
    /// A full batch to refit on, and the slot its update may go in at.
    Batch {
        generation: u64,
        batch: Batch,
        lands_at: u64,
    },
}

/// The real-time thread's side: collects the batch.
pub struct Collector {
    pub on: bool,
    pub generation: u64,
    options: AdaptOptions,
    n_channels: usize,
    bins_per_batch: usize,
    /// Slots between the last slot of a batch and its update's landing.
    land_after_bins: u64,
    /// Updates the worker finished after their landing slot, swapped in
    /// at once (the loop never waits for the worker).
    pub updates_late: u64,
    /// Per model output, the axis it is the velocity of (vel_x → 0).
    output_axis: Vec<Option<usize>>,
    unavailable: Option<String>,
    batch: Batch,
    staged: Option<(u64, [f64; MAX_TASK_DIMS])>,
    to_worker: Sender<AdaptMsg>,
    spare: Receiver<Batch>,
    spare_tx: Sender<Batch>,
    buffers: usize,
    batches_sent: u64,
    batches_dropped_busy: u64,
    counts: Arc<Mutex<WorkerCounts>>,
}

/// Why a model cannot adapt, or `None`.
fn unavailable(model: &ModelFile) -> Option<String> {
    if model.input == decoder_core::wire::packet::BinKind::Features {
        return Some(
            "the running model decodes features; adaptation refits the observation model from counts"
                .into(),
        );
    }
    match &model.decoder {
        DecoderModel::Kalman(k) => check_adaptable(&k.state).err().map(|e| e.to_string()),
        DecoderModel::PointProcess(p) => check_adaptable(&p.state).err().map(|e| e.to_string()),
        other => Some(format!(
            "the running model is a {} decoder; adaptation refits the observation model of a Kalman or point-process decoder",
            other.kind()
        )),
    }
}

fn output_axes(model: &ModelFile) -> Vec<Option<usize>> {
    model
        .decoder
        .outputs()
        .iter()
        .map(|o| match o.strip_prefix("vel_") {
            Some("x") => Some(0),
            Some("y") => Some(1),
            Some("z") => Some(2),
            Some(n) => n.parse::<usize>().ok().and_then(|n| n.checked_sub(1)),
            None => None,
        })
        .map(|a| a.filter(|a| *a < MAX_TASK_DIMS))
        .collect()
}

impl Collector {
    /// The collector and the worker thread, for the model the daemon
    /// starts with.
    pub fn start(
        options: AdaptOptions,
        land_after_s: f64,
        model: &ModelFile,
        info: &ModelInfo,
        control: ToLoop,
    ) -> std::io::Result<Collector> {
        let (to_worker, from_rt) = crossbeam_channel::bounded::<AdaptMsg>(8);
        let (spare_tx, spare) = crossbeam_channel::bounded::<Batch>(2);
        let counts = Arc::new(Mutex::new(WorkerCounts::default()));
        let bin_s = model.bin_width.seconds();
        let bins_per_batch = ((options.batch_s / bin_s).round() as usize).max(1);
        let land_after_bins = ((land_after_s / bin_s).round() as u64).max(1);
        let n = model.decoder.n_channels();
        let worker = Worker {
            options: options.clone(),
            base: None,
            control,
            spare: spare_tx.clone(),
            counts: counts.clone(),
            updates: 0,
        };
        std::thread::Builder::new()
            .name("decoderd-adapt".into())
            .spawn(move || worker.run(from_rt))?;
        let c = Collector {
            on: false,
            generation: 0,
            options,
            n_channels: n,
            bins_per_batch,
            land_after_bins,
            updates_late: 0,
            output_axis: output_axes(model),
            unavailable: unavailable(model),
            batch: Batch::default(),
            staged: None,
            to_worker,
            spare,
            spare_tx,
            buffers: 0,
            batches_sent: 0,
            batches_dropped_busy: 0,
            counts,
        };
        let _ = c.to_worker.try_send(AdaptMsg::Base {
            model: Box::new(model.clone()),
            info: info.clone(),
        });
        Ok(c)
    }

    /// Turns adaptation on or off (a new generation either way); the
    /// message for the operator.
    pub fn set(&mut self, on: bool) -> Result<String, String> {
        if on {
            if let Some(why) = &self.unavailable {
                return Err(format!("adaptation refused: {why}"));
            }
            // The batch buffers, allocated here on the control path, never
            // per bin: one collecting, one with the worker.
            while self.buffers < 2 {
                let b = Batch::with_capacity(self.n_channels, self.bins_per_batch);
                if self.buffers == 0 {
                    self.batch = b;
                } else {
                    let _ = self.spare_tx.try_send(b);
                }
                self.buffers += 1;
            }
        }
        let was = self.on;
        self.on = on;
        self.generation += 1;
        self.batch.clear();
        self.staged = None;
        Ok(match (was, on) {
            (false, true) => format!(
                "adaptation on: an update every {} s of armed closed-loop bins ({} bins), half-life {} s",
                self.options.batch_s, self.bins_per_batch, self.options.half_life_s
            ),
            (true, true) => "adaptation already on; its batch starts afresh".into(),
            (_, false) => "adaptation off; the running model stays as it is".into(),
        })
    }

    /// An operator loaded `model`: a new generation, and the worker's
    /// base. Called on the control path.
    pub fn new_base(&mut self, model: &ModelFile, info: &ModelInfo) {
        self.generation += 1;
        self.unavailable = unavailable(model);
        self.output_axis = output_axes(model);
        self.batch.clear();
        self.staged = None;
        if self.unavailable.is_some() && self.on {
            self.on = false;
            tracing::warn!("adaptation turned off: the loaded model cannot adapt");
        }
        let _ = self.to_worker.try_send(AdaptMsg::Base {
            model: Box::new(model.clone()),
            info: info.clone(),
        });
    }

    /// Whether an update computed in `generation` may go in now.
    pub fn accepts(&self, generation: u64, state: SupervisorState) -> Result<(), String> {
        if !self.on {
            return Err("adaptation is off".into());
        }
        if generation != self.generation {
            return Err("another model was loaded or adaptation restarted meanwhile".into());
        }
        if state != SupervisorState::Armed {
            return Err(format!("the daemon is {}, not armed", state.name()));
        }
        Ok(())
    }

    /// A bin decoded from its counts (before its slot is answered).
    pub fn on_decoded(&mut self, seq: u64, counts: &[u16], estimate: &[f64]) {
        if !self.on || counts.len() != self.n_channels {
            return;
        }
        let mut by_axis = [0.0; MAX_TASK_DIMS];
        for (v, axis) in estimate.iter().zip(&self.output_axis) {
            if let Some(a) = axis {
                by_axis[*a] = *v;
            }
        }
        if self.batch.counts.len() + counts.len() <= self.batch.counts.capacity() {
            self.batch.counts.extend_from_slice(counts);
            self.staged = Some((seq, by_axis));
        }
    }

    /// A slot answered; `task` is the task computer's latest state.
    pub fn on_answer(&mut self, slot: &SlotAnswer, task: Option<&TaskState>) {
        if !self.on {
            return;
        }
        // Every decoded bin is a row (its counts are the spike history of
        // the next); only a usable one is fitted.
        if let Some((seq, decoded)) = self.staged.take() {
            if seq == slot.seq && self.batch.rows.len() < self.batch.rows.capacity() {
                let usable = task.is_some_and(|t| {
                    slot.state == SupervisorState::Armed
                        && slot.flags & FLAG_BIN_MISSING == 0
                        && t.closed_loop()
                        && t.target_valid()
                        && matches!(t.phase, Phase::Reach | Phase::Hold)
                        && t.bin_seq < slot.seq
                });
                let blank = TaskState::new(1);
                let t = task.filter(|_| usable).unwrap_or(&blank);
                self.batch.rows.push(BatchRow {
                    seq,
                    usable,
                    dims: t.dims,
                    cursor: t.cursor_pos,
                    target: t.target_pos,
                    radius: t.target_radius,
                    decoded,
                });
            } else {
                let keep = self.batch.counts.len() - self.n_channels;
                self.batch.counts.truncate(keep);
            }
        }
        self.batch.slots += 1;
        if self.batch.slots >= self.bins_per_batch {
            self.ship(slot.seq + self.land_after_bins);
        }
    }

    fn ship(&mut self, lands_at: u64) {
        match self.spare.try_recv() {
            Ok(mut fresh) => {
                fresh.clear();
                fresh.n_channels = self.n_channels;
                let full = std::mem::replace(&mut self.batch, fresh);
                match self.to_worker.try_send(AdaptMsg::Batch {
                    generation: self.generation,
                    batch: full,
                    lands_at,
                }) {
                    Ok(()) => self.batches_sent += 1,
                    Err(e) => {
                        self.batches_dropped_busy += 1;
                        if let AdaptMsg::Batch { batch, .. } = e.into_inner() {
                            let _ = self.spare_tx.try_send(batch);
                        }
                    }
                }
            }
            Err(TryRecvError::Empty | TryRecvError::Disconnected) => {
                // The worker still holds the other buffer: this batch goes.
                self.batches_dropped_busy += 1;
                self.batch.clear();
            }
        }
    }

    pub fn status(&self) -> AdaptStatus {
        AdaptStatus {
            on: self.on,
            unavailable: self.unavailable.clone(),
            batch_s: self.options.batch_s,
            half_life_s: self.options.half_life_s,
            bins_per_batch: self.bins_per_batch,
            land_after_bins: self.land_after_bins,
            updates_late: self.updates_late,
            update_pending_at: None,
            batch_rows: self.batch.usable_rows(),
            batch_slots: self.batch.slots,
            batches_sent: self.batches_sent,
            batches_dropped_busy: self.batches_dropped_busy,
            worker: self.counts.lock().map(|c| c.clone()).unwrap_or_default(),
        }
    }
}

/// The worker thread: refit, check, hand to the real-time thread.
struct Worker {
    options: AdaptOptions,
    base: Option<(ModelFile, ModelInfo)>,
    control: ToLoop,
    spare: Sender<Batch>,
    counts: Arc<Mutex<WorkerCounts>>,
    updates: u64,
}

impl Worker {
    fn run(mut self, from_rt: Receiver<AdaptMsg>) {
        while let Ok(msg) = from_rt.recv() {
            match msg {
                AdaptMsg::Base { model, info } => self.base = Some((*model, info)),
                AdaptMsg::Batch {
                    generation,
                    batch,
                    lands_at,
                } => {
                    // Messages come in order, so a batch is refitted on the
                    // model it was collected under; an update from a stale
                    // generation is refused by the real-time thread.
                    let prepared = self.prepare(generation, lands_at, &batch);
                    let _ = self.spare.try_send(batch);
                    let handed = prepared.and_then(|p| {
                        let Prepared { request, rest } = p;
                        match self.control.try_send(request) {
                            Ok(()) => Some(rest),
                            Err(_) => {
                                self.note(|c| c.not_applied += 1);
                                None
                            }
                        }
                    });
                    // Finished with this batch: its update (if any) is in the
                    // loop's queue, ahead of any status asked after this.
                    self.note(|c| c.batches_finished += 1);
                    if let Some(rest) = handed {
                        self.await_landing(rest);
                    }
                }
            }
        }
    }

    fn note(&self, f: impl FnOnce(&mut WorkerCounts)) {
        if let Ok(mut c) = self.counts.lock() {
            f(&mut c);
        }
    }

    /// Refits and checks one batch; the load request for the loop, or
    /// `None` when the batch was skipped (counted).
    fn prepare(&mut self, generation: u64, lands_at: u64, batch: &Batch) -> Option<Prepared> {
        let Some((base, base_info)) = &self.base else {
            return None;
        };
        let result = match &base.decoder {
            DecoderModel::Kalman(k) => {
                adapt_kalman(k, batch, &self.options).map(|(m, r)| (DecoderModel::Kalman(m), r))
            }
            DecoderModel::PointProcess(p) => adapt_point_process(p, batch, &self.options)
                .map(|(m, r)| (DecoderModel::PointProcess(m), r)),
            _ => return None,
        };
        let (adapted, report) = match result {
            Ok(r) => r,
            Err(skip) => {
                let too_few = matches!(skip, AdaptSkip::TooFewBins { .. });
                tracing::info!("adaptation batch skipped: {skip}");
                self.note(|c| {
                    if too_few {
                        c.skipped_too_few_bins += 1;
                    } else {
                        c.skipped_refused += 1;
                    }
                    c.last_skip = Some(skip.to_string());
                });
                return None;
            }
        };
        let update = self.updates + 1;
        let mut file = base.clone();
        file.decoder = adapted;
        file.provenance.trained_at =
            humantime::format_rfc3339_seconds(std::time::SystemTime::now()).to_string();
        file.provenance.tool_version = crate::VERSION.into();
        file.provenance.fit_document = serde_json::json!({
            "adaptation": {
                "update": update,
                "base_sha256": base_info.sha256,
                "options": self.options,
                "report": report,
            },
            "base_fit": serde_json::from_str::<serde_json::Value>(&base.provenance.fit_document)
                .unwrap_or_default(),
        })
        .to_string();
        file.provenance.cv = None;
        let bytes = file.to_bytes();
        let pipeline = match file.pipeline() {
            Ok(p) => p,
            Err(e) => {
                self.note(|c| {
                    c.skipped_refused += 1;
                    c.last_skip = Some(e.to_string());
                });
                return None;
            }
        };
        let info = ModelInfo::of(
            format!(
                "adaptation update {update} of {}",
                root_path(&base_info.path)
            ),
            &file,
            &bytes,
        );
        let (request, reply) = LoadRequest::ask(
            file.clone(),
            bytes,
            info.clone(),
            pipeline,
            Some(UpdateTicket {
                generation,
                lands_at,
            }),
        );
        Some(Prepared {
            request,
            rest: Handed {
                reply,
                update,
                report,
                file,
                info,
            },
        })
    }

    /// Waits for the loop to swap the update in (at its landing slot) or
    /// refuse it; on a swap the update is the base of the next batch.
    fn await_landing(&mut self, handed: Handed) {
        let Handed {
            reply,
            update,
            report,
            file,
            info,
        } = handed;
        match reply.blocking_recv() {
            Ok(Ok(Swapped {
                first_seq: from_seq,
                old,
            })) => {
                drop(old);
                self.updates = update;
                tracing::info!(
                    "adaptation update {update} decodes from seq {from_seq}: {} bins, change {:.4}{}",
                    report.rows,
                    report.relative_change,
                    if report.limited { " (limited)" } else { "" }
                );
                self.note(|c| {
                    c.updates = update;
                    c.last_update = Some(AppliedUpdate {
                        update,
                        from_seq,
                        report,
                    });
                });
                self.base = Some((file, info));
            }
            Ok(Err(why)) => {
                tracing::info!("adaptation update not applied: {why}");
                self.note(|c| {
                    c.not_applied += 1;
                    c.last_skip = Some(format!("not applied: {why}"));
                });
            }
            Err(_) => {}
        }
    }
}

/// An update ready for the loop: the request, and what the worker keeps
/// to learn its fate.
struct Prepared {
    request: ControlRequest,
    rest: Handed,
}

struct Handed {
    reply: tokio::sync::oneshot::Receiver<Result<Swapped, crate::requests::Refused>>,
    update: u64,
    report: decoder_core::fit::adapt::AdaptReport,
    file: ModelFile,
    info: ModelInfo,
}

/// The operator's model path behind a chain of updates.
fn root_path(path: &str) -> &str {
    path.rsplit(" of ").next().unwrap_or(path)
}
