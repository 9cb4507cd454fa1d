//! Cross-validated comparison of decoders on one block.
//!
//! Each decoder is fitted on all folds but one and run, through the same
//! [`DecodePipeline`] the daemon uses, over the held-out fold's segments,
//! starting from its initial state at each segment. Scores are per output
//! dimension, per fold, and their mean.

use serde::Serialize;

use crate::decoders::DecoderModel;
use crate::decoders::point_process::PointProcessFilter;
use crate::engine::pipeline::DecodePipeline;
use crate::engine::pipeline::PipelineError;
use crate::fit::TrainError;
use crate::fit::folds::FoldPlan;
use crate::fit::goodness::{self, ChannelFit};
use crate::fit::kalman::{
    KalmanFitOptions, KalmanStats, check_options, fill_state, fit_from_stats, state_sources,
};
use crate::fit::metrics::{Scores, mean_scores, scores};
use crate::fit::point_process::{PointProcessFitOptions, fit_point_process};
use crate::fit::wiener::{WienerFitOptions, WienerStats, fit_wiener_from_stats, output_columns};
use crate::formats::block::Block;

#[derive(Clone, Debug, PartialEq)]
pub enum DecoderSpec {
    Kalman(KalmanFitOptions),
    Wiener(WienerFitOptions),
    PointProcess(PointProcessFitOptions),
}

impl DecoderSpec {
    pub fn name(&self) -> &'static str {
        match self {
            DecoderSpec::Kalman(_) => "kalman",
            DecoderSpec::Wiener(_) => "wiener",
            DecoderSpec::PointProcess(o) if o.history.is_none() => "pp-lnp",
            DecoderSpec::PointProcess(o) if o.coupling => "pp-coupled",
            DecoderSpec::PointProcess(_) => "pp-history",
        }
    }

    /// The block's kinematics columns this decoder leaves out: neither in
    /// its state nor among its outputs (a 3-D block given a 2-D state).
    pub fn unused_kinematics(&self, block: &Block) -> Vec<String> {
        let state: &[String] = match self {
            DecoderSpec::Kalman(o) => &o.state,
            DecoderSpec::Wiener(_) => &[],
            DecoderSpec::PointProcess(o) => &o.state,
        };
        block
            .kinematic_names
            .iter()
            .filter(|k| !state.contains(k) && !self.outputs().contains(k))
            .filter(|k| {
                // Positions are the integral of velocities: a velocity
                // decoder that uses vel_z has pos_z's information.
                let velocity = k.replacen("pos_", "vel_", 1);
                !(k.starts_with("pos_")
                    && (state.contains(&velocity) || self.outputs().contains(&velocity)))
            })
            .cloned()
            .collect()
    }

    fn outputs(&self) -> &[String] {
        match self {
            DecoderSpec::Kalman(o) => &o.outputs,
            DecoderSpec::Wiener(o) => &o.outputs,
            DecoderSpec::PointProcess(o) => &o.outputs,
        }
    }

    fn lag(&self) -> usize {
        match self {
            DecoderSpec::Kalman(o) => o.lag_bins,
            DecoderSpec::Wiener(o) => o.lag_bins,
            DecoderSpec::PointProcess(_) => 0,
        }
    }
}

/// Goodness of fit of a point-process decoder's encoding models on the
/// held-out bins of every fold (each bin is held out once).
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct DecoderGoodness {
    pub decoder: String,
    pub channels: Vec<ChannelFit>,
    /// Channels whose KS statistic is within the 95 % band.
    pub within_band: usize,
    pub mean_bits_per_spike: f64,
    /// Rescaled intervals per channel (for KS plots).
    #[serde(skip)]
    pub intervals: Vec<Vec<f64>>,
}

/// A copy of the block made of `ranges` only, in order.
fn subset(session: &Block, ranges: &[std::ops::Range<usize>]) -> Block {
    let n = session.n_channels;
    let mut counts = Vec::new();
    let kin = session.kinematics.as_ref();
    let k = session.kinematic_names.len();
    let mut rows: Vec<f64> = Vec::new();
    let mut bins = 0;
    for r in ranges {
        counts.extend_from_slice(&session.counts[r.start * n..r.end * n]);
        if let Some(m) = kin {
            rows.extend_from_slice(&m.data[r.start * k..r.end * k]);
        }
        bins += r.len();
    }
    Block {
        bin_width: session.bin_width,
        n_bins: bins,
        n_channels: n,
        counts,
        kinematic_names: session.kinematic_names.clone(),
        kinematics: kin.map(|_| crate::linalg::Mat {
            rows: bins,
            cols: k,
            data: rows,
        }),
        trials: None,
        channel_labels: None,
        valid: None,
        notes: None,
    }
}

#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct DecoderEvaluation {
    pub decoder: String,
    pub outputs: Vec<String>,
    /// `per_fold[f][dim]`.
    pub per_fold: Vec<Vec<Scores>>,
    pub mean: Vec<Scores>,
}

/// Decoded and true values over the first held-out segments of fold 0, for
/// plots.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct HeldOutTrace {
    pub decoder: String,
    pub output: String,
    pub truth: Vec<f64>,
    pub estimate: Vec<f64>,
}

#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Evaluation {
    pub folds: usize,
    pub by_trial: bool,
    pub decoders: Vec<DecoderEvaluation>,
    pub traces: Vec<HeldOutTrace>,
    /// For each point-process decoder: its encoding models' fit.
    pub goodness: Vec<DecoderGoodness>,
}

/// Bins of held-out trace kept for plotting.
const TRACE_BINS: usize = 1500;

/// Per-fold fitted models for one decoder spec.
fn fit_per_fold(
    session: &Block,
    spec: &DecoderSpec,
    plan: &FoldPlan,
) -> Result<Vec<DecoderModel>, TrainError> {
    let k = plan.k();
    match spec {
        DecoderSpec::Kalman(opts) => {
            let sources = check_options(session, opts)?;
            let parts: Vec<KalmanStats> = plan
                .pieces
                .iter()
                .map(|pieces| {
                    let mut s = KalmanStats::new(sources.len(), session.n_channels, opts.q_form);
                    for seg in pieces {
                        s.accumulate(session, &sources, opts.lag_bins, seg.clone());
                    }
                    s
                })
                .collect();
            (0..k)
                .map(|f| {
                    let mut train =
                        KalmanStats::new(sources.len(), session.n_channels, opts.q_form);
                    for (g, p) in parts.iter().enumerate() {
                        if g != f {
                            train.add_assign(p);
                        }
                    }
                    fit_from_stats(&train, opts, session.bin_width)
                        .map(|(m, _)| DecoderModel::Kalman(m))
                })
                .collect()
        }
        DecoderSpec::Wiener(opts) => {
            let cols = output_columns(session, &opts.outputs)?;
            let parts: Vec<WienerStats> = plan
                .pieces
                .iter()
                .map(|pieces| {
                    let mut s = WienerStats::new(session.n_channels, opts.taps, cols.len());
                    for seg in pieces {
                        s.accumulate(session, &cols, opts.taps, opts.lag_bins, seg.clone());
                    }
                    s
                })
                .collect();
            (0..k)
                .map(|f| {
                    let mut train = WienerStats::new(session.n_channels, opts.taps, cols.len());
                    for (g, p) in parts.iter().enumerate() {
                        if g != f {
                            train.add_assign(p);
                        }
                    }
                    fit_wiener_from_stats(&train, opts, session.n_channels)
                        .map(DecoderModel::Wiener)
                })
                .collect()
        }
        DecoderSpec::PointProcess(opts) => (0..k)
            .map(|f| {
                fit_point_process(&subset(session, &plan.training_segments(f)), opts)
                    .map(|(m, _)| DecoderModel::PointProcess(m))
            })
            .collect(),
    }
}

/// Walks each fold's encoding models over its held-out bins with the true
/// kinematics and the observed history, and scores every channel.
fn goodness_of_fit(
    session: &Block,
    spec: &DecoderSpec,
    plan: &FoldPlan,
    models: &[DecoderModel],
) -> Result<Option<DecoderGoodness>, TrainError> {
    let DecoderSpec::PointProcess(opts) = spec else {
        return Ok(None);
    };
    let sources = state_sources(session, &opts.state)?;
    let n = session.n_channels;
    let mut expected: Vec<Vec<f64>> = vec![Vec::new(); n];
    let mut counts: Vec<Vec<u16>> = vec![Vec::new(); n];
    let mut state = vec![0.0; sources.len()];
    let mut lambda = vec![0.0; n];
    for (f, model) in models.iter().enumerate() {
        let DecoderModel::PointProcess(m) = model else {
            continue;
        };
        let mut filter = PointProcessFilter::new(m).map_err(PipelineError::PointProcess)?;
        for seg in &plan.held_out[f] {
            filter.reset();
            for t in seg.clone() {
                fill_state(session, &sources, t, &mut state);
                filter.expected_counts(&state, &mut lambda);
                let bin = session.bin_counts(t);
                for c in 0..n {
                    expected[c].push(lambda[c]);
                    counts[c].push(bin[c]);
                }
                filter.observe(bin);
            }
        }
    }
    let channels: Vec<ChannelFit> = (0..n)
        .map(|c| goodness::channel_fit(c, &expected[c], &counts[c]))
        .collect();
    let intervals = (0..n)
        .map(|c| goodness::rescaled_intervals_seeded(&expected[c], &counts[c], 0x6F17 ^ c as u64))
        .collect();
    let within_band = channels.iter().filter(|c| c.within_band).count();
    let mean_bits_per_spike =
        channels.iter().map(|c| c.bits_per_spike).sum::<f64>() / n.max(1) as f64;
    Ok(Some(DecoderGoodness {
        decoder: spec.name().into(),
        channels,
        within_band,
        mean_bits_per_spike,
        intervals,
    }))
}

/// Runs `k`-fold cross-validation of each spec; `on_fold` is called after
/// each fitted fold (for progress display).
pub fn cross_validate(
    session: &Block,
    specs: &[DecoderSpec],
    k: usize,
    mut on_fold: impl FnMut(&str, usize),
) -> Result<Evaluation, TrainError> {
    let plan = FoldPlan::new(session, k)?;
    let kin = session
        .kinematics
        .as_ref()
        .ok_or(TrainError::NoKinematics)?;
    let mut decoders = Vec::new();
    let mut traces = Vec::new();
    let mut goodness = Vec::new();
    for spec in specs {
        let cols = output_columns(session, spec.outputs())?;
        let lag = spec.lag();
        let models = fit_per_fold(session, spec, &plan)?;
        if let Some(g) = goodness_of_fit(session, spec, &plan, &models)? {
            goodness.push(g);
        }
        let mut per_fold = Vec::with_capacity(k);
        for (f, model) in models.iter().enumerate() {
            let mut pipeline = DecodePipeline::from_decoder(model, session.bin_width, true)?;
            let mut truth: Vec<Vec<f64>> = vec![Vec::new(); cols.len()];
            let mut est: Vec<Vec<f64>> = vec![Vec::new(); cols.len()];
            for seg in &plan.held_out[f] {
                pipeline.reset();
                for t in seg.start..seg.end.saturating_sub(lag) {
                    let out = pipeline.step(t as u64, session.bin_counts(t));
                    for (dim, &c) in cols.iter().enumerate() {
                        truth[dim].push(kin.get(t + lag, c));
                        est[dim].push(out.estimate[dim]);
                    }
                }
            }
            per_fold.push(
                (0..cols.len())
                    .map(|dim| scores(&truth[dim], &est[dim]))
                    .collect::<Vec<_>>(),
            );
            if f == 0 {
                for (dim, name) in spec.outputs().iter().enumerate() {
                    let n = truth[dim].len().min(TRACE_BINS);
                    traces.push(HeldOutTrace {
                        decoder: spec.name().into(),
                        output: name.clone(),
                        truth: truth[dim][..n].to_vec(),
                        estimate: est[dim][..n].to_vec(),
                    });
                }
            }
            on_fold(spec.name(), f);
        }
        decoders.push(DecoderEvaluation {
            decoder: spec.name().into(),
            outputs: spec.outputs().to_vec(),
            mean: mean_scores(&per_fold),
            per_fold,
        });
    }
    Ok(Evaluation {
        folds: k,
        by_trial: plan.by_trial,
        decoders,
        traces,
        goodness,
    })
}
