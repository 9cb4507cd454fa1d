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

impl WienerModel {
    pub fn validate(&self) -> Result<(), String> {
        let features = 1 + self.n_channels * self.taps;
        if self.taps == 0 {
            return Err("taps is 0".into());
        }
        if self.weights.rows != self.outputs.len() || self.weights.cols != features {
            return Err(format!(
                "weights are {}×{}, expected {}×{features}",
                self.weights.rows,
                self.weights.cols,
                self.outputs.len()
            ));
        }
        if self.mean_counts.len() != self.n_channels {
            return Err(format!(
                "mean_counts has {} entries, expected {}",
                self.mean_counts.len(),
                self.n_channels
            ));
        }
        if !self.weights.is_finite() || self.mean_counts.iter().any(|v| !v.is_finite()) {
            return Err("a weight is not finite".into());
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
    pub fn new(model: &WienerModel) -> Result<WienerFilter, String> {
        model.validate()?;
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
        Ok(f)
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
