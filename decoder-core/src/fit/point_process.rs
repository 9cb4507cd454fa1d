//! Training the point-process decoder from a calibration block: one
//! Poisson GLM per channel (`glm`), with state covariates from the
//! kinematics, optional own-history terms through a raised-cosine basis and
//! optional coupling to the other channels' previous bin; and the state
//! dynamics A, W by least squares on the kinematics.
//!
//! The designs are never held: [`ChannelDesigns`] builds each row as a
//! pass over the block reads it, and every channel's IRLS runs in the same
//! passes, so memory is a few rows and p² per channel whatever the block's
//! length. Channels are independent given the design, so callers may fit
//! groups of channels in parallel with [`fit_channels`] (this crate spawns
//! no threads; `replay-tool train` does). A channel that never fires, or
//! whose fit does not converge or is singular, is left out of the model and
//! listed with the reason — never silently kept.

use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

use crate::decoders::history_basis::RaisedCosineBasis;
use crate::decoders::point_process::{ChannelGlm, PointProcessModel};
use crate::fit::TrainError;
use crate::fit::glm::{GlmDesigns, GlmError, GlmFitOptions, fit_poisson_many};
use crate::fit::kalman::{StateSource, fill_state, state_sources};
use crate::fit::rows::each_count_row;
use crate::formats::block_rows::BlockRows;
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

/// The designs of a set of channels over a block, built a row at a time
/// as a pass reads it: the state covariates from the row's kinematics, the
/// history columns from the channel's last `span_bins` counts through the
/// basis, the coupling columns from the other channels' previous bin.
pub struct ChannelDesigns<'a> {
    source: &'a dyn BlockRows,
    sources: Vec<StateSource>,
    /// Per lag (0 = the previous bin), the basis functions with a non-zero
    /// weight there and the weight.
    taps: Vec<Vec<(usize, f64)>>,
    n_basis: usize,
    coupling: bool,
    channels: Vec<usize>,
}

impl<'a> ChannelDesigns<'a> {
    pub fn new(
        source: &'a dyn BlockRows,
        options: &PointProcessFitOptions,
        channels: Vec<usize>,
    ) -> Result<ChannelDesigns<'a>, TrainError> {
        let info = source.info();
        if info.input != crate::wire::packet::BinKind::Counts {
            return Err(TrainError::NeedsCounts {
                decoder: "point-process decoder",
            });
        }
        if !info.has_kinematics {
            return Err(TrainError::NoKinematics);
        }
        let sources = state_sources(&info.kinematic_names, &options.state)?;
        let basis = options.basis();
        let taps = basis.as_ref().map_or(Vec::new(), |b| {
            (0..b.span_bins)
                .map(|lag0| {
                    (0..b.n_basis)
                        .filter_map(|j| {
                            let w = b.weights.get(j, lag0);
                            (w != 0.0).then_some((j, w))
                        })
                        .collect()
                })
                .collect()
        });
        Ok(ChannelDesigns {
            source,
            sources,
            taps,
            n_basis: basis.map_or(0, |b| b.n_basis),
            coupling: options.coupling,
            channels,
        })
    }

    /// One pass over the block: `row(i, x, y)` with the design row and the
    /// count of `channels[i]`, for each i with `active[i]`, each channel's
    /// rows in order. Rows are gathered [`BATCH_ROWS`] at a time and given
    /// channel by channel within a batch, so each channel's sums stay in
    /// cache while its rows go by.
    pub fn each_row(
        &self,
        active: &[bool],
        row: &mut dyn FnMut(usize, &[f64], f64),
    ) -> Result<(), TrainError> {
        let info = self.source.info();
        let (n, k) = (info.n_channels, info.kinematic_names.len());
        let nb = self.n_basis;
        let span = self.taps.len();
        let d = self.sources.len();
        let mut x = vec![0.0; self.columns()];
        let mut state = vec![0.0; d];
        // The design rows (state, then history columns) of every channel
        // for the batch's rows and the `span` rows after them, row t's at
        // slot t % slots: each count adds the basis to the rows after it as
        // it is read (counts are sparse, so this is far cheaper than
        // summing over every lag of every row), and every sum is taken
        // oldest count first.
        let q = d + nb;
        let width = self.channels.len() * q;
        let slots = BATCH_ROWS + span;
        let mut batch = Batch {
            designs: vec![0.0; slots * width],
            ..Batch::default()
        };
        let mut previous: Option<Vec<u16>> = None;
        let mut ahead = vec![0usize; span];
        let edges = &info.edges;
        let mut next_edge = 0;
        each_count_row(self.source, k, |t, counts, kin| {
            if edges.get(next_edge) == Some(&t) {
                // Another block starts: nothing before it reaches its
                // rows, as history or as coupling.
                next_edge += 1;
                for lag in 0..span {
                    let at = ((t + lag) % slots) * width;
                    batch.designs[at..at + width].fill(0.0);
                }
                previous = None;
            }
            fill_state(kin, &self.sources, &mut state);
            if batch.rows == 0 {
                batch.first = t;
            }
            let now = (t % slots) * width;
            for (i, at) in (now..now + width).step_by(q.max(1)).enumerate() {
                if active[i] {
                    batch.designs[at..at + d].copy_from_slice(&state);
                }
            }
            batch.counts.extend_from_slice(counts);
            if self.coupling {
                match &previous {
                    Some(prev) => batch.previous.extend_from_slice(prev),
                    None => batch.previous.resize(batch.previous.len() + n, 0),
                }
                previous.get_or_insert_with(Vec::new).clear();
                previous.as_mut().expect("set").extend_from_slice(counts);
            }
            batch.rows += 1;
            if span > 0 {
                // Row t + span is first reached now; its slot last held a
                // row already given out.
                let last = ((t + span) % slots) * width;
                batch.designs[last..last + width].fill(0.0);
                // Where rows t + 1 ..= t + span start in the ring.
                for (lag0, at) in ahead.iter_mut().enumerate() {
                    *at = ((t + lag0 + 1) % slots) * width;
                }
                for (i, &c) in self.channels.iter().enumerate() {
                    if counts[c] == 0 || !active[i] {
                        continue;
                    }
                    let count = f64::from(counts[c]);
                    for (taps, &at) in self.taps.iter().zip(&ahead) {
                        let h = &mut batch.designs[at + i * q + d..at + (i + 1) * q];
                        for &(j, w) in taps {
                            h[j] += w * count;
                        }
                    }
                }
            }
            if batch.rows == BATCH_ROWS {
                batch.flush(self, n, active, &mut x, row);
            }
        })?;
        batch.flush(self, n, active, &mut x, row);
        Ok(())
    }
}

/// Rows gathered before they are given channel by channel.
pub const BATCH_ROWS: usize = 128;

/// A batch of rows from row `first`: every channel's design row (state
/// and history columns, a ring of `BATCH_ROWS + span` rows), the counts,
/// and (for coupling) the previous row's counts, zero before the first
/// row.
#[derive(Default)]
struct Batch {
    rows: usize,
    first: usize,
    designs: Vec<f64>,
    counts: Vec<u16>,
    previous: Vec<u16>,
}

impl Batch {
    fn flush(
        &mut self,
        designs: &ChannelDesigns<'_>,
        n: usize,
        active: &[bool],
        x: &mut [f64],
        row: &mut dyn FnMut(usize, &[f64], f64),
    ) {
        let q = designs.sources.len() + designs.n_basis;
        let width = designs.channels.len() * q;
        let slots = self.designs.len() / width.max(1);
        for (i, &c) in designs.channels.iter().enumerate() {
            if !active[i] {
                continue;
            }
            for r in 0..self.rows {
                let at = ((self.first + r) % slots) * width + i * q;
                let own = &self.designs[at..at + q];
                if !designs.coupling {
                    row(i, own, f64::from(self.counts[r * n + c]));
                    continue;
                }
                x[..q].copy_from_slice(own);
                let prev = &self.previous[r * n..(r + 1) * n];
                let mut at = q;
                for (other, &v) in prev.iter().enumerate() {
                    if other != c {
                        x[at] = f64::from(v);
                        at += 1;
                    }
                }
                row(i, x, f64::from(self.counts[r * n + c]));
            }
        }
        self.rows = 0;
        self.counts.clear();
        self.previous.clear();
    }
}

impl GlmDesigns for ChannelDesigns<'_> {
    fn fits(&self) -> usize {
        self.channels.len()
    }

    fn columns(&self) -> usize {
        let nc = if self.coupling {
            self.source.info().n_channels - 1
        } else {
            0
        };
        self.sources.len() + self.n_basis + nc
    }

    fn pass(
        &self,
        active: &[bool],
        row: &mut dyn FnMut(usize, &[f64], f64),
    ) -> Result<(), TrainError> {
        self.each_row(active, row)
    }
}

/// Why one channel is left out of the point-process model.
#[derive(Debug, thiserror::Error)]
pub enum ChannelLeftOut {
    #[error(transparent)]
    Glm(#[from] GlmError),
    #[error("IRLS did not converge in {iterations} iterations")]
    NotConverged { iterations: usize },
    #[error("the fit of this channel did not run")]
    NotRun,
}

/// Fits `channels` side by side, in the same passes over the block; each
/// `Err` carries why that channel is left out.
pub fn fit_channels(
    session: &dyn BlockRows,
    options: &PointProcessFitOptions,
    channels: &[usize],
) -> Result<Vec<Result<ChannelGlm, ChannelLeftOut>>, TrainError> {
    let n = session.info().n_channels;
    let designs = ChannelDesigns::new(session, options, channels.to_vec())?;
    let d = designs.sources.len();
    let nb = designs.n_basis;
    let fits = fit_poisson_many(
        &designs,
        &GlmFitOptions {
            ridge: options.ridge,
            max_iterations: options.max_iterations,
            tolerance: options.tolerance,
        },
    )?;
    Ok(fits
        .into_iter()
        .zip(channels)
        .map(|(fit, &channel)| {
            let fit = fit?;
            if !fit.converged {
                return Err(ChannelLeftOut::NotConverged {
                    iterations: fit.iterations,
                });
            }
            let c = &fit.coefficients;
            let coupling = if options.coupling {
                let mut g = vec![0.0; n];
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
        })
        .collect())
}

/// A and W by least squares on consecutive bins, x0 and P0 from the
/// state's mean and covariance: two passes over the kinematics.
pub fn fit_dynamics(
    session: &dyn BlockRows,
    sources: &[StateSource],
) -> Result<(Mat, Mat, Vec<f64>, Mat), TrainError> {
    let d = sources.len();
    let info = session.info();
    let (t, k) = (info.n_bins, info.kinematic_names.len());
    if t < d + 3 {
        return Err(TrainError::TooFewBins {
            bins: t as u64,
            needed: d as u64 + 3,
        });
    }
    let mut x = vec![0.0; d];
    let mut prev = vec![0.0; d];
    let mut s00 = DMatrix::<f64>::zeros(d, d);
    let mut s10 = DMatrix::<f64>::zeros(d, d);
    let mut mean = vec![0.0; d];
    each_count_row(session, k, |b, _, kin| {
        fill_state(kin, sources, &mut x);
        if b > 0 {
            for i in 0..d {
                for j in 0..d {
                    s00[(i, j)] += prev[i] * prev[j];
                    s10[(i, j)] += x[i] * prev[j];
                }
            }
        }
        for (m, v) in mean.iter_mut().zip(&x) {
            *m += v / t as f64;
        }
        prev.copy_from_slice(&x);
    })?;
    let inv = s00
        .clone()
        .try_inverse()
        .ok_or_else(|| TrainError::Degenerate {
            what: "the state dynamics",
            problem: "the state does not vary (Σ x xᵀ is singular)".into(),
        })?;
    let a = &s10 * inv;
    let mut w = DMatrix::<f64>::zeros(d, d);
    let mut p0 = Mat::zeros(d, d);
    each_count_row(session, k, |b, _, kin| {
        fill_state(kin, sources, &mut x);
        if b > 0 {
            let xb = nalgebra::DVector::from_column_slice(&prev);
            let r = nalgebra::DVector::from_column_slice(&x) - &a * xb;
            w += &r * r.transpose();
        }
        for i in 0..d {
            for j in 0..d {
                let v = p0.get(i, j) + (x[i] - mean[i]) * (x[j] - mean[j]) / t as f64;
                p0.set(i, j, v);
            }
        }
        prev.copy_from_slice(&x);
    })?;
    w /= (t - 1) as f64;
    Ok((Mat::from_dmatrix(&a), Mat::from_dmatrix(&w), mean, p0))
}

/// Puts per-channel fits and the dynamics together.
pub fn assemble(
    session: &dyn BlockRows,
    options: &PointProcessFitOptions,
    fits: Vec<Result<ChannelGlm, ChannelLeftOut>>,
) -> Result<(PointProcessModel, PointProcessFitReport), TrainError> {
    let info = session.info();
    if !info.has_kinematics {
        return Err(TrainError::NoKinematics);
    }
    let sources = state_sources(&info.kinematic_names, &options.state)?;
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

/// How a point-process fit's channels are fitted: each channel's GLM is
/// independent of the others.
pub trait ChannelFits: Sync {
    /// One fit per channel `0..n_channels`, in order.
    fn fit(
        &self,
        rows: &(dyn BlockRows + Sync),
        options: &PointProcessFitOptions,
        n_channels: usize,
    ) -> Result<Vec<Result<ChannelGlm, ChannelLeftOut>>, TrainError>;
}

/// Every channel in the same passes, on the caller's thread.
pub struct OneAfterAnother;

impl ChannelFits for OneAfterAnother {
    fn fit(
        &self,
        rows: &(dyn BlockRows + Sync),
        options: &PointProcessFitOptions,
        n_channels: usize,
    ) -> Result<Vec<Result<ChannelGlm, ChannelLeftOut>>, TrainError> {
        fit_channels(rows, options, &(0..n_channels).collect::<Vec<_>>())
    }
}

/// Fits the point-process decoder with `fits` doing the channels.
pub fn fit_point_process_with(
    rows: &(dyn BlockRows + Sync),
    options: &PointProcessFitOptions,
    fits: &dyn ChannelFits,
) -> Result<(PointProcessModel, PointProcessFitReport), TrainError> {
    let info = rows.info();
    if info.input != crate::wire::packet::BinKind::Counts {
        return Err(TrainError::NeedsCounts {
            decoder: "point-process decoder",
        });
    }
    if !info.has_kinematics {
        return Err(TrainError::NoKinematics);
    }
    state_sources(&info.kinematic_names, &options.state)?;
    let channels = fits.fit(rows, options, info.n_channels)?;
    assemble(rows, options, channels)
}

/// Fits every channel, side by side in the same passes (see
/// [`fit_channels`] to run groups of channels in parallel).
pub fn fit_point_process(
    session: &dyn BlockRows,
    options: &PointProcessFitOptions,
) -> Result<(PointProcessModel, PointProcessFitReport), TrainError> {
    let info = session.info();
    if !info.has_kinematics {
        return Err(TrainError::NoKinematics);
    }
    state_sources(&info.kinematic_names, &options.state)?;
    let channels: Vec<usize> = (0..info.n_channels).collect();
    let fits = fit_channels(session, options, &channels)?;
    assemble(session, options, fits)
}
