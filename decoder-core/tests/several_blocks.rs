//! Several blocks trained as one calibration set (`train --session A
//! --session B`): the blocks' rows are used together, and no row is paired
//! with one across a block's edge — not by a lag, not by a tap, not by a
//! spike-history or coupling term, not by a fold.

use decoder_core::Block;
use decoder_core::fit::folds::FoldPlan;
use decoder_core::fit::kalman::{KalmanFitOptions, fit_kalman, fit_kalman_segments};
use decoder_core::fit::point_process::{ChannelDesigns, HistoryOptions, PointProcessFitOptions};
use decoder_core::fit::wiener::{WienerFitOptions, fit_wiener, fit_wiener_segments};
use decoder_core::formats::block::Trial;
use decoder_core::formats::block_rows::{BlockRows, Joined};
use decoder_core::linalg::Mat;
use decoder_core::sim::reaching::{SimOptions, simulate};

fn block(seed: u64, minutes: f64) -> Block {
    simulate(&SimOptions {
        seed,
        minutes,
        n_channels: 8,
        ..SimOptions::default()
    })
    .unwrap()
    .0
}

/// The two blocks end to end in memory, trials moved along: what a
/// training that ignored the edge would see.
fn concatenated(a: &Block, b: &Block) -> Block {
    let (ka, kb) = (
        a.kinematics.as_ref().unwrap(),
        b.kinematics.as_ref().unwrap(),
    );
    let mut data = ka.data.clone();
    data.extend_from_slice(&kb.data);
    let mut trials = a.trials.clone().unwrap();
    trials.extend(b.trials.clone().unwrap().into_iter().map(|t| Trial {
        start_bin: t.start_bin + a.n_bins,
        end_bin: t.end_bin + a.n_bins,
        ..t
    }));
    Block {
        n_bins: a.n_bins + b.n_bins,
        counts: [a.counts.clone(), b.counts.clone()].concat(),
        kinematics: Some(Mat {
            rows: a.n_bins + b.n_bins,
            cols: ka.cols,
            data,
        }),
        trials: Some(trials),
        ..a.clone()
    }
}

fn joined<'a>(a: &'a Block, b: &'a Block) -> Joined<'a> {
    Joined::new(vec![("a".into(), a), ("b".into(), b)]).unwrap()
}

#[test]
fn kalman_and_wiener_fits_pair_no_rows_across_the_edge() {
    let (a, b) = (block(1, 1.0), block(2, 1.5));
    let j = joined(&a, &b);
    let info = j.info();
    assert_eq!(info.n_bins, a.n_bins + b.n_bins);
    assert_eq!(info.edges, vec![a.n_bins]);
    assert_eq!(
        info.trials.as_ref().unwrap().len(),
        a.trials.as_ref().unwrap().len() + b.trials.as_ref().unwrap().len()
    );
    let c = concatenated(&a, &b);
    let runs = [0..a.n_bins, a.n_bins..c.n_bins];
    let opts = KalmanFitOptions {
        lag_bins: 2,
        ..KalmanFitOptions::default()
    };
    let together = fit_kalman(&j, &opts).unwrap().0;
    // The same as the concatenation fitted as two segments, bit for bit ...
    assert_eq!(together, fit_kalman_segments(&c, &opts, &runs).unwrap().0);
    // ... and not what pairing across the edge gives.
    assert_ne!(together, fit_kalman(&c, &opts).unwrap().0);

    let w = WienerFitOptions {
        taps: 3,
        ..WienerFitOptions::default()
    };
    let together = fit_wiener(&j, &w).unwrap();
    assert_eq!(together, fit_wiener_segments(&c, &w, &runs).unwrap());
    assert_ne!(together, fit_wiener(&c, &w).unwrap());
}

/// The second block's design rows — state, spike history, coupling — are
/// the ones it has on its own: nothing of the first block reaches them.
#[test]
fn point_process_history_and_coupling_start_afresh_at_the_edge() {
    let (a, b) = (block(3, 0.5), block(4, 0.5));
    let j = joined(&a, &b);
    let opts = PointProcessFitOptions {
        history: Some(HistoryOptions {
            n_basis: 3,
            span_bins: 12,
        }),
        coupling: true,
        ..PointProcessFitOptions::default()
    };
    let rows = |source: &dyn BlockRows| {
        let channels: Vec<usize> = (0..8).collect();
        let designs = ChannelDesigns::new(source, &opts, channels).unwrap();
        let mut out: Vec<Vec<(Vec<f64>, f64)>> = vec![Vec::new(); 8];
        designs
            .each_row(&[true; 8], &mut |i, x, y| out[i].push((x.to_vec(), y)))
            .unwrap();
        out
    };
    let (both, alone) = (rows(&j), rows(&b));
    for ch in 0..8 {
        assert_eq!(both[ch].len(), a.n_bins + b.n_bins);
        assert_eq!(both[ch][a.n_bins..], alone[ch][..], "channel {ch}");
    }
    // Without the edge the first rows of the second block would differ.
    let c = concatenated(&a, &b);
    let plain = rows(&c);
    assert_ne!(plain[0][a.n_bins..], alone[0][..]);
}

#[test]
fn folds_cut_at_the_edge_and_blocks_that_differ_are_refused_by_name() {
    let (a, b) = (block(5, 1.0), block(6, 1.0));
    let info = joined(&a, &b).info();
    let edge = a.n_bins;
    let plan = FoldPlan::new(&info, 4).unwrap();
    for segs in plan.held_out.iter().chain(&plan.pieces) {
        for r in segs {
            assert!(!(r.start < edge && r.end > edge), "{r:?} crosses {edge}");
        }
    }
    let other = simulate(&SimOptions {
        seed: 7,
        minutes: 0.5,
        n_channels: 9,
        ..SimOptions::default()
    })
    .unwrap()
    .0;
    let e = Joined::new(vec![("first".into(), &a), ("yesterday".into(), &other)])
        .err()
        .unwrap()
        .to_string();
    assert!(
        e.contains("block 2 (yesterday)") && e.contains("9 channels, not 8"),
        "{e}"
    );
}
