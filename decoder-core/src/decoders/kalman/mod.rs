//! The velocity Kalman filter decoder (Wu et al. 2006): a linear-Gaussian
//! state model of the kinematics observed through a linear-Gaussian model of
//! the binned counts.
//!
//! `model` holds the trained parameters as they are stored and exported;
//! `filter` is the per-bin runtime built from them; `steady` finds the
//! steady-state gain (Malik et al. 2011). Fitting the parameters from a
//! calibration block is [`crate::fit::kalman`].

pub mod filter;
pub mod model;
pub mod steady;

pub use filter::KalmanFilter;
pub use model::{KalmanError, KalmanModel, ObservationNoise, SteadyGain};
