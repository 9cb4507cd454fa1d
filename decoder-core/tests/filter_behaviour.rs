//! How the filters behave over long runs and under the training options.

use decoder_core::decoders::DecoderModel;
use decoder_core::decoders::kalman::{KalmanFilter, ObservationNoise};
use decoder_core::fit::kalman::{
    CountNormalisation, KalmanFitOptions, QForm, SteadyStateOptions, fit_kalman,
};
use decoder_core::fit::metrics::pearson;
use decoder_core::formats::model_file::{ModelFile, Provenance};
use decoder_core::linalg::is_positive_definite;
use decoder_core::session::replay::replay_block;
use decoder_core::sim::reaching::{SimOptions, simulate};

fn opts() -> KalmanFitOptions {
    KalmanFitOptions::default()
}

#[test]
fn covariance_stays_symmetric_positive_definite_over_100k_bins() {
    let (session, _) = simulate(&SimOptions {
        minutes: 2.0,
        n_channels: 48,
        ..SimOptions::default()
    })
    .unwrap();
    let (model, _) = fit_kalman(&session, &opts()).unwrap();
    let mut f = KalmanFilter::new(&model, false).unwrap();
    let d = f.state_dim();
    let k = d - 1; // all but the constant component
    for i in 0..100_000 {
        let bin = i % session.n_bins;
        if i % 50 == 49 {
            f.predict_only();
        } else {
            assert!(f.step(session.bin_counts(bin)));
        }
        if i % 997 == 0 || i == 99_999 {
            let p = f.covariance();
            for r in 0..d {
                for c in 0..d {
                    assert_eq!(p[r * d + c], p[c * d + r], "P asymmetric at bin {i}");
                }
            }
            let block: Vec<f64> = (0..k).flat_map(|r| p[r * d..r * d + k].to_vec()).collect();
            assert!(
                is_positive_definite(&block, k),
                "P lost definiteness at bin {i}: {p:?}"
            );
            assert!(
                p[(d - 1) * d..].iter().all(|v| *v == 0.0),
                "the constant stays exactly known"
            );
        }
    }
}

#[test]
fn steady_state_decoding_converges_to_the_full_filter() {
    let (session, _) = simulate(&SimOptions {
        minutes: 2.0,
        n_channels: 48,
        ..SimOptions::default()
    })
    .unwrap();
    let steady_opts = KalmanFitOptions {
        steady_state: Some(SteadyStateOptions {
            tolerance: 1e-12,
            max_iterations: 10_000,
        }),
        ..opts()
    };
    let (model, report) = fit_kalman(&session, &steady_opts).unwrap();
    assert!(report.steady_state_iterations.unwrap() > 1);
    let mut full = KalmanFilter::new(&model, false).unwrap();
    let mut steady = KalmanFilter::new(&model, true).unwrap();
    assert!(steady.is_steady_state() && !full.is_steady_state());
    let mut late_gap = 0.0f64;
    for t in 0..session.n_bins {
        full.step(session.bin_counts(t));
        steady.step(session.bin_counts(t));
        if t > 1000 {
            for (a, b) in full.state().iter().zip(steady.state()) {
                late_gap = late_gap.max((a - b).abs());
            }
        }
    }
    assert!(
        late_gap < 1e-6,
        "steady-state and full filter differ by {late_gap} after convergence"
    );
}

#[test]
fn velocity_only_layout_decodes() {
    let (cal, _) = simulate(&SimOptions {
        minutes: 5.0,
        n_channels: 64,
        ..SimOptions::default()
    })
    .unwrap();
    let (test, _) = simulate(&SimOptions {
        seed: 9,
        minutes: 1.0,
        n_channels: 64,
        ..SimOptions::default()
    })
    .unwrap();
    let o = KalmanFitOptions {
        state: vec!["vel_x".into(), "vel_y".into(), "1".into()],
        ..opts()
    };
    let (model, _) = fit_kalman(&cal, &o).unwrap();
    let mf = ModelFile {
        input: decoder_core::wire::packet::BinKind::Counts,
        bin_width: decoder_core::BinWidth::from_us(20000).unwrap(),
        decoder: DecoderModel::Kalman(model),
        provenance: Provenance::untracked(),
        click: None,
    };
    let mut p = mf.pipeline().unwrap();
    let (est, faults) = replay_block(&mut p, &test).unwrap();
    assert_eq!(faults, 0);
    let kin = test.kinematics.as_ref().unwrap();
    let truth: Vec<f64> = (0..test.n_bins).map(|t| kin.get(t, 2)).collect();
    let vx: Vec<f64> = (0..test.n_bins).map(|t| est[t * 2]).collect();
    let cc = pearson(&truth, &vx);
    assert!(cc > 0.8, "velocity-only CC {cc}");
}

#[test]
fn physical_coupling_fixes_position_rows() {
    let (session, _) = simulate(&SimOptions {
        minutes: 1.0,
        n_channels: 16,
        ..SimOptions::default()
    })
    .unwrap();
    let (model, _) = fit_kalman(
        &session,
        &KalmanFitOptions {
            physical_coupling: true,
            ..opts()
        },
    )
    .unwrap();
    // pos_x row: 1 on itself, bin width in seconds on vel_x, zero elsewhere.
    assert_eq!(model.a.row(0), &[1.0, 0.0, 0.02, 0.0, 0.0]);
    assert_eq!(model.a.row(1), &[0.0, 1.0, 0.0, 0.02, 0.0]);
    assert_eq!(model.a.row(4), &[0.0, 0.0, 0.0, 0.0, 1.0]);
}

#[test]
fn silent_channel_is_excluded_not_fatal() {
    let (mut session, _) = simulate(&SimOptions {
        minutes: 1.0,
        n_channels: 16,
        ..SimOptions::default()
    })
    .unwrap();
    for t in 0..session.n_bins {
        session.counts[t * 16 + 3] = 0;
    }
    for q_form in [QForm::Full, QForm::Diagonal] {
        for norm in [CountNormalisation::None, CountNormalisation::ZScored] {
            let (model, report) = fit_kalman(
                &session,
                &KalmanFitOptions {
                    q_form,
                    count_normalisation: norm,
                    ..opts()
                },
            )
            .unwrap();
            assert_eq!(report.excluded_channels, vec![3]);
            assert!(model.h.row(3).iter().all(|v| *v == 0.0));
            // A spike on the silent channel later must not move the estimate.
            let mut f = KalmanFilter::new(&model, false).unwrap();
            let mut g = f.clone();
            let mut bin = session.bin_counts(10).to_vec();
            f.step(&bin);
            bin[3] = 9;
            g.step(&bin);
            assert_eq!(f.state(), g.state());
        }
    }
}

#[test]
fn diagonal_q_stores_only_the_diagonal() {
    let (session, _) = simulate(&SimOptions {
        minutes: 1.0,
        n_channels: 16,
        ..SimOptions::default()
    })
    .unwrap();
    let (model, _) = fit_kalman(
        &session,
        &KalmanFitOptions {
            q_form: QForm::Diagonal,
            ..opts()
        },
    )
    .unwrap();
    let (full, _) = fit_kalman(&session, &opts()).unwrap();
    let (ObservationNoise::Diagonal(d), ObservationNoise::Full(q)) = (&model.q, &full.q) else {
        panic!()
    };
    for (i, v) in d.iter().enumerate() {
        assert!(
            (v - q.get(i, i)).abs() < 1e-9 * v.abs(),
            "diagonal Q differs at {i}"
        );
    }
}

#[test]
fn replaying_twice_is_bit_identical() {
    let (mf, session) = decoder_core::sim::model::simulated_kalman(
        &SimOptions {
            minutes: 1.0,
            n_channels: 32,
            ..SimOptions::default()
        },
        &opts(),
    )
    .unwrap();
    let mut a = mf.pipeline().unwrap();
    let mut b = mf.pipeline().unwrap();
    let (ea, _) = replay_block(&mut a, &session).unwrap();
    // b is fed bin by bin, as the daemon does.
    let mut eb = Vec::new();
    for t in 0..session.n_bins {
        eb.extend_from_slice(b.step(t as u64, session.bin_counts(t)).estimate);
    }
    let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
    assert_eq!(bits(&ea), bits(&eb));
}

#[test]
fn lag_pairs_counts_with_later_kinematics() {
    // Delay the kinematics by 3 bins: counts of bin t now belong with the
    // kinematics of bin t + 3. A lag-3 fit of the delayed block must see
    // exactly the observation pairs of a lag-0 fit of the original.
    let (orig, _) = simulate(&SimOptions {
        minutes: 1.0,
        n_channels: 16,
        ..SimOptions::default()
    })
    .unwrap();
    let mut delayed = orig.clone();
    let kin = delayed.kinematics.as_mut().unwrap();
    let src = orig.kinematics.as_ref().unwrap();
    for t in 3..kin.rows {
        kin.data[t * kin.cols..(t + 1) * kin.cols].copy_from_slice(src.row(t - 3));
    }
    let n = orig.n_bins;
    let (plain, _) = decoder_core::fit::kalman::fit_kalman_segments(
        &orig,
        &opts(),
        std::slice::from_ref(&(0..n - 3)),
    )
    .unwrap();
    let (lagged, _) = fit_kalman(
        &delayed,
        &KalmanFitOptions {
            lag_bins: 3,
            ..opts()
        },
    )
    .unwrap();
    assert_eq!(plain.h, lagged.h);
    assert_eq!(plain.q, lagged.q);
}
