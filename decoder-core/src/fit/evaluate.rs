//! Cross-validated comparison of decoders on one block.
//!
//! Each decoder is fitted on all folds but one and run, through the same
//! [`DecodePipeline`] the daemon uses, over the held-out fold's segments,
//! starting from its initial state at each segment. Scores are per output
//! dimension, per fold, and their mean. Everything is gathered in passes
//! over the block's rows, so evaluation of a block of any length holds a
//! few rows, the folds' sums and models, not the block.

use std::ops::Range;

use serde::Serialize;

use crate::decoders::DecoderModel;
use crate::decoders::point_process::PointProcessFilter;
use crate::engine::pipeline::DecodePipeline;
use crate::engine::pipeline::PipelineError;
use crate::fit::TrainError;
use crate::fit::folds::FoldPlan;
use crate::fit::goodness::{ChannelFit, ChannelFitSums};
use crate::fit::kalman::{
    KalmanFitOptions, KalmanStats, check_options, fill_state, fit_from_block_stats, fit_from_stats,
    state_sources,
};
use crate::fit::metrics::{ScoreSums, Scores, mean_scores};
use crate::fit::point_process::{ChannelFits, PointProcessFitOptions, fit_point_process_with};
use crate::fit::rows::{SegmentWalk, Without, each_count_row, each_row};
use crate::fit::wiener::{
    WienerFitOptions, WienerStats, fit_wiener_from_block_stats, fit_wiener_from_stats,
    output_columns,
};
use crate::formats::block_rows::{BlockInfo, BlockRows};

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
    pub fn unused_kinematics(&self, kinematic_names: &[String]) -> Vec<String> {
        let state: &[String] = match self {
            DecoderSpec::Kalman(o) => &o.state,
            DecoderSpec::Wiener(_) => &[],
            DecoderSpec::PointProcess(o) => &o.state,
        };
        kinematic_names
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
    /// Per channel, the KS curve: (uniform quantile, rescaled interval)
    /// points, for plots.
    #[serde(skip)]
    pub curves: Vec<Vec<(f64, f64)>>,
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

/// Per-fold fitted models for one decoder spec; `on_fold` after each.
fn fit_per_fold(
    session: &(dyn BlockRows + Sync),
    info: &BlockInfo,
    spec: &DecoderSpec,
    plan: &FoldPlan,
    fits: &dyn ChannelFits,
    on_fold: &mut dyn FnMut(&str, usize),
) -> Result<FoldModels, TrainError> {
    let k = plan.k();
    // Fold f trains on the sums of every other fold's pieces.
    let models: Result<Vec<DecoderModel>, TrainError> = match spec {
        DecoderSpec::Kalman(opts) => {
            let sources = check_options(info, opts)?;
            if opts.per_block {
                // Each fold's sums kept per block: the blocks are centred
                // apart, so they are summed over folds first. One model
                // per block, each with that block's baselines.
                let (groups, n_blocks) = by_fold_and_block(info, plan);
                let parts =
                    KalmanStats::gather(session, &sources, opts.lag_bins, opts.q_form, &groups)?;
                let mut models = Vec::with_capacity(k * n_blocks);
                for f in 0..k {
                    let train = training_blocks(
                        &parts,
                        n_blocks,
                        f,
                        || {
                            KalmanStats::new(
                                info.input,
                                sources.len(),
                                info.n_channels,
                                opts.q_form,
                            )
                        },
                        KalmanStats::add_assign,
                    );
                    for b in 0..n_blocks {
                        let (m, _) = fit_from_block_stats(&train, opts, info.bin_width, Some(b))?;
                        models.push(DecoderModel::Kalman(m));
                    }
                    on_fold(spec.name(), f);
                }
                return Ok(FoldModels {
                    models,
                    per_fold: n_blocks,
                });
            }
            let parts =
                KalmanStats::gather(session, &sources, opts.lag_bins, opts.q_form, &plan.pieces)?;
            (0..k)
                .map(|f| {
                    let mut train =
                        KalmanStats::new(info.input, sources.len(), info.n_channels, opts.q_form);
                    for (g, p) in parts.iter().enumerate() {
                        if g != f {
                            train.add_assign(p);
                        }
                    }
                    let model = fit_from_stats(&train, opts, info.bin_width)
                        .map(|(m, _)| DecoderModel::Kalman(m));
                    on_fold(spec.name(), f);
                    model
                })
                .collect()
        }
        DecoderSpec::Wiener(opts) => {
            let cols = output_columns(info, &opts.outputs)?;
            if opts.per_block {
                let (groups, n_blocks) = by_fold_and_block(info, plan);
                let parts = WienerStats::gather(session, &cols, opts.taps, opts.lag_bins, &groups)?;
                let mut models = Vec::with_capacity(k * n_blocks);
                for f in 0..k {
                    let train = training_blocks(
                        &parts,
                        n_blocks,
                        f,
                        || WienerStats::new(info.input, info.n_channels, opts.taps, cols.len()),
                        WienerStats::add_assign,
                    );
                    for b in 0..n_blocks {
                        let m =
                            fit_wiener_from_block_stats(&train, opts, info.n_channels, Some(b))?;
                        models.push(DecoderModel::Wiener(m));
                    }
                    on_fold(spec.name(), f);
                }
                return Ok(FoldModels {
                    models,
                    per_fold: n_blocks,
                });
            }
            let parts =
                WienerStats::gather(session, &cols, opts.taps, opts.lag_bins, &plan.pieces)?;
            (0..k)
                .map(|f| {
                    let mut train =
                        WienerStats::new(info.input, info.n_channels, opts.taps, cols.len());
                    for (g, p) in parts.iter().enumerate() {
                        if g != f {
                            train.add_assign(p);
                        }
                    }
                    let model = fit_wiener_from_stats(&train, opts, info.n_channels)
                        .map(DecoderModel::Wiener);
                    on_fold(spec.name(), f);
                    model
                })
                .collect()
        }
        DecoderSpec::PointProcess(opts) => (0..k)
            .map(|f| {
                // The other folds' pieces, joined end to end.
                let training = Without::new(session, plan.pieces[f].clone());
                let model = fit_point_process_with(&training, opts, fits)
                    .map(|(m, _)| DecoderModel::PointProcess(m));
                on_fold(spec.name(), f);
                model
            })
            .collect(),
    };
    Ok(FoldModels {
        models: models?,
        per_fold: 1,
    })
}

/// The models cross-validation fitted: `per_fold` a fold (one per block
/// with per-block normalisation, each with its block's baselines; else
/// one), fold f's first at `f · per_fold`.
struct FoldModels {
    models: Vec<DecoderModel>,
    per_fold: usize,
}

impl FoldModels {
    /// The model that decodes row `t`, held out by fold `f`.
    fn index(&self, info: &BlockInfo, f: usize, t: usize) -> usize {
        if self.per_fold == 1 {
            return f;
        }
        let block = info.block_starts.iter().filter(|&&s| s <= t).count();
        f * self.per_fold + block.min(self.per_fold - 1)
    }
}

/// Every fold's pieces split by block: group `f · blocks + b` holds fold
/// f's pieces in block b. Returns the groups and the number of blocks.
fn by_fold_and_block(info: &BlockInfo, plan: &FoldPlan) -> (Vec<Vec<Range<usize>>>, usize) {
    let n_blocks = info.block_starts.len() + 1;
    let groups = plan
        .pieces
        .iter()
        .flat_map(|pieces| info.by_block(pieces))
        .collect();
    (groups, n_blocks)
}

/// Fold f's training sums per block: for each block, the sum of its
/// parts in every other fold (`parts` grouped as [`by_fold_and_block`]).
fn training_blocks<S>(
    parts: &[S],
    n_blocks: usize,
    f: usize,
    empty: impl Fn() -> S,
    add: impl Fn(&mut S, &S),
) -> Vec<S> {
    (0..n_blocks)
        .map(|b| {
            let mut sum = empty();
            for (g, p) in parts.iter().enumerate() {
                if g / n_blocks != f && g % n_blocks == b {
                    add(&mut sum, p);
                }
            }
            sum
        })
        .collect()
}

/// The held-out segments of every fold, tagged by fold, for one walk.
fn held_out_walk(plan: &FoldPlan) -> SegmentWalk<usize> {
    SegmentWalk::new(
        plan.held_out
            .iter()
            .enumerate()
            .flat_map(|(f, segs)| segs.iter().map(move |s| (s.clone(), f)))
            .collect(),
    )
}

/// Walks each fold's encoding models over its held-out bins with the true
/// kinematics and the observed history, and scores every channel: one
/// pass, all folds at once (each bin is held out by one fold).
fn goodness_of_fit(
    session: &dyn BlockRows,
    info: &BlockInfo,
    spec: &DecoderSpec,
    plan: &FoldPlan,
    models: &[DecoderModel],
) -> Result<Option<DecoderGoodness>, TrainError> {
    let DecoderSpec::PointProcess(opts) = spec else {
        return Ok(None);
    };
    let sources = state_sources(&info.kinematic_names, &opts.state)?;
    let n = info.n_channels;
    let mut filters = models
        .iter()
        .map(|m| match m {
            DecoderModel::PointProcess(m) => {
                PointProcessFilter::new(m).map_err(PipelineError::PointProcess)
            }
            _ => unreachable!("a point-process spec fits point-process models"),
        })
        .collect::<Result<Vec<_>, _>>()?;
    let mut sums: Vec<ChannelFitSums> = (0..n).map(ChannelFitSums::new).collect();
    let mut state = vec![0.0; sources.len()];
    let mut lambda = vec![0.0; n];
    let mut walk = held_out_walk(plan);
    each_count_row(session, info.kinematic_names.len(), |t, counts, kin| {
        let Some((seg, f)) = walk.at(t) else {
            return;
        };
        let filter = &mut filters[f];
        if t == seg.start {
            filter.reset();
        }
        fill_state(kin, &sources, &mut state);
        filter.expected_counts(&state, &mut lambda);
        for (s, (&l, &c)) in sums.iter_mut().zip(lambda.iter().zip(counts)) {
            s.add(l, c);
        }
        filter.observe(counts);
    })?;
    let channels: Vec<ChannelFit> = sums.iter().map(ChannelFitSums::finish).collect();
    let within_band = channels.iter().filter(|c| c.within_band).count();
    let mean_bits_per_spike =
        channels.iter().map(|c| c.bits_per_spike).sum::<f64>() / n.max(1) as f64;
    Ok(Some(DecoderGoodness {
        decoder: spec.name().into(),
        channels,
        within_band,
        mean_bits_per_spike,
        curves: sums.iter().map(ChannelFitSums::ks_curve).collect(),
    }))
}

/// What decoding the held-out segments gathers.
struct HeldOut {
    /// `sums[fold][dim]`.
    sums: Vec<Vec<ScoreSums>>,
    /// Per output dimension, (true, decoded) over fold 0's first
    /// [`TRACE_BINS`] bins.
    traces: Vec<(Vec<f64>, Vec<f64>)>,
}

/// Decodes every fold's held-out segments with its model, each from the
/// model's initial state, in one pass: the per-fold scores and, from
/// fold 0, the first [`TRACE_BINS`] of decoded and true values.
fn decode_held_out(
    session: &dyn BlockRows,
    info: &BlockInfo,
    plan: &FoldPlan,
    models: &FoldModels,
    cols: &[usize],
    lag: usize,
) -> Result<HeldOut, TrainError> {
    let d = cols.len();
    let mut pipelines = models
        .models
        .iter()
        .map(|m| {
            DecodePipeline::from_decoder(m, info.bin_width, true).map(|p| p.with_input(info.input))
        })
        .collect::<Result<Vec<_>, _>>()?;
    let mut sums = vec![vec![ScoreSums::default(); d]; plan.k()];
    let mut traces: Vec<(Vec<f64>, Vec<f64>)> = vec![(Vec::new(), Vec::new()); d];
    // Estimates of the last lag + 1 bins, each paired with the kinematics
    // lag bins later.
    let mut recent = vec![0.0; (lag + 1) * d];
    let mut walk = held_out_walk(plan);
    each_row(session, info.kinematic_names.len(), |t, values, kin| {
        let Some((seg, f)) = walk.at(t) else {
            return;
        };
        // A held-out segment lies in one block (folds are cut at edges).
        let m = models.index(info, f, seg.start);
        if t == seg.start {
            pipelines[m].reset();
        }
        if t + lag < seg.end {
            let out = pipelines[m].step_bin(t as u64, values);
            let at = (t % (lag + 1)) * d;
            recent[at..at + d].copy_from_slice(&out.estimate[..d]);
        }
        if t >= seg.start + lag {
            let at = ((t - lag) % (lag + 1)) * d;
            for (dim, &c) in cols.iter().enumerate() {
                let (truth, estimate) = (kin[c], recent[at + dim]);
                sums[f][dim].add(truth, estimate);
                if f == 0 && traces[dim].0.len() < TRACE_BINS {
                    traces[dim].0.push(truth);
                    traces[dim].1.push(estimate);
                }
            }
        }
    })?;
    Ok(HeldOut { sums, traces })
}

/// Runs `k`-fold cross-validation of each spec; `on_fold` is called after
/// each fitted fold (for progress display). A few passes over the block's
/// rows per decoder (more for the point-process fits), never the block in
/// memory: a session directory is read a chunk at a time
/// ([`crate::formats::block_rows::BlockFiles`]), and the result is the same
/// bits as for the block in memory.
pub fn cross_validate(
    session: &(dyn BlockRows + Sync),
    specs: &[DecoderSpec],
    k: usize,
    fits: &dyn ChannelFits,
    mut on_fold: impl FnMut(&str, usize),
) -> Result<Evaluation, TrainError> {
    let info = session.info();
    if !info.has_kinematics {
        return Err(TrainError::NoKinematics);
    }
    let plan = FoldPlan::new(&info, k)?;
    let mut decoders = Vec::new();
    let mut traces = Vec::new();
    let mut goodness = Vec::new();
    for spec in specs {
        let cols = output_columns(&info, spec.outputs())?;
        let models = fit_per_fold(session, &info, spec, &plan, fits, &mut on_fold)?;
        if let Some(g) = goodness_of_fit(session, &info, spec, &plan, &models.models)? {
            goodness.push(g);
        }
        let HeldOut {
            sums,
            traces: fold0,
        } = decode_held_out(session, &info, &plan, &models, &cols, spec.lag())?;
        let per_fold: Vec<Vec<Scores>> = sums
            .iter()
            .map(|dims| dims.iter().map(ScoreSums::scores).collect())
            .collect();
        for (name, (truth, estimate)) in spec.outputs().iter().zip(fold0) {
            traces.push(HeldOutTrace {
                decoder: spec.name().into(),
                output: name.clone(),
                truth,
                estimate,
            });
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
