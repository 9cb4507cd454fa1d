//! Everything offline that turns a calibration block into a checked
//! decoder: least-squares sums, Kalman and Wiener fitting, Poisson GLM
//! encoding models and the point-process decoder built from them, folds
//! and cross-validated evaluation, decoding metrics, time-rescaling
//! goodness of fit, intention re-estimation for retraining, and the
//! training configuration file.
//!
//! The per-bin code ([`crate::decoders`], [`crate::engine`]) never imports
//! this module.

pub mod adapt;
pub mod click;
pub mod config;
pub mod evaluate;
pub mod folds;
pub mod glm;
pub mod goodness;
pub mod intention;
pub mod kalman;
pub mod least_squares;
pub mod metrics;
pub mod point_process;
pub mod rows;
pub mod wiener;

use crate::decoders::kalman::KalmanError;
use crate::engine::pipeline::PipelineError;

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
    #[error(
        "the {decoder} needs spike counts, and this block holds continuous features (features.npy); train a kalman or wiener decoder on it, or give a block of counts"
    )]
    NeedsCounts { decoder: &'static str },
    #[error("option {key}: {problem}")]
    Option { key: &'static str, problem: String },
    #[error("only {bins} training bins; the fit needs at least {needed}")]
    TooFewBins { bins: u64, needed: u64 },
    #[error("cannot fit {what}: {problem}")]
    Degenerate { what: &'static str, problem: String },
    #[error("the fitted model cannot be run: {0}")]
    Model(#[from] crate::decoders::ModelError),
    #[error(transparent)]
    Kalman(#[from] KalmanError),
    #[error(transparent)]
    Pipeline(#[from] PipelineError),
    #[error(transparent)]
    Block(#[from] crate::formats::block::BlockError),
}
