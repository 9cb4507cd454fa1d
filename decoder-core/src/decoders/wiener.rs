//! The Wiener filter baseline: velocity as a ridge-regularised linear
//! function of the counts in the last few bins.
//!
//! It has no state model, so it is the comparison every user expects beside
//! the Kalman decoder: when the Kalman filter does not beat it, the state
//! model is not helping. The per-bin runtime keeps the last `taps` bins of
//! counts in a ring buffer allocated once. Fitting lives in
//! [`crate::fit::wiener`].

use serde::{Deserialize, Serialize};

use crate::linalg::{self, Mat};

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct WienerModel {
    pub outputs: Vec<String>,
    pub taps: usize,
    pub n_channels: usize,
    /// D × (1 + N·taps): intercept, then channel weights for the current bin,
    /// then for one bin back, and so on.
    pub weights: Mat,
    /// Training mean counts, used as history before `taps` bins have arrived
    /// and for a missing bin.
    pub mean_counts: Vec<f64>,
}

/// Why a Wiener model cannot be run.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum WienerError {
    #[error("taps is 0; a Wiener model uses at least the current bin")]
    NoTaps,
    #[error(
        "weights are {rows}×{cols}, expected {want_rows}×{want_cols} (outputs × (1 + channels·taps))"
    )]
    WeightShape {
        rows: usize,
        cols: usize,
        want_rows: usize,
        want_cols: usize,
    },
    #[error("mean_counts has {got} entries for {want} channels")]
    MeanCounts { got: usize, want: usize },
    #[error("a weight or mean count is not finite")]
    NonFinite,
}

impl WienerModel {
    pub fn validate(&self) -> Result<(), WienerError> {
        let features = 1 + self.n_channels * self.taps;
        if self.taps == 0 {
            return Err(WienerError::NoTaps);
        }
        if self.weights.rows != self.outputs.len() || self.weights.cols != features {
            return Err(WienerError::WeightShape {
                rows: self.weights.rows,
                cols: self.weights.cols,
                want_rows: self.outputs.len(),
                want_cols: features,
            });
        }
        if self.mean_counts.len() != self.n_channels {
            return Err(WienerError::MeanCounts {
                got: self.mean_counts.len(),
                want: self.n_channels,
            });
        }
        if !self.weights.is_finite() || self.mean_counts.iter().any(|v| !v.is_finite()) {
            return Err(WienerError::NonFinite);
        }
        Ok(())
    }
}

/// Per-bin runtime.
#[derive(Clone, Debug)]
pub struct WienerFilter {
    n: usize,
    taps: usize,
    weights: Mat,
    mean_counts: Vec<f64>,
    /// taps × N, slot `newest` holds the current bin.
    history: Vec<f64>,
    newest: usize,
    estimate: Vec<f64>,
}

impl WienerFilter {
    /// Builds the runtime from a checked model ([`DecoderModel::validate`]).
    ///
    /// [`DecoderModel::validate`]: crate::decoders::DecoderModel::validate
    pub fn new(model: &WienerModel) -> WienerFilter {
        debug_assert!(
            model.validate().is_ok(),
            "filters are built from checked models"
        );
        let mut f = WienerFilter {
            n: model.n_channels,
            taps: model.taps,
            weights: model.weights.clone(),
            mean_counts: model.mean_counts.clone(),
            history: vec![0.0; model.taps * model.n_channels],
            newest: 0,
            estimate: vec![0.0; model.outputs.len()],
        };
        f.reset();
        f
    }

    pub fn reset(&mut self) {
        for slot in 0..self.taps {
            self.history[slot * self.n..(slot + 1) * self.n].copy_from_slice(&self.mean_counts);
        }
        self.newest = 0;
        self.recompute();
    }

    pub fn estimate(&self) -> &[f64] {
        &self.estimate
    }

    pub fn step(&mut self, counts: &[u16]) {
        self.newest = (self.newest + 1) % self.taps;
        let slot = &mut self.history[self.newest * self.n..(self.newest + 1) * self.n];
        for (dst, &c) in slot.iter_mut().zip(counts) {
            *dst = f64::from(c);
        }
        self.recompute();
    }

    /// [`WienerFilter::step`] with the bin's values already as f64 (counts
    /// corrected for drift).
    pub fn step_values(&mut self, values: &[f64]) {
        self.newest = (self.newest + 1) % self.taps;
        self.history[self.newest * self.n..(self.newest + 1) * self.n].copy_from_slice(values);
        self.recompute();
    }

    /// A missing bin enters as the training mean (no information).
    pub fn predict_only(&mut self) {
        self.newest = (self.newest + 1) % self.taps;
        self.history[self.newest * self.n..(self.newest + 1) * self.n]
            .copy_from_slice(&self.mean_counts);
        self.recompute();
    }

    fn recompute(&mut self) {
        let n = self.n;
        for (o, est) in self.estimate.iter_mut().enumerate() {
            let row = self.weights.row(o);
            let mut acc = row[0];
            for lag in 0..self.taps {
                let slot = (self.newest + self.taps - lag) % self.taps;
                acc += linalg::dot(
                    &row[1 + lag * n..1 + (lag + 1) * n],
                    &self.history[slot * n..(slot + 1) * n],
                );
            }
            *est = acc;
        }
    }
}
