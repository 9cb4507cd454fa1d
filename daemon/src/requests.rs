//! The daemon's own vocabulary between its threads: what the control
//! socket and the adaptation worker ask of the real-time loop, and what the
//! loop answers, typed (a state change, a swap, or why it was refused). It
//! has a module of its own so that the loop, the control side and the
//! adaptation worker all stand on it and none of them on another.

use decoder_core::ModelFile;
use decoder_core::engine::pipeline::DecodePipeline;
use decoder_core::engine::slot_engine::{OperatorCommand, SwapRefused};
use decoder_core::engine::supervisor::{ArmRefused, Transition};
use tokio::sync::oneshot;

use crate::model_identity::ModelInfo;
use crate::status::Status;

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
    /// An adaptation update, computed in this generation (`None`: an
    /// operator's load).
    pub adaptation: Option<u64>,
    pub reply: oneshot::Sender<Result<Swapped, Refused>>,
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
        adaptation: Option<u64>,
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
