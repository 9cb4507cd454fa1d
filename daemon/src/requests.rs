//! The daemon's own vocabulary between its threads: what the control
//! socket and the adaptation worker ask of the real-time loop, and what the
//! loop answers, typed (a state change, a swap, or why it was refused). It
//! has a module of its own so that the loop, the control side and the
//! adaptation worker all stand on it and none of them on another.

use std::os::unix::net::UnixDatagram;
use std::sync::Arc;

use crossbeam_channel::{Receiver, Sender, TrySendError};
use decoder_core::ModelFile;
use decoder_core::engine::pipeline::DecodePipeline;
use decoder_core::engine::slot_engine::{OperatorCommand, SwapRefused};
use decoder_core::engine::supervisor::{ArmRefused, Transition};
use tokio::sync::oneshot;

use crate::model_identity::ModelInfo;
use crate::status::Status;

/// The way into the decode loop from another thread: a bounded queue and
/// a wake-up datagram, so the loop serves a request as soon as it is
/// queued instead of at its next idle wake (a status round trip is then
/// one loop turn, which a simulated session pays every bin). Sending never
/// blocks: a full queue is an answer, and a full wake-up socket means the
/// loop is already due to wake.
#[derive(Clone)]
pub struct ToLoop {
    queue: Sender<ControlRequest>,
    wake: Arc<UnixDatagram>,
}

/// The loop's end of [`ToLoop`]: the queue, and the socket the loop
/// polls beside its bin and task sockets.
pub struct FromOthers {
    pub queue: Receiver<ControlRequest>,
    pub wake: UnixDatagram,
}

impl ToLoop {
    /// A queue of `capacity` requests and its wake-up socket pair.
    pub fn channel(capacity: usize) -> std::io::Result<(ToLoop, FromOthers)> {
        let (queue_tx, queue) = crossbeam_channel::bounded(capacity);
        let (wake_tx, wake) = UnixDatagram::pair()?;
        wake_tx.set_nonblocking(true)?;
        wake.set_nonblocking(true)?;
        Ok((
            ToLoop {
                queue: queue_tx,
                wake: Arc::new(wake_tx),
            },
            FromOthers { queue, wake },
        ))
    }

    /// Queues `request` and wakes the loop.
    pub fn try_send(&self, request: ControlRequest) -> Result<(), TrySendError<ControlRequest>> {
        self.queue.try_send(request)?;
        let _ = self.wake.send(&[1]);
        Ok(())
    }
}

impl FromOthers {
    /// Empties the wake-up socket (the requests stay in the queue).
    pub fn drain_wake(&self) {
        let mut byte = [0u8; 16];
        while self.wake.recv(&mut byte).is_ok() {}
    }
}

/// What the loop is asked between bins.
pub enum ControlRequest {
    Status(oneshot::Sender<Status>),
    Operator {
        command: OperatorCommand,
        reply: oneshot::Sender<Result<OperatorOutcome, Refused>>,
    },
    Load(Box<LoadRequest>),
    /// `ctl adapt on|off`.
    Adapt {
        on: bool,
        reply: oneshot::Sender<Result<AdaptOutcome, Refused>>,
    },
    /// A Kalman filter's reduced form, built by the worker of
    /// [`crate::reduction`] for the change of that generation.
    ReducedForm {
        generation: u64,
        terms: Box<decoder_core::decoders::kalman::filter::ReducedTerms>,
    },
}

/// What an operator command did.
#[derive(Clone, Debug, PartialEq)]
pub enum OperatorOutcome {
    /// The supervisor changed state.
    Changed(Transition),
    /// It was already in the state asked for.
    Unchanged { state: &'static str },
    /// Drift handling is now on (true) or off.
    Drift(bool),
}

impl std::fmt::Display for OperatorOutcome {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            OperatorOutcome::Changed(t) => {
                write!(f, "{} -> {} at seq {}", t.from.name(), t.to.name(), t.seq)
            }
            OperatorOutcome::Unchanged { state } => write!(f, "already {state}"),
            OperatorOutcome::Drift(on) => {
                write!(f, "drift handling {}", if *on { "on" } else { "off" })
            }
        }
    }
}

/// What `adapt on|off` did, in words for the operator.
#[derive(Clone, Debug, PartialEq)]
pub struct AdaptOutcome(pub String);

impl std::fmt::Display for AdaptOutcome {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

/// Why the loop refused a request.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum Refused {
    #[error("refused: {0}")]
    Operator(ArmRefused),
    #[error("{0}")]
    Swap(SwapRefused),
    /// Adaptation's own reasons (off, stale, not armed, unavailable).
    #[error("{0}")]
    Adaptation(String),
}

/// A model already read, checked and built into a pipeline off the
/// real-time thread; only the finished pipeline crosses.
pub struct LoadRequest {
    pub pipeline: DecodePipeline,
    pub model_bytes: Vec<u8>,
    pub model: Box<ModelFile>,
    pub info: ModelInfo,
    /// An adaptation update and where it may go in (`None`: an
    /// operator's load).
    pub adaptation: Option<UpdateTicket>,
    pub reply: oneshot::Sender<Result<Swapped, Refused>>,
}

/// Where an adaptation update may go in.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct UpdateTicket {
    /// The adaptation generation it was computed in.
    pub generation: u64,
    /// The first slot it may decode: a set number of slots after the last
    /// slot of its batch, so where it lands is a function of the bins,
    /// not of when the worker finished.
    pub lands_at: u64,
}

/// A model swapped in.
pub struct Swapped {
    /// The seq of the first slot the new model decodes.
    pub first_seq: u64,
    /// The old pipeline, to be freed by the requester, not the loop.
    pub old: DecodePipeline,
}

impl LoadRequest {
    /// The one way a load is asked for, by an operator (`adaptation:
    /// None`) or by the adaptation worker; the reply comes on the receiver.
    pub fn ask(
        model: ModelFile,
        model_bytes: Vec<u8>,
        info: ModelInfo,
        pipeline: DecodePipeline,
        adaptation: Option<UpdateTicket>,
    ) -> (ControlRequest, oneshot::Receiver<Result<Swapped, Refused>>) {
        let (reply, rx) = oneshot::channel();
        let request = LoadRequest {
            pipeline,
            model_bytes,
            model: Box::new(model),
            info,
            adaptation,
            reply,
        };
        (ControlRequest::Load(Box::new(request)), rx)
    }
}
