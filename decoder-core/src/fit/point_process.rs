//! Training the point-process decoder from a calibration block: one
//! Poisson GLM per channel (`glm`), with state covariates from the
//! kinematics, optional own-history terms through a raised-cosine basis and
//! optional coupling to the other channels' previous bin; and the state
//! dynamics A, W by least squares on the kinematics.
//!
//! Channels are independent given the design, so [`fit_channel`] fits one
//! and callers may run channels in parallel (this crate spawns no threads;
//! `replay-tool train` does). A channel that never fires, or whose fit does
//! not converge or is singular, is left out of the model and listed with
//! the reason — never silently kept.

use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

use crate::decoders::history_basis::RaisedCosineBasis;
use crate::decoders::point_process::{ChannelGlm, PointProcessModel};
use crate::fit::TrainError;
use crate::fit::glm::{GlmError, GlmFitOptions, fit_poisson};
use crate::fit::kalman::{StateSource, fill_state, state_sources};
use crate::formats::block::Block;
use crate::linalg::Mat;

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct HistoryOptions {
    pub n_basis: usize,
    pub span_bins: usize,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PointProcessFitOptions {
    /// State components (kinematics columns) the rates are tuned to.
    pub state: Vec<String>,
    pub outputs: Vec<String>,
    /// Own-history terms; `None` fits the LNP form.
    pub history: Option<HistoryOptions>,
    /// Coupling to every other channel's count in the previous bin.
    pub coupling: bool,
    /// Ridge penalty on every coefficient but the intercept.
    pub ridge: f64,
    pub max_iterations: usize,
    pub tolerance: f64,
}

impl Default for PointProcessFitOptions {
    fn default() -> Self {
        PointProcessFitOptions {
            state: vec!["vel_x".into(), "vel_y".into()],
            outputs: vec!["vel_x".into(), "vel_y".into()],
            history: Some(HistoryOptions {
                n_basis: 4,
                span_bins: 10,
            }),
            coupling: false,
            ridge: 1.0,
            max_iterations: 100,
            tolerance: 1e-8,
        }
    }
}

impl PointProcessFitOptions {
    pub fn basis(&self) -> Option<RaisedCosineBasis> {
        self.history
            .as_ref()
            .map(|h| RaisedCosineBasis::new(h.n_basis, h.span_bins))
    }
}

/// What the fit did per channel.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct PointProcessFitReport {
    pub fitted: usize,
    /// (channel, reason) for every channel left out.
    pub excluded: Vec<(usize, String)>,
    /// Per fitted channel: 1 − deviance / null deviance.
    pub deviance_explained: Vec<(usize, f64)>,
}

/// The design of one channel: state covariates, history, coupling; and
/// its counts as f64.
pub fn channel_design(
    session: &Block,
    sources: &[StateSource],
    basis: Option<&RaisedCosineBasis>,
    coupling: bool,
    channel: usize,
) -> (Mat, Vec<f64>) {
    let n = session.n_channels;
    let d = sources.len();
    let nb = basis.map_or(0, |b| b.n_basis);
    let nc = if coupling { n - 1 } else { 0 };
    let p = d + nb + nc;
    let y: Vec<f64> = (0..session.n_bins)
        .map(|t| f64::from(session.bin_counts(t)[channel]))
        .collect();
    let mut x = Mat::zeros(session.n_bins, p);
    let mut row = vec![0.0; p];
    for t in 0..session.n_bins {
        fill_state(session, sources, t, &mut row[..d]);
        x.data[t * p..t * p + d].copy_from_slice(&row[..d]);
        if coupling && t > 0 {
            let mut k = d + nb;
            let prev = session.bin_counts(t - 1);
            for (other, &v) in prev.iter().enumerate() {
                if other == channel {
                    continue;
                }
                x.data[t * p + k] = f64::from(v);
                k += 1;
            }
        }
    }
    // History columns driven by the spikes: each count adds the basis,
    // lag by lag, to the rows after it (counts are sparse, so this is far
    // cheaper than summing over every lag of every row). Same values as
    // `RaisedCosineBasis::covariates`.
    if let Some(b) = basis {
        let taps: Vec<Vec<(usize, f64)>> = (0..b.span_bins)
            .map(|lag0| {
                (0..b.n_basis)
                    .filter_map(|j| {
                        let w = b.weights.get(j, lag0);
                        (w != 0.0).then_some((j, w))
                    })
                    .collect()
            })
            .collect();
        for (s_bin, &count) in y.iter().enumerate() {
            if count == 0.0 {
                continue;
            }
            for (lag0, tap) in taps.iter().enumerate() {
                let t = s_bin + lag0 + 1;
                if t >= session.n_bins {
                    break;
                }
                for &(j, w) in tap {
                    x.data[t * p + d + j] += w * count;
                }
            }
        }
    }
    (x, y)
}

/// Why one channel is left out of the point-process model.
#[derive(Debug, thiserror::Error)]
pub enum ChannelLeftOut {
    #[error(transparent)]
    Block(#[from] TrainError),
    #[error(transparent)]
    Glm(#[from] GlmError),
    #[error("IRLS did not converge in {iterations} iterations")]
    NotConverged { iterations: usize },
    #[error("the fit of this channel did not run")]
    NotRun,
}

/// Fits one channel; `Err` carries why it is left out.
pub fn fit_channel(
    session: &Block,
    options: &PointProcessFitOptions,
    channel: usize,
) -> Result<ChannelGlm, ChannelLeftOut> {
    let sources = state_sources(session, &options.state)?;
    let basis = options.basis();
    let (x, y) = channel_design(session, &sources, basis.as_ref(), options.coupling, channel);
    let fit = fit_poisson(
        &x,
        &y,
        &GlmFitOptions {
            ridge: options.ridge,
            max_iterations: options.max_iterations,
            tolerance: options.tolerance,
        },
    )?;
    if !fit.converged {
        return Err(ChannelLeftOut::NotConverged {
            iterations: fit.iterations,
        });
    }
    let d = sources.len();
    let nb = basis.as_ref().map_or(0, |b| b.n_basis);
    let c = &fit.coefficients;
    let coupling = if options.coupling {
        let mut g = vec![0.0; session.n_channels];
        let mut k = 1 + d + nb;
        for (other, gv) in g.iter_mut().enumerate() {
            if other != channel {
                *gv = c[k];
                k += 1;
            }
        }
        g
    } else {
        Vec::new()
    };
    Ok(ChannelGlm {
        b0: c[0],
        beta: c[1..1 + d].to_vec(),
        history: c[1 + d..1 + d + nb].to_vec(),
        coupling,
        deviance: fit.deviance,
        null_deviance: fit.null_deviance,
        iterations: fit.iterations,
    })
}

/// A and W by least squares on consecutive bins, x0 and P0 from the
/// state's mean and covariance.
pub fn fit_dynamics(
    session: &Block,
    sources: &[StateSource],
) -> Result<(Mat, Mat, Vec<f64>, Mat), TrainError> {
    let d = sources.len();
    let t = session.n_bins;
    if t < d + 3 {
        return Err(TrainError::TooFewBins {
            bins: t as u64,
            needed: d as u64 + 3,
        });
    }
    let mut xs = vec![0.0; t * d];
    for b in 0..t {
        fill_state(session, sources, b, &mut xs[b * d..(b + 1) * d]);
    }
    let x = |b: usize| &xs[b * d..(b + 1) * d];
    let mut s00 = DMatrix::<f64>::zeros(d, d);
    let mut s10 = DMatrix::<f64>::zeros(d, d);
    for b in 0..t - 1 {
        for i in 0..d {
            for j in 0..d {
                s00[(i, j)] += x(b)[i] * x(b)[j];
                s10[(i, j)] += x(b + 1)[i] * x(b)[j];
            }
        }
    }
    let inv = s00
        .clone()
        .try_inverse()
        .ok_or_else(|| TrainError::Degenerate {
            what: "the state dynamics",
            problem: "the state does not vary (Σ x xᵀ is singular)".into(),
        })?;
    let a = &s10 * inv;
    let mut w = DMatrix::<f64>::zeros(d, d);
    for b in 0..t - 1 {
        let xb = nalgebra::DVector::from_column_slice(x(b));
        let r = nalgebra::DVector::from_column_slice(x(b + 1)) - &a * xb;
        w += &r * r.transpose();
    }
    w /= (t - 1) as f64;
    let mut mean = vec![0.0; d];
    for b in 0..t {
        for (m, v) in mean.iter_mut().zip(x(b)) {
            *m += v / t as f64;
        }
    }
    let mut p0 = Mat::zeros(d, d);
    for b in 0..t {
        for i in 0..d {
            for j in 0..d {
                let v = p0.get(i, j) + (x(b)[i] - mean[i]) * (x(b)[j] - mean[j]) / t as f64;
                p0.set(i, j, v);
            }
        }
    }
    Ok((Mat::from_dmatrix(&a), Mat::from_dmatrix(&w), mean, p0))
}

/// Puts per-channel fits and the dynamics together.
pub fn assemble(
    session: &Block,
    options: &PointProcessFitOptions,
    fits: Vec<Result<ChannelGlm, ChannelLeftOut>>,
) -> Result<(PointProcessModel, PointProcessFitReport), TrainError> {
    if session.kinematics.is_none() {
        return Err(TrainError::NoKinematics);
    }
    let sources = state_sources(session, &options.state)?;
    for o in &options.outputs {
        if !options.state.contains(o) {
            return Err(TrainError::Option {
                key: "point_process.outputs",
                problem: format!("{o:?} is not in point_process.state {:?}", options.state),
            });
        }
    }
    let (a, w, x0, p0) = fit_dynamics(session, &sources)?;
    let mut excluded = Vec::new();
    let mut explained = Vec::new();
    let channels = fits
        .into_iter()
        .enumerate()
        .map(|(c, f)| match f {
            Ok(g) => {
                explained.push((c, 1.0 - g.deviance / g.null_deviance.max(f64::MIN_POSITIVE)));
                Some(g)
            }
            Err(reason) => {
                excluded.push((c, reason.to_string()));
                None
            }
        })
        .collect::<Vec<_>>();
    let fitted = channels.iter().filter(|c| c.is_some()).count();
    if fitted == 0 {
        return Err(TrainError::Degenerate {
            what: "the point-process decoder",
            problem: "no channel could be fitted".into(),
        });
    }
    let model = PointProcessModel {
        state: options.state.clone(),
        outputs: options.outputs.clone(),
        a,
        w,
        x0,
        p0,
        channels,
        excluded: excluded.clone(),
        history_basis: options.basis(),
    };
    model
        .validate()
        .map_err(|e| TrainError::Model(crate::decoders::ModelError::from(e)))?;
    Ok((
        model,
        PointProcessFitReport {
            fitted,
            excluded,
            deviance_explained: explained,
        },
    ))
}

/// Fits every channel in turn (see [`fit_channel`] to run them in parallel).
pub fn fit_point_process(
    session: &Block,
    options: &PointProcessFitOptions,
) -> Result<(PointProcessModel, PointProcessFitReport), TrainError> {
    if session.kinematics.is_none() {
        return Err(TrainError::NoKinematics);
    }
    state_sources(session, &options.state)?;
    let fits = (0..session.n_channels)
        .map(|c| fit_channel(session, options, c))
        .collect();
    assemble(session, options, fits)
}
