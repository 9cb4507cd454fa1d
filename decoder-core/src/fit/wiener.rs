//! Fitting the Wiener filter baseline: ridge regression of the kinematics on
//! the counts of the last `taps` bins, from integer sums over the training
//! bins so folds can be added and subtracted exactly.

use crate::decoders::ModelError;
use std::ops::Range;

use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

use crate::decoders::wiener::WienerModel;
use crate::fit::TrainError;
use crate::fit::least_squares::{CountGram, CrossSums, nonzero_counts};
use crate::formats::block::Block;
use crate::linalg::Mat;

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
        session: &Block,
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

pub fn output_columns(session: &Block, outputs: &[String]) -> Result<Vec<usize>, TrainError> {
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

pub fn fit_wiener(session: &Block, options: &WienerFitOptions) -> Result<WienerModel, TrainError> {
    fit_wiener_segments(session, options, std::slice::from_ref(&(0..session.n_bins)))
}

pub fn fit_wiener_segments(
    session: &Block,
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
    model
        .validate()
        .map_err(|e| TrainError::Model(ModelError::from(e)))?;
    Ok(model)
}
