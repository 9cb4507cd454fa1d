//! A block's rows decoded bin after bin through the per-bin pipeline, from
//! the model's initial state — the one replay of a session directory or a
//! block in memory, whatever its length: rows are read a chunk at a time
//! and each chunk's estimates handed on as they come, so memory does not
//! grow with the block. (A session log replays through the slot engine
//! instead: `formats::log_replay`.)

use std::path::PathBuf;

use crate::bin_width::BinWidth;
use crate::engine::pipeline::DecodePipeline;
use crate::fit::metrics::ScoreSums;
use crate::formats::block::{Block, BlockError};
use crate::formats::block_rows::AllRows;

/// Why a block cannot be decoded with a model.
#[derive(Debug, thiserror::Error)]
pub enum MismatchError {
    #[error(
        "the block has {block} channels but the model expects {model}; use the model trained for this array"
    )]
    Channels { block: usize, model: usize },
    #[error(
        "the block holds {block} but the model decodes {model}; use a model trained on {block}"
    )]
    Input {
        block: &'static str,
        model: &'static str,
    },
    #[error(
        "the block has {block} bins but the model was trained on {model} bins; rebin the block or retrain"
    )]
    BinWidth { block: BinWidth, model: BinWidth },
}

/// Why a replay stopped.
#[derive(Debug, thiserror::Error)]
pub enum ReplayError {
    #[error("{}: {problem}", block.display())]
    Mismatch {
        block: PathBuf,
        problem: MismatchError,
    },
    #[error(transparent)]
    Block(#[from] BlockError),
    /// Whoever took the estimates could not (a full disk, say).
    #[error("{0}")]
    Sink(Box<dyn std::error::Error + Send + Sync>),
}

/// What the taker of a replay's estimates may answer.
pub type SinkResult = Result<(), Box<dyn std::error::Error + Send + Sync>>;

/// Checks that a block's kind, channel count and bin width match a
/// model's.
pub fn check_block(
    pipeline: &DecodePipeline,
    input: crate::wire::packet::BinKind,
    n_channels: usize,
    bin_width: BinWidth,
) -> Result<(), MismatchError> {
    if input != pipeline.input() {
        return Err(MismatchError::Input {
            block: input.name(),
            model: pipeline.input().name(),
        });
    }
    if n_channels != pipeline.n_channels() {
        return Err(MismatchError::Channels {
            block: n_channels,
            model: pipeline.n_channels(),
        });
    }
    if bin_width != pipeline.bin_width() {
        return Err(MismatchError::BinWidth {
            block: bin_width,
            model: pipeline.bin_width(),
        });
    }
    Ok(())
}

/// What a replay of a block's rows found.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct RowReplay {
    /// Rows decoded (every row, valid or not).
    pub bins: usize,
    /// Bins whose estimate had a numerical fault (unusable).
    pub faults: usize,
    /// Per output that the block's kinematics name: (output, Pearson CC)
    /// over the valid rows. Empty without kinematics.
    pub cc: Vec<(String, f64)>,
}

/// Decodes every row of `rows` from the model's initial state, in order;
/// each chunk's estimates (`rows × outputs`) go to `on_estimates` as they
/// come. `outputs` names the pipeline's outputs, to score each against the
/// kinematics column of that name (empty: no scores). `block` names the
/// block in errors.
pub fn replay_rows(
    rows: &dyn AllRows,
    block: &std::path::Path,
    pipeline: &mut DecodePipeline,
    outputs: &[String],
    mut on_estimates: impl FnMut(&[f64]) -> SinkResult,
) -> Result<RowReplay, ReplayError> {
    let info = rows.info();
    check_block(pipeline, info.input, info.n_channels, info.bin_width).map_err(|problem| {
        ReplayError::Mismatch {
            block: block.to_path_buf(),
            problem,
        }
    })?;
    let n = info.n_channels;
    let cols = info.kinematic_names.len();
    // The truth for the CC: the output columns of the kinematics.
    let truth_cols: Vec<Option<usize>> = outputs.iter().map(|o| info.kinematic_index(o)).collect();
    let mut cc = vec![ScoreSums::default(); outputs.len()];
    pipeline.reset();
    let mut est = Vec::new();
    let (mut bin, mut faults) = (0usize, 0usize);
    let mut failed = None;
    rows.pass_all(&mut |chunk| {
        if failed.is_some() {
            return;
        }
        est.clear();
        for r in 0..chunk.rows {
            let e = pipeline.step_bin(bin as u64, chunk.values(r, n));
            faults += usize::from(e.numerical_fault);
            est.extend_from_slice(e.estimate);
            if info.has_kinematics && chunk.is_valid(r) {
                for (dim, col) in truth_cols.iter().enumerate() {
                    if let Some(c) = col {
                        cc[dim].add(chunk.kinematics[r * cols + c], e.estimate[dim]);
                    }
                }
            }
            bin += 1;
        }
        if let Err(e) = on_estimates(&est) {
            failed = Some(e);
        }
    })?;
    if let Some(e) = failed {
        return Err(ReplayError::Sink(e));
    }
    let cc = if info.has_kinematics {
        outputs
            .iter()
            .zip(&truth_cols)
            .zip(&cc)
            .filter(|((_, col), _)| col.is_some())
            .map(|((o, _), c)| (o.clone(), c.cc()))
            .collect()
    } else {
        Vec::new()
    };
    Ok(RowReplay {
        bins: bin,
        faults,
        cc,
    })
}

/// Decodes every bin of a block in memory, returning the estimates as
/// `n_bins × n_outputs`, bin after bin, and how many bins had a numerical
/// fault.
pub fn replay_block(
    pipeline: &mut DecodePipeline,
    block: &Block,
) -> Result<(Vec<f64>, usize), MismatchError> {
    let mut out = Vec::with_capacity(block.n_bins * pipeline.n_outputs());
    let replayed = replay_rows(
        block,
        std::path::Path::new("the block"),
        pipeline,
        &[],
        |est| {
            out.extend_from_slice(est);
            Ok(())
        },
    );
    match replayed {
        Ok(r) => Ok((out, r.faults)),
        Err(ReplayError::Mismatch { problem, .. }) => Err(problem),
        Err(e) => unreachable!("a block in memory reads and its estimates are kept: {e}"),
    }
}
