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

/// `b` with the baselines of its even channels raised by `by` counts a bin:
/// the same array on a later day.
fn moved(b: &Block, by: u16) -> Block {
    let n = b.n_channels;
    let mut out = b.clone();
    for (i, c) in out.counts.iter_mut().enumerate() {
        if (i % n) % 2 == 0 {
            *c += by;
        }
    }
    out
}

/// R² of vel_x and vel_y pooled, decoding `test` from each model's start.
fn decoded_r2(model: &decoder_core::decoders::DecoderModel, test: &Block) -> f64 {
    use decoder_core::engine::pipeline::DecodePipeline;
    use decoder_core::fit::metrics::ScoreSums;
    let mut p = DecodePipeline::from_decoder(model, test.bin_width, true).unwrap();
    let kin = test.kinematics.as_ref().unwrap();
    let mut sums = ScoreSums::default();
    for t in 0..test.n_bins {
        let out = p.step(t as u64, test.bin_counts(t));
        for (dim, col) in [2, 3].into_iter().enumerate() {
            sums.add(kin.get(t, col), out.estimate[dim]);
        }
    }
    sums.r2()
}

/// Per-block normalisation: each block keeps its own baselines, the model
/// decodes with the last block's, the tuning is fitted within blocks.
#[test]
fn per_block_normalisation_keeps_the_last_blocks_baselines_and_decodes_it_better() {
    use decoder_core::decoders::DecoderModel;
    let yesterday = block(11, 2.0);
    let today = moved(&block(12, 1.0), 3);
    let later_today = moved(&block(13, 1.0), 3);
    let j = joined(&yesterday, &today);
    let pooled_opts = KalmanFitOptions::default();
    let per_block_opts = KalmanFitOptions {
        per_block: true,
        ..KalmanFitOptions::default()
    };
    let pooled = fit_kalman(&j, &pooled_opts).unwrap().0;
    let per_block = fit_kalman(&j, &per_block_opts).unwrap().0;
    // The offset is today's mean count, exactly.
    assert_eq!(per_block.count_offset, per_block_means(&today, 0));
    let (r2_pooled, r2_per_block) = (
        decoded_r2(&DecoderModel::Kalman(pooled), &later_today),
        decoded_r2(&DecoderModel::Kalman(per_block), &later_today),
    );
    assert!(
        r2_per_block > r2_pooled + 0.05,
        "R² later today: per-block {r2_per_block:.3}, pooled {r2_pooled:.3}"
    );

    // The Wiener filter's intercept absorbs a shift of its inputs'
    // means, so it gains less here; it keeps today's means as its
    // baselines and does not decode worse.
    let wiener = |per_block| {
        fit_wiener(
            &j,
            &WienerFitOptions {
                per_block,
                ..WienerFitOptions::default()
            },
        )
        .unwrap()
    };
    let (w_pooled, w_per_block) = (wiener(false), wiener(true));
    // Over its rows with a full history (taps 5: from the fifth bin).
    assert_eq!(w_per_block.mean_counts, per_block_means(&today, 4));
    let (r2_pooled, r2_per_block) = (
        decoded_r2(&DecoderModel::Wiener(w_pooled), &later_today),
        decoded_r2(&DecoderModel::Wiener(w_per_block), &later_today),
    );
    assert!(
        r2_per_block >= r2_pooled,
        "Wiener R² later today: per-block {r2_per_block:.3}, pooled {r2_pooled:.3}"
    );
}

/// Each channel's mean count over the block's bins from `from`.
fn per_block_means(b: &Block, from: usize) -> Vec<f64> {
    (0..b.n_channels)
        .map(|ch| {
            (from..b.n_bins)
                .map(|t| f64::from(b.bin_counts(t)[ch]))
                .sum::<f64>()
                / (b.n_bins - from) as f64
        })
        .collect()
}

/// On one block, an intercept per block is the one intercept the constant
/// state component already fits (Frisch–Waugh–Lovell): the same model as
/// mean-centred counts, to rounding; and the Wiener filter likewise.
#[test]
fn per_block_normalisation_of_a_single_block_is_the_usual_fit() {
    use decoder_core::fit::kalman::CountNormalisation;
    let b = block(14, 1.5);
    let usual = fit_kalman(
        &b,
        &KalmanFitOptions {
            count_normalisation: CountNormalisation::MeanCentred,
            ..KalmanFitOptions::default()
        },
    )
    .unwrap()
    .0;
    let per_block = fit_kalman(
        &b,
        &KalmanFitOptions {
            per_block: true,
            ..KalmanFitOptions::default()
        },
    )
    .unwrap()
    .0;
    let close = |what: &str, a: &[f64], b: &[f64]| {
        for (i, (x, y)) in a.iter().zip(b).enumerate() {
            assert!(
                (x - y).abs() <= 1e-9 * y.abs() + 1e-11,
                "{what}[{i}]: {x} vs {y}"
            );
        }
    };
    close("H", &per_block.h.data, &usual.h.data);
    close("offset", &per_block.count_offset, &usual.count_offset);
    close("A", &per_block.a.data, &usual.a.data);
    let w = |per_block| {
        fit_wiener(
            &b,
            &WienerFitOptions {
                per_block,
                ..WienerFitOptions::default()
            },
        )
        .unwrap()
    };
    close(
        "Wiener weights",
        &w(true).weights.data,
        &w(false).weights.data,
    );
}

/// Cross-validation with per-block normalisation decodes each held-out
/// segment with its own block's baselines: on two blocks whose baselines
/// differ it scores well above the pooled fit.
#[test]
fn cross_validation_with_per_block_normalisation_uses_each_blocks_baselines() {
    use decoder_core::fit::evaluate::{DecoderSpec, cross_validate};
    use decoder_core::fit::point_process::OneAfterAnother;
    let a = block(15, 1.5);
    let b = moved(&block(16, 1.5), 4);
    let j = joined(&a, &b);
    let score = |per_block| {
        let e = cross_validate(
            &j,
            &[DecoderSpec::Kalman(KalmanFitOptions {
                per_block,
                ..KalmanFitOptions::default()
            })],
            4,
            &OneAfterAnother,
            |_, _| {},
        )
        .unwrap();
        e.decoders[0].mean.iter().map(|s| s.r2).sum::<f64>() / 2.0
    };
    let (pooled, per_block) = (score(false), score(true));
    assert!(
        per_block > pooled + 0.05,
        "cross-validated R²: per-block {per_block:.3}, pooled {pooled:.3}"
    );
}
