//! The Wiener filter baseline: velocity as a ridge-regularised linear
//! function of the counts in the last few bins.
//!
//! It has no state model, so it is the comparison every user expects beside
//! the Kalman decoder: when the Kalman filter does not beat it, the state
//! model is not helping. The per-bin runtime keeps the last `taps` bins of
//! counts in a ring buffer allocated once.

use std::ops::Range;

use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

use crate::TrainError;
use crate::linalg::{self, Mat};
use crate::session::Session;
use crate::stats::{CountGram, CrossSums, nonzero_counts};

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct WienerFitOptions {
    pub outputs: Vec<String>,
    /// Bins of history per channel, the current bin included.
    pub taps: usize,
    /// Counts of bin t predict the kinematics of bin t + lag_bins.
    pub lag_bins: usize,
    pub ridge: f64,
}

impl Default for WienerFitOptions {
    fn default() -> Self {
        WienerFitOptions {
            outputs: vec!["vel_x".into(), "vel_y".into()],
            taps: 5,
            lag_bins: 0,
            ridge: 1.0,
        }
    }
}

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

/// Sums over training bins: Σ φ φᵀ exactly in integers, Σ φ yᵀ, Σ y.
#[derive(Clone, Debug, PartialEq)]
pub struct WienerStats {
    pub gram: CountGram,
    pub sfy: CrossSums,
    pub sy: Vec<f64>,
}

impl WienerStats {
    pub fn new(n_channels: usize, taps: usize, n_outputs: usize) -> WienerStats {
        WienerStats {
            gram: CountGram::new(n_channels * taps),
            sfy: CrossSums::new(n_channels * taps, n_outputs),
            sy: vec![0.0; n_outputs],
        }
    }

    pub fn accumulate(
        &mut self,
        session: &Session,
        output_cols: &[usize],
        taps: usize,
        lag: usize,
        segment: Range<usize>,
    ) {
        let kin = session.kinematics.as_ref().expect("checked by caller");
        let n = session.n_channels;
        let mut nz = Vec::new();
        let mut y = vec![0.0; output_cols.len()];
        let first = segment.start + taps - 1;
        for t in first..segment.end.saturating_sub(lag) {
            nz.clear();
            for a in 0..taps {
                nonzero_counts(session.bin_counts(t - a), a * n, &mut nz);
            }
            for (o, &c) in y.iter_mut().zip(output_cols) {
                *o = kin.get(t + lag, c);
            }
            self.gram.add_sparse(&nz);
            self.sfy.add_sparse_outer(&nz, &y);
            for (s, v) in self.sy.iter_mut().zip(&y) {
                *s += v;
            }
        }
    }

    pub fn add_assign(&mut self, o: &WienerStats) {
        self.gram.add_assign(&o.gram);
        self.sfy.add_assign(&o.sfy);
        for (a, b) in self.sy.iter_mut().zip(&o.sy) {
            *a += b;
        }
    }

    pub fn sub_assign(&mut self, o: &WienerStats) {
        self.gram.sub_assign(&o.gram);
        self.sfy.sub_assign(&o.sfy);
        for (a, b) in self.sy.iter_mut().zip(&o.sy) {
            *a -= b;
        }
    }
}

pub fn output_columns(session: &Session, outputs: &[String]) -> Result<Vec<usize>, TrainError> {
    if session.kinematics.is_none() {
        return Err(TrainError::NoKinematics);
    }
    outputs
        .iter()
        .map(|name| {
            session
                .kinematic_index(name)
                .ok_or_else(|| TrainError::UnknownKinematic {
                    name: name.clone(),
                    available: session.kinematic_names.clone(),
                })
        })
        .collect()
}

pub fn fit_wiener(
    session: &Session,
    options: &WienerFitOptions,
) -> Result<WienerModel, TrainError> {
    fit_wiener_segments(session, options, std::slice::from_ref(&(0..session.n_bins)))
}

pub fn fit_wiener_segments(
    session: &Session,
    options: &WienerFitOptions,
    segments: &[Range<usize>],
) -> Result<WienerModel, TrainError> {
    if options.taps == 0 {
        return Err(TrainError::Option {
            key: "wiener.taps",
            problem: "must be at least 1".into(),
        });
    }
    let cols = output_columns(session, &options.outputs)?;
    let mut stats = WienerStats::new(session.n_channels, options.taps, cols.len());
    for seg in segments {
        stats.accumulate(session, &cols, options.taps, options.lag_bins, seg.clone());
    }
    fit_wiener_from_stats(&stats, options, session.n_channels)
}

pub fn fit_wiener_from_stats(
    stats: &WienerStats,
    options: &WienerFitOptions,
    n_channels: usize,
) -> Result<WienerModel, TrainError> {
    let f = stats.gram.dim;
    let t = stats.gram.n_rows;
    if t < 2 {
        return Err(TrainError::TooFewBins { bins: t, needed: 2 });
    }
    let d_out = stats.sy.len();
    // Normal equations with an intercept column first.
    let raw = stats.gram.to_f64_symmetric();
    let mut g = DMatrix::<f64>::zeros(f + 1, f + 1);
    g[(0, 0)] = t as f64;
    for i in 0..f {
        let s = stats.gram.sums[i] as f64;
        g[(0, i + 1)] = s;
        g[(i + 1, 0)] = s;
        for j in 0..f {
            g[(i + 1, j + 1)] = raw[i * f + j];
        }
        g[(i + 1, i + 1)] += options.ridge;
    }
    let mut rhs = DMatrix::<f64>::zeros(f + 1, d_out);
    for o in 0..d_out {
        rhs[(0, o)] = stats.sy[o];
        for i in 0..f {
            rhs[(i + 1, o)] = stats.sfy.data[i * d_out + o];
        }
    }
    let chol = nalgebra::Cholesky::new(g).ok_or_else(|| TrainError::Degenerate {
        what: "Wiener weights",
        problem: "the lagged counts are collinear (silent or duplicated channels); raise ridge"
            .into(),
    })?;
    let w = chol.solve(&rhs).transpose();
    let mean_counts = (0..n_channels)
        .map(|ch| stats.gram.sums[ch] as f64 / t as f64)
        .collect();
    let model = WienerModel {
        outputs: options.outputs.clone(),
        taps: options.taps,
        n_channels,
        weights: Mat::from_dmatrix(&w),
        mean_counts,
    };
    model.validate().map_err(|problem| TrainError::Degenerate {
        what: "Wiener weights",
        problem,
    })?;
    Ok(model)
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
