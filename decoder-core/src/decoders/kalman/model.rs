//! Trained Kalman decoder parameters, in the layout that model files store
//! and `model show --json` exports (PROTOCOL.md §4).

use serde::{Deserialize, Serialize};

use crate::linalg::Mat;

/// The observation noise covariance Q. Diagonal Q is for very large channel
/// counts, where a full N × N inverse at load time (O(N³)) and its storage
/// (8·N² bytes) stop being reasonable.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub enum ObservationNoise {
    Full(Mat),
    Diagonal(Vec<f64>),
}

impl ObservationNoise {
    pub fn n_channels(&self) -> usize {
        match self {
            ObservationNoise::Full(m) => m.rows,
            ObservationNoise::Diagonal(d) => d.len(),
        }
    }

    /// The full N × N matrix (for export).
    pub fn to_full(&self) -> Mat {
        match self {
            ObservationNoise::Full(m) => m.clone(),
            ObservationNoise::Diagonal(d) => {
                let mut m = Mat::zeros(d.len(), d.len());
                for (i, v) in d.iter().enumerate() {
                    m.set(i, i, *v);
                }
                m
            }
        }
    }
}

/// A converged steady-state gain: the filter then runs as a fixed linear
/// recursion with no covariance update per bin.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SteadyGain {
    /// d × N gain applied to normalised counts.
    pub gain: Mat,
    /// The a-posteriori covariance the recursion converged to.
    pub posterior_cov: Mat,
    /// Convergence tolerance on the largest change of the covariance,
    /// relative to its largest entry.
    pub tolerance: f64,
    /// Iterations the recursion took.
    pub iterations: usize,
    pub max_iterations: usize,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct KalmanModel {
    /// Names of the state components in order, e.g. pos_x, pos_y, vel_x,
    /// vel_y, 1 (the constant that carries baseline rates).
    pub state: Vec<String>,
    /// State components sent as velocity, in order.
    pub outputs: Vec<String>,
    /// d × d state transition.
    pub a: Mat,
    /// d × d state noise covariance.
    pub w: Mat,
    /// N × d observation matrix.
    pub h: Mat,
    /// N × N observation noise covariance.
    pub q: ObservationNoise,
    pub x0: Vec<f64>,
    pub p0: Mat,
    /// Per channel, counts enter the filter as `(count - offset) / scale`.
    pub count_offset: Vec<f64>,
    pub count_scale: Vec<f64>,
    pub steady: Option<SteadyGain>,
}

#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum KalmanError {
    #[error("model parameter {name} has shape {got}, expected {want}")]
    Shape {
        name: &'static str,
        got: String,
        want: String,
    },
    #[error("model parameter {name} has a value that is not finite")]
    NonFinite { name: &'static str },
    #[error("count_scale of channel {channel} is {value}; scales must be finite and above zero")]
    BadScale { channel: usize, value: f64 },
    #[error(
        "the observation noise Q is not positive definite (channel {channel}); drop silent or duplicated channels, or train with q_form = \"diagonal\""
    )]
    QNotPositiveDefinite { channel: usize },
    #[error("output {name:?} is not a state component (state is {state:?})")]
    UnknownOutput { name: String, state: Vec<String> },
    #[error(
        "the steady-state recursion did not converge in {iterations} iterations (last relative change {change:.3e}, tolerance {tolerance:.1e}); raise steady_state_max_iterations or decode with the full filter"
    )]
    NotConverged {
        iterations: usize,
        change: f64,
        tolerance: f64,
    },
    #[error("the covariance update became singular; the model's W or Q is degenerate")]
    Singular,
}

impl KalmanModel {
    pub fn state_dim(&self) -> usize {
        self.state.len()
    }

    pub fn n_channels(&self) -> usize {
        self.h.rows
    }

    /// Indices of the output components in the state.
    pub fn output_indices(&self) -> Result<Vec<usize>, KalmanError> {
        self.outputs
            .iter()
            .map(|name| {
                self.state.iter().position(|s| s == name).ok_or_else(|| {
                    KalmanError::UnknownOutput {
                        name: name.clone(),
                        state: self.state.clone(),
                    }
                })
            })
            .collect()
    }

    /// Checks shapes and finiteness; a loaded or trained model must pass this
    /// before a filter is built from it.
    pub fn validate(&self) -> Result<(), KalmanError> {
        let d = self.state_dim();
        let n = self.n_channels();
        let shape = |name: &'static str, m: &Mat, rows: usize, cols: usize| {
            if m.rows != rows || m.cols != cols || m.data.len() != rows * cols {
                return Err(KalmanError::Shape {
                    name,
                    got: format!("{}×{}", m.rows, m.cols),
                    want: format!("{rows}×{cols}"),
                });
            }
            if !m.is_finite() {
                return Err(KalmanError::NonFinite { name });
            }
            Ok(())
        };
        shape("A", &self.a, d, d)?;
        shape("W", &self.w, d, d)?;
        shape("H", &self.h, n, d)?;
        shape("P0", &self.p0, d, d)?;
        match &self.q {
            ObservationNoise::Full(q) => shape("Q", q, n, n)?,
            ObservationNoise::Diagonal(diag) => {
                if diag.len() != n {
                    return Err(KalmanError::Shape {
                        name: "Q",
                        got: format!("diagonal of {}", diag.len()),
                        want: format!("{n}"),
                    });
                }
                if let Some(channel) = diag.iter().position(|v| !(v.is_finite() && *v > 0.0)) {
                    return Err(KalmanError::QNotPositiveDefinite { channel });
                }
            }
        }
        let vec_check = |name: &'static str, v: &[f64], len: usize| {
            if v.len() != len {
                return Err(KalmanError::Shape {
                    name,
                    got: format!("{}", v.len()),
                    want: format!("{len}"),
                });
            }
            if v.iter().any(|x| !x.is_finite()) {
                return Err(KalmanError::NonFinite { name });
            }
            Ok(())
        };
        vec_check("x0", &self.x0, d)?;
        vec_check("count_offset", &self.count_offset, n)?;
        vec_check("count_scale", &self.count_scale, n)?;
        if let Some(channel) = self.count_scale.iter().position(|s| *s <= 0.0) {
            return Err(KalmanError::BadScale {
                channel,
                value: self.count_scale[channel],
            });
        }
        if let Some(steady) = &self.steady {
            shape("steady_state.gain", &steady.gain, d, n)?;
            shape("steady_state.posterior_cov", &steady.posterior_cov, d, d)?;
        }
        self.output_indices()?;
        Ok(())
    }
}
