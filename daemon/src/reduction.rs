//! Building a Kalman filter's reduced form off the decode thread. When
//! drift handling leaves channels out of a Kalman decoder (or brings them
//! back), the filter without those channels costs O(r·N²) to build with a
//! full Q — tens of milliseconds at a thousand channels, far more than a
//! bin. The decode pipeline names the change and the bin it takes effect
//! at (`drift.left_out_after_s` later); this worker builds the terms
//! meanwhile and hands them to the loop, which offers them to the
//! pipeline. The terms are a pure function of the model and the flags, so
//! if they come late the pipeline builds the same ones at the bin (counted
//! in status) and a replay still matches the live session bit for bit.
//! Terms the filter no longer uses are dropped here too, off the decode
//! path.

use crossbeam_channel::Sender;
use decoder_core::decoders::kalman::filter::ReducedTerms;
use decoder_core::engine::pipeline::ReductionRequest;
use decoder_core::engine::slot_engine::SlotEngine;

use crate::alloc_count;
use crate::requests::{ControlRequest, ToLoop};

enum Job {
    Build(ReductionRequest),
    Drop(ReducedTerms),
}

/// The loop's handle on the worker.
pub struct ReducedFormWorker {
    jobs: Sender<Job>,
    /// The generation of the last change sent to be built.
    sent: Option<u64>,
}

impl ReducedFormWorker {
    /// Starts the worker thread; it answers through `to_loop` and ends
    /// when this handle is dropped.
    pub fn start(to_loop: ToLoop) -> std::io::Result<ReducedFormWorker> {
        let (jobs, rx) = crossbeam_channel::bounded::<Job>(16);
        std::thread::Builder::new()
            .name("decoderd-reduce".into())
            .spawn(move || {
                for job in rx {
                    match job {
                        Job::Build(req) => {
                            let terms = req.reducer.terms(&req.left_out);
                            let _ = to_loop.try_send(ControlRequest::ReducedForm {
                                generation: req.generation,
                                terms: Box::new(terms),
                            });
                        }
                        Job::Drop(terms) => drop(terms),
                    }
                }
            })?;
        Ok(ReducedFormWorker { jobs, sent: None })
    }

    /// Once a loop turn: sends a new pending change to be built, and terms
    /// the filter put aside to be dropped. Allocation-free unless a change
    /// is new (its flags are copied, off the decode-path count).
    pub fn tend(&mut self, engine: &mut SlotEngine) {
        if let Some(g) = engine.pending_reduction()
            && self.sent != Some(g)
        {
            alloc_count::set_on_decode_path(false);
            let request = engine.reduction_request();
            alloc_count::set_on_decode_path(true);
            if let Some(r) = request {
                self.sent = Some(g);
                // A full queue: the pipeline builds them at the bin.
                let _ = self.jobs.try_send(Job::Build(r));
            }
        }
        if let Some(spent) = engine.take_spent_reduction() {
            self.discard(spent);
        }
    }

    /// Terms no longer wanted, dropped on the worker.
    pub fn discard(&self, terms: ReducedTerms) {
        // A full queue: freed here after all.
        if let Err(e) = self.jobs.try_send(Job::Drop(terms)) {
            drop(e.into_inner());
        }
    }
}
