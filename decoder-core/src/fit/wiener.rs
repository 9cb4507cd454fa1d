//! Fitting the Wiener filter baseline: ridge regression of the kinematics on
//! the counts of the last `taps` bins, from integer sums over the training
//! bins so folds can be added and subtracted exactly, gathered in one pass
//! over the block's rows.

use crate::decoders::ModelError;
use std::ops::Range;

use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

use crate::decoders::wiener::WienerModel;
use crate::fit::TrainError;
use crate::fit::kalman::StateScratch;
use crate::fit::least_squares::{CrossSums, Gram, nonzero_counts};
use crate::fit::rows::{RowWindow, each_segment_row};
use crate::formats::block_rows::{BlockInfo, BlockRows};
use crate::linalg::Mat;
use crate::wire::packet::{BinKind, BinValues};

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct WienerFitOptions {
    pub outputs: Vec<String>,
    /// Bins of history per channel, the current bin included.
    pub taps: usize,
    /// Counts of bin t predict the kinematics of bin t + lag_bins.
    pub lag_bins: usize,
    pub ridge: f64,
    /// Per-block normalisation: each block of several trained as one has
    /// its own intercept (its counts and kinematics centred on its own
    /// means); the model keeps the last block's. See
    /// [`fit_wiener_from_block_stats`].
    #[serde(default)]
    pub per_block: bool,
}

impl Default for WienerFitOptions {
    fn default() -> Self {
        WienerFitOptions {
            outputs: vec!["vel_x".into(), "vel_y".into()],
            taps: 5,
            lag_bins: 0,
            ridge: 1.0,
            per_block: false,
        }
    }
}

/// Sums over training bins: Σ φ φᵀ (exactly in integers for counts), Σ φ
/// yᵀ, Σ y.
#[derive(Clone, Debug, PartialEq)]
pub struct WienerStats {
    pub gram: Gram,
    pub sfy: CrossSums,
    pub sy: Vec<f64>,
}

impl WienerStats {
    /// Empty sums over lagged rows of `input` (counts or features).
    pub fn new(input: BinKind, n_channels: usize, taps: usize, n_outputs: usize) -> WienerStats {
        WienerStats {
            gram: Gram::new(input, n_channels * taps, false),
            sfy: CrossSums::new(n_channels * taps, n_outputs),
            sy: vec![0.0; n_outputs],
        }
    }

    /// Adds the window's newest row, `since_start` rows into its segment:
    /// its kinematics as the target of the counts `lag` to `lag + taps − 1`
    /// rows back, when all of them lie inside the segment.
    pub fn add_newest(
        &mut self,
        window: &RowWindow,
        output_cols: &[usize],
        taps: usize,
        lag: usize,
        since_start: usize,
        scratch: &mut StateScratch,
    ) {
        let StateScratch {
            x: y, nz, dense, ..
        } = scratch;
        if since_start + 1 < lag + taps {
            return;
        }
        let n = self.gram.dim() / taps.max(1);
        let kin = window.kinematics(0);
        y.clear();
        y.extend(output_cols.iter().map(|&c| kin[c]));
        match &mut self.gram {
            Gram::Counts(g) => {
                nz.clear();
                for a in 0..taps {
                    let BinValues::Counts(c) = window.values(lag + a) else {
                        unreachable!("sums of counts were handed features")
                    };
                    nonzero_counts(c, a * n, nz);
                }
                g.add_sparse(nz);
                self.sfy.add_sparse_outer(nz, y);
            }
            Gram::Values(g) => {
                dense.resize(n * taps, 0.0);
                for a in 0..taps {
                    window
                        .values(lag + a)
                        .to_f64(&mut dense[a * n..(a + 1) * n]);
                }
                g.add_dense(dense);
                self.sfy.add_outer(dense, y);
            }
        }
        for (s, v) in self.sy.iter_mut().zip(y.iter()) {
            *s += v;
        }
    }

    /// One pass over `source`: the sums of each group of segments, one
    /// [`WienerStats`] per group.
    pub fn gather(
        source: &dyn BlockRows,
        output_cols: &[usize],
        taps: usize,
        lag: usize,
        groups: &[Vec<Range<usize>>],
    ) -> Result<Vec<WienerStats>, TrainError> {
        let info = source.info();
        let n = info.n_channels;
        let mut stats: Vec<WienerStats> = groups
            .iter()
            .map(|_| WienerStats::new(info.input, n, taps, output_cols.len()))
            .collect();
        let mut scratch = StateScratch::default();
        each_segment_row(source, groups, lag + taps, |g, since_start, window| {
            stats[g].add_newest(window, output_cols, taps, lag, since_start, &mut scratch);
        })?;
        Ok(stats)
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

pub fn output_columns(session: &BlockInfo, outputs: &[String]) -> Result<Vec<usize>, TrainError> {
    if !session.has_kinematics {
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
    session: &dyn BlockRows,
    options: &WienerFitOptions,
) -> Result<WienerModel, TrainError> {
    // One segment a block: no taps across a block's edge.
    fit_wiener_segments(session, options, &session.info().runs())
}

pub fn fit_wiener_segments(
    session: &dyn BlockRows,
    options: &WienerFitOptions,
    segments: &[Range<usize>],
) -> Result<WienerModel, TrainError> {
    if options.taps == 0 {
        return Err(TrainError::Option {
            key: "wiener.taps",
            problem: "must be at least 1".into(),
        });
    }
    let info = session.info();
    let cols = output_columns(&info, &options.outputs)?;
    if options.per_block {
        let blocks = WienerStats::gather(
            session,
            &cols,
            options.taps,
            options.lag_bins,
            &info.by_block(segments),
        )?;
        return fit_wiener_from_block_stats(&blocks, options, info.n_channels, None);
    }
    let stats = WienerStats::gather(
        session,
        &cols,
        options.taps,
        options.lag_bins,
        &[segments.to_vec()],
    )?
    .pop()
    .expect("one group");
    fit_wiener_from_stats(&stats, options, info.n_channels)
}

pub fn fit_wiener_from_stats(
    stats: &WienerStats,
    options: &WienerFitOptions,
    n_channels: usize,
) -> Result<WienerModel, TrainError> {
    let f = stats.gram.dim();
    let t = stats.gram.n_rows();
    if t < 2 {
        return Err(TrainError::TooFewBins { bins: t, needed: 2 });
    }
    let d_out = stats.sy.len();
    // Normal equations with an intercept column first.
    let raw = stats.gram.to_f64_symmetric();
    let mut g = DMatrix::<f64>::zeros(f + 1, f + 1);
    g[(0, 0)] = t as f64;
    for i in 0..f {
        let s = stats.gram.sum(i);
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
        .map(|ch| stats.gram.sum(ch) / t as f64)
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

/// The fit with per-block normalisation, from each block's sums (`blocks`
/// in order; a block with no training rows is passed over): the weights
/// from the within-block covariances of the lagged counts and the
/// kinematics (each block centred on its own means, which is least
/// squares with an intercept per block), the ridge on every weight; the
/// intercept and `mean_counts` those of the last block.
///
/// `keep` names the block whose intercept the model keeps instead of the
/// last, as for [`crate::fit::kalman::fit_from_block_stats`].
pub fn fit_wiener_from_block_stats(
    blocks: &[WienerStats],
    options: &WienerFitOptions,
    n_channels: usize,
    keep: Option<usize>,
) -> Result<WienerModel, TrainError> {
    let kept = keep
        .and_then(|k| blocks.get(k))
        .filter(|b| b.gram.n_rows() > 0);
    let blocks: Vec<&WienerStats> = blocks.iter().filter(|b| b.gram.n_rows() > 0).collect();
    let t: u64 = blocks.iter().map(|b| b.gram.n_rows()).sum();
    let Some(last) = kept.or(blocks.last().copied()).filter(|_| t >= 2) else {
        return Err(TrainError::TooFewBins { bins: t, needed: 2 });
    };
    let f = last.gram.dim();
    let d_out = last.sy.len();
    let mut g = DMatrix::<f64>::zeros(f, f);
    let mut rhs = DMatrix::<f64>::zeros(f, d_out);
    for b in &blocks {
        let nb = b.gram.n_rows() as f64;
        for i in 0..f {
            for j in i..f {
                let v = b.gram.centred(i, j) / nb;
                g[(i, j)] += v;
                if j != i {
                    g[(j, i)] += v;
                }
            }
            let si = b.gram.sum(i);
            for o in 0..d_out {
                rhs[(i, o)] += b.sfy.data[i * d_out + o] - si * b.sy[o] / nb;
            }
        }
    }
    for i in 0..f {
        g[(i, i)] += options.ridge;
    }
    let chol = nalgebra::Cholesky::new(g).ok_or_else(|| TrainError::Degenerate {
        what: "Wiener weights",
        problem: "the lagged counts are collinear within the blocks (silent or duplicated channels); raise ridge"
            .into(),
    })?;
    let w = chol.solve(&rhs); // f × d_out
    let nl = last.gram.n_rows() as f64;
    let mut weights = DMatrix::<f64>::zeros(d_out, f + 1);
    for o in 0..d_out {
        let mut intercept = last.sy[o] / nl;
        for i in 0..f {
            weights[(o, i + 1)] = w[(i, o)];
            intercept -= w[(i, o)] * last.gram.sum(i) / nl;
        }
        weights[(o, 0)] = intercept;
    }
    let model = WienerModel {
        outputs: options.outputs.clone(),
        taps: options.taps,
        n_channels,
        weights: Mat::from_dmatrix(&weights),
        mean_counts: (0..n_channels).map(|ch| last.gram.sum(ch) / nl).collect(),
    };
    model
        .validate()
        .map_err(|e| TrainError::Model(ModelError::from(e)))?;
    Ok(model)
}
