//! Cross-validation folds. Neighbouring bins are strongly correlated, so a
//! fold is always a run of whole trials (when the block has a trial table)
//! or a contiguous block of bins: shuffling single bins into folds would let
//! the decoder see the test bins' neighbours and overstate its accuracy.
//!
//! Each fold owns a set of `pieces` that together partition the block (a
//! trial's piece runs to the next trial's start, so inter-trial bins train
//! too), and is scored on its `held_out` segments. Training for fold f is
//! then the sum of the other folds' statistics, one pass over the block in
//! all.

use std::ops::Range;

use crate::fit::TrainError;
use crate::formats::block_rows::BlockInfo;

#[derive(Clone, Debug, PartialEq)]
pub struct FoldPlan {
    /// Per fold, the segments it is scored on.
    pub held_out: Vec<Vec<Range<usize>>>,
    /// Per fold, the segments whose statistics it contributes; over all
    /// folds these partition the block.
    pub pieces: Vec<Vec<Range<usize>>>,
    pub by_trial: bool,
}

impl FoldPlan {
    /// `k` folds: contiguous runs of trials, or contiguous blocks of bins;
    /// every piece and held-out segment cut at the block's edges, so no
    /// fold pairs rows, or decodes on, across one.
    pub fn new(session: &BlockInfo, k: usize) -> Result<FoldPlan, TrainError> {
        let mut plan = Self::uncut(session, k)?;
        if !session.edges.is_empty() {
            let cut = |segs: &mut Vec<Vec<Range<usize>>>| {
                for f in segs.iter_mut() {
                    *f = f
                        .iter()
                        .flat_map(|r| cut_at(r.clone(), &session.edges))
                        .collect();
                }
            };
            cut(&mut plan.held_out);
            cut(&mut plan.pieces);
        }
        Ok(plan)
    }

    /// `k` folds: contiguous runs of trials, or contiguous blocks of bins.
    fn uncut(session: &BlockInfo, k: usize) -> Result<FoldPlan, TrainError> {
        if k < 2 {
            return Err(TrainError::Option {
                key: "folds",
                problem: format!("{k} folds; cross-validation needs at least 2"),
            });
        }
        match &session.trials {
            Some(trials) if !trials.is_empty() => {
                if trials.len() < k {
                    return Err(TrainError::Option {
                        key: "folds",
                        problem: format!(
                            "{k} folds but trials.csv has only {} trials",
                            trials.len()
                        ),
                    });
                }
                let mut sorted = trials.clone();
                sorted.sort_by_key(|t| t.start_bin);
                let n = sorted.len();
                let mut held_out = Vec::with_capacity(k);
                let mut pieces = Vec::with_capacity(k);
                for r in split_evenly(n, k) {
                    let mut held = Vec::new();
                    let mut own = Vec::new();
                    for i in r {
                        // A piece runs from this trial's start to the next one's;
                        // overlapping trials are clipped so no bin is in two folds.
                        let start = if i == 0 { 0 } else { sorted[i].start_bin };
                        let end = if i + 1 < n {
                            sorted[i + 1].start_bin
                        } else {
                            session.n_bins
                        };
                        held.push(sorted[i].start_bin..sorted[i].end_bin.min(end));
                        own.push(start..end);
                    }
                    held_out.push(held);
                    pieces.push(own);
                }
                Ok(FoldPlan {
                    held_out,
                    pieces,
                    by_trial: true,
                })
            }
            _ => {
                if session.n_bins < k * 10 {
                    return Err(TrainError::Option {
                        key: "folds",
                        problem: format!(
                            "{k} folds of a {}-bin block leaves under 10 bins a fold",
                            session.n_bins
                        ),
                    });
                }
                let held_out: Vec<Vec<Range<usize>>> = split_evenly(session.n_bins, k)
                    .into_iter()
                    .map(|r| vec![r])
                    .collect();
                Ok(FoldPlan {
                    pieces: held_out.clone(),
                    held_out,
                    by_trial: false,
                })
            }
        }
    }

    pub fn k(&self) -> usize {
        self.held_out.len()
    }

    /// The training segments of fold `f`: every other fold's pieces.
    pub fn training_segments(&self, f: usize) -> Vec<Range<usize>> {
        let mut out: Vec<Range<usize>> = self
            .pieces
            .iter()
            .enumerate()
            .filter(|(g, _)| *g != f)
            .flat_map(|(_, p)| p.iter().cloned())
            .collect();
        out.sort_by_key(|r| r.start);
        out
    }
}

/// `r` cut at every edge inside it.
fn cut_at(r: Range<usize>, edges: &[usize]) -> Vec<Range<usize>> {
    let mut out = Vec::new();
    let mut start = r.start;
    for &e in edges.iter().filter(|&&e| e > r.start && e < r.end) {
        out.push(start..e);
        start = e;
    }
    out.push(start..r.end);
    out
}

/// `len` items into `k` contiguous ranges whose sizes differ by at most one.
pub fn split_evenly(len: usize, k: usize) -> Vec<Range<usize>> {
    (0..k).map(|i| (i * len / k)..((i + 1) * len / k)).collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::formats::block::{Block, Trial};
    use crate::formats::block_rows::BlockRows;

    #[test]
    fn even_split_covers_everything_once() {
        assert_eq!(split_evenly(10, 3), vec![0..3, 3..6, 6..10]);
    }

    fn block_with_trials(spans: &[(usize, usize)], n_bins: usize) -> Block {
        Block {
            input: crate::wire::packet::BinKind::Counts,
            features: Vec::new(),
            bin_width: crate::bin_width::BinWidth::from_us(20_000).unwrap(),
            n_bins,
            n_channels: 1,
            counts: vec![0; n_bins],
            kinematic_names: vec!["vel_x".into()],
            kinematics: None,
            trials: Some(
                spans
                    .iter()
                    .enumerate()
                    .map(|(i, &(s, e))| Trial {
                        trial: i as u32,
                        start_bin: s,
                        end_bin: e,
                        target_x: 0.0,
                        target_y: 0.0,
                    })
                    .collect(),
            ),
            channel_labels: None,
            valid: None,
            click: None,
            notes: None,
        }
    }

    #[test]
    fn trial_pieces_partition_the_block_and_hold_out_whole_trials() {
        let s = block_with_trials(&[(5, 10), (12, 20), (25, 30), (31, 40)], 45);
        let plan = FoldPlan::new(&s.info(), 2).unwrap();
        assert_eq!(
            plan.held_out,
            vec![vec![5..10, 12..20], vec![25..30, 31..40]]
        );
        let mut all: Vec<_> = plan.pieces.iter().flatten().cloned().collect();
        all.sort_by_key(|r| r.start);
        assert_eq!(all, vec![0..12, 12..25, 25..31, 31..45]);
        assert_eq!(plan.training_segments(0), vec![25..31, 31..45]);
    }

    #[test]
    fn too_many_folds_for_the_trials_is_refused() {
        let s = block_with_trials(&[(0, 5)], 10);
        assert!(matches!(
            FoldPlan::new(&s.info(), 2),
            Err(TrainError::Option { key: "folds", .. })
        ));
    }
}
