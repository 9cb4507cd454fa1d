//! The decoding core: everything between a bin's counts and a velocity
//! estimate, and everything needed to get a decoder trained and checked.
//!
//! This crate is pure: no sockets, threads, async runtime or clock. Time,
//! when it matters, comes in as data. The daemon and the offline tools both
//! decode through [`pipeline::DecodePipeline`], so a replay reproduces a live
//! session bit for bit.

pub mod closed_loop;
pub mod evaluate;
pub mod folds;
pub mod glm;
pub mod goodness;
pub mod kalman;
pub mod linalg;
pub mod log_replay;
pub mod metrics;
pub mod model_file;
pub mod packet;
pub mod pipeline;
pub mod point_process;
pub mod pp_fit;
pub mod refit;
pub mod session;
pub mod session_log;
pub mod simulate;
pub mod slots;
pub mod stats;
pub mod supervisor;
pub mod train_config;
pub mod wiener;

pub use model_file::{DecoderModel, ModelFile, ModelFileError, Provenance};
pub use pipeline::{BinEstimate, DecodePipeline, PipelineError};
pub use session::{Session, SessionError};

/// Why a decoder could not be trained or evaluated on a block.
#[derive(Debug, thiserror::Error)]
pub enum TrainError {
    #[error(
        "the block has no kinematics.npy; training and evaluation need the recorded kinematics"
    )]
    NoKinematics,
    #[error("unknown kinematic column {name:?}; the block's manifest names {available:?}")]
    UnknownKinematic {
        name: String,
        available: Vec<String>,
    },
    #[error("option {key}: {problem}")]
    Option { key: &'static str, problem: String },
    #[error("only {bins} training bins; the fit needs at least {needed}")]
    TooFewBins { bins: u64, needed: u64 },
    #[error("cannot fit {what}: {problem}")]
    Degenerate { what: &'static str, problem: String },
    #[error(transparent)]
    Kalman(#[from] kalman::KalmanError),
    #[error(transparent)]
    Pipeline(#[from] PipelineError),
}
