//! The decoders as they run per bin: each kind's trained parameters (the
//! model, as stored in a model file) and its filter (the runtime built once
//! from the model, allocation-free per bin). Nothing here fits a model or
//! reads a file: fitting is in [`crate::fit`], storage in [`crate::formats`].

pub mod click;
pub mod history_basis;
pub mod kalman;
pub mod point_process;
pub mod wiener;

use serde::{Deserialize, Serialize};

use kalman::{KalmanError, KalmanModel};
use point_process::{PointProcessError, PointProcessModel};
use wiener::{WienerError, WienerModel};

// One value per loaded model, never per bin: boxing would buy nothing.
#[allow(clippy::large_enum_variant)]
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub enum DecoderModel {
    Kalman(KalmanModel),
    Wiener(WienerModel),
    /// Appended last so earlier model files keep their variant index.
    PointProcess(PointProcessModel),
}

impl DecoderModel {
    pub fn kind(&self) -> &'static str {
        match self {
            DecoderModel::Kalman(_) => "kalman",
            DecoderModel::Wiener(_) => "wiener",
            DecoderModel::PointProcess(_) => "point-process",
        }
    }

    pub fn outputs(&self) -> &[String] {
        match self {
            DecoderModel::Kalman(m) => &m.outputs,
            DecoderModel::Wiener(m) => &m.outputs,
            DecoderModel::PointProcess(m) => &m.outputs,
        }
    }

    pub fn n_channels(&self) -> usize {
        match self {
            DecoderModel::Kalman(m) => m.n_channels(),
            DecoderModel::Wiener(m) => m.n_channels,
            DecoderModel::PointProcess(m) => m.n_channels(),
        }
    }

    /// The one check of a model's shapes and values, made where a model
    /// enters: when a model file is read, and when a fit has built it. The
    /// filters are built from checked models and do not check again.
    pub fn validate(&self) -> Result<(), ModelError> {
        let n = self.n_channels();
        if n == 0 || n > crate::wire::packet::MAX_CHANNELS {
            return Err(ModelError::Channels { n });
        }
        let d = self.outputs().len();
        if d == 0 || d > crate::wire::packet::MAX_DIMS {
            return Err(ModelError::Outputs { d });
        }
        match self {
            DecoderModel::Kalman(m) => m.validate()?,
            DecoderModel::Wiener(m) => m.validate()?,
            DecoderModel::PointProcess(m) => m.validate()?,
        }
        Ok(())
    }
}

/// Why a decoder model cannot be run.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum ModelError {
    #[error("the model has {n} channels; a bin packet carries 1 to 16384")]
    Channels { n: usize },
    #[error("the model outputs {d} velocities; a velocity packet carries 1 to 8")]
    Outputs { d: usize },
    #[error("kalman model: {0}")]
    Kalman(#[from] KalmanError),
    #[error("wiener model: {0}")]
    Wiener(#[from] WienerError),
    #[error("point-process model: {0}")]
    PointProcess(#[from] PointProcessError),
}
