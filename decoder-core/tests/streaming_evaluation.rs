//! Cross-validation and training read a session directory a chunk at a
//! time and give the same bits as the same block in memory: every decoder
//! (Kalman with a lag, Wiener with taps and a lag, the point-process
//! decoder without history, with history and with coupling), with bins
//! marked not valid, by trials and by contiguous blocks, with chunks so
//! small that every pair, tap and history term crosses a chunk boundary.

use decoder_core::decoders::point_process::ChannelGlm;
use decoder_core::fit::TrainError;
use decoder_core::fit::evaluate::{DecoderSpec, cross_validate};
use decoder_core::fit::kalman::{KalmanFitOptions, fit_kalman};
use decoder_core::fit::point_process::{
    ChannelFits, ChannelLeftOut, HistoryOptions, OneAfterAnother, PointProcessFitOptions,
    fit_channels, fit_point_process,
};
use decoder_core::fit::wiener::{WienerFitOptions, fit_wiener};
use decoder_core::formats::block::{Block, TRIALS_FILE};
use decoder_core::formats::block_rows::{BlockFiles, BlockRows, data_sha256};
use decoder_core::sim::reaching::{SimOptions, simulate};

fn specs() -> Vec<DecoderSpec> {
    let history = PointProcessFitOptions {
        history: Some(HistoryOptions {
            n_basis: 3,
            span_bins: 6,
        }),
        ..PointProcessFitOptions::default()
    };
    vec![
        DecoderSpec::Kalman(KalmanFitOptions {
            lag_bins: 2,
            ..KalmanFitOptions::default()
        }),
        DecoderSpec::Wiener(WienerFitOptions {
            taps: 3,
            lag_bins: 1,
            ..WienerFitOptions::default()
        }),
        DecoderSpec::PointProcess(PointProcessFitOptions {
            history: None,
            ..PointProcessFitOptions::default()
        }),
        DecoderSpec::PointProcess(history.clone()),
        DecoderSpec::PointProcess(PointProcessFitOptions {
            coupling: true,
            ..history
        }),
    ]
}

/// A simulated block with runs of bins marked not valid, as an exported
/// session log has.
fn block_with_gaps() -> Block {
    let (mut block, _) = simulate(&SimOptions {
        minutes: 1.5,
        n_channels: 6,
        seed: 4,
        ..SimOptions::default()
    })
    .unwrap();
    let mut valid = vec![true; block.n_bins];
    valid[..25].fill(false);
    for start in (300..block.n_bins).step_by(911) {
        valid[start..(start + 13).min(block.n_bins)].fill(false);
    }
    block.valid = Some(valid);
    block
}

/// Channels dealt to two threads, each group in its own passes, as the
/// tool's fits run on a rig PC's cores.
struct TwoThreads;

impl ChannelFits for TwoThreads {
    fn fit(
        &self,
        rows: &(dyn BlockRows + Sync),
        options: &PointProcessFitOptions,
        n: usize,
    ) -> Result<Vec<Result<ChannelGlm, ChannelLeftOut>>, TrainError> {
        let (even, odd): (Vec<usize>, Vec<usize>) = (0..n).partition(|c| c % 2 == 0);
        let (a, b) = std::thread::scope(|s| {
            let a = s.spawn(|| fit_channels(rows, options, &even));
            let b = s.spawn(|| fit_channels(rows, options, &odd));
            (a.join().unwrap(), b.join().unwrap())
        });
        let (mut a, mut b) = (a?.into_iter(), b?.into_iter());
        Ok((0..n)
            .map(|c| if c % 2 == 0 { a.next() } else { b.next() }.unwrap())
            .collect())
    }
}

/// Cross-validation whose point-process fits run on two threads gives the
/// bits it gives on one.
#[test]
fn evaluation_with_fits_on_two_threads_equals_one() {
    let block = block_with_gaps();
    let dir = tempfile::tempdir().unwrap();
    block.write(dir.path()).unwrap();
    let files = BlockFiles::open_with_chunk(dir.path(), 5).unwrap();
    let one = cross_validate(&files, &specs(), 3, &OneAfterAnother, |_, _| {}).unwrap();
    let two = cross_validate(&files, &specs(), 3, &TwoThreads, |_, _| {}).unwrap();
    assert_eq!(two, one);
}

#[test]
fn evaluation_from_files_equals_evaluation_in_memory() {
    let block = block_with_gaps();
    let dir = tempfile::tempdir().unwrap();
    block.write(dir.path()).unwrap();
    let memory = cross_validate(
        &block.valid_only(),
        &specs(),
        3,
        &OneAfterAnother,
        |_, _| {},
    )
    .unwrap();
    assert_eq!(memory.decoders.len(), 5);
    assert!(memory.by_trial);
    // A point-process decoder's fit is scored on every channel.
    assert!(memory.goodness.iter().all(|g| g.channels.len() == 6));
    for chunk in [5, 4096] {
        let files = BlockFiles::open_with_chunk(dir.path(), chunk).unwrap();
        let streamed = cross_validate(&files, &specs(), 3, &OneAfterAnother, |_, _| {}).unwrap();
        assert_eq!(streamed, memory, "chunks of {chunk} rows");
    }
    // The block with its mask, in memory, passes over the same rows.
    assert_eq!(
        cross_validate(&block, &specs(), 3, &OneAfterAnother, |_, _| {}).unwrap(),
        memory
    );

    // Without trials: contiguous folds.
    std::fs::remove_file(dir.path().join(TRIALS_FILE)).unwrap();
    let files = BlockFiles::open_with_chunk(dir.path(), 7).unwrap();
    let streamed = cross_validate(&files, &specs(), 4, &OneAfterAnother, |_, _| {}).unwrap();
    let no_trials = Block {
        trials: None,
        ..block.valid_only()
    };
    let memory = cross_validate(&no_trials, &specs(), 4, &OneAfterAnother, |_, _| {}).unwrap();
    assert!(!memory.by_trial);
    assert_eq!(streamed, memory);
}

#[test]
fn training_from_files_equals_training_in_memory() {
    let block = block_with_gaps();
    let dir = tempfile::tempdir().unwrap();
    block.write(dir.path()).unwrap();
    let only = block.valid_only();
    let files = BlockFiles::open_with_chunk(dir.path(), 3).unwrap();
    assert_eq!(data_sha256(&files).unwrap(), only.data_sha256());
    let opts = KalmanFitOptions {
        lag_bins: 1,
        ..KalmanFitOptions::default()
    };
    assert_eq!(
        fit_kalman(&files, &opts).unwrap(),
        fit_kalman(&only, &opts).unwrap()
    );
    let w = WienerFitOptions::default();
    assert_eq!(
        fit_wiener(&files, &w).unwrap(),
        fit_wiener(&only, &w).unwrap()
    );
    let pp = PointProcessFitOptions::default();
    let (from_files, _) = fit_point_process(&files, &pp).unwrap();
    let (in_memory, _) = fit_point_process(&only, &pp).unwrap();
    assert_eq!(from_files, in_memory);
    assert_eq!(files.info().n_bins, only.n_bins);
}
