//! The decoder checked against reference libraries outside the project.
//! Each test names its reference; fixtures come from
//! tests/reference/make_fixtures.py (pinned versions beside them).

use cross_checks::{assert_close, fixture, fixture_counts, fixture_json, reference_dir};
use decoder_core::decoders::kalman::steady::steady_state_gain;
use decoder_core::decoders::kalman::{KalmanFilter, KalmanModel, ObservationNoise};
use decoder_core::fit::kalman::{CountNormalisation, KalmanFitOptions, fit_kalman};
use decoder_core::fit::metrics;
use decoder_core::formats::block::Block;
use decoder_core::linalg::Mat;

fn mat(name: &str) -> Mat {
    let (shape, data) = fixture(name);
    match shape.as_slice() {
        [r, c] => Mat {
            rows: *r,
            cols: *c,
            data,
        },
        [n] => Mat {
            rows: *n,
            cols: 1,
            data,
        },
        other => panic!("{name}: shape {other:?}"),
    }
}

fn block() -> Block {
    Block::read(&reference_dir().join("block")).expect("the numpy-written block imports")
}

/// The model fitted by numpy, loaded as a KalmanModel.
fn numpy_model(fit: &str, state: &[&str], outputs: &[&str]) -> KalmanModel {
    numpy_model_from(&format!("wu2006_{fit}"), state, outputs)
}

/// The model numpy fitted into `{stem}_A.npy`, `{stem}_W.npy`, ….
fn numpy_model_from(stem: &str, state: &[&str], outputs: &[&str]) -> KalmanModel {
    let p = |k: &str| format!("{stem}_{k}.npy");
    KalmanModel {
        state: state.iter().map(|s| s.to_string()).collect(),
        outputs: outputs.iter().map(|s| s.to_string()).collect(),
        a: mat(&p("A")),
        w: mat(&p("W")),
        h: mat(&p("H")),
        q: ObservationNoise::Full(mat(&p("Q"))),
        x0: fixture(&p("x0")).1,
        p0: mat(&p("P0")),
        count_offset: fixture(&p("offset")).1,
        count_scale: fixture(&p("scale")).1,
        steady: None,
    }
}

const FULL_STATE: [&str; 5] = ["pos_x", "pos_y", "vel_x", "vel_y", "1"];

fn options(state: &[&str], ridge: f64, norm: CountNormalisation) -> KalmanFitOptions {
    KalmanFitOptions {
        state: state.iter().map(|s| s.to_string()).collect(),
        outputs: vec!["vel_x".into(), "vel_y".into()],
        ridge,
        count_normalisation: norm,
        ..KalmanFitOptions::default()
    }
}

/// Absolute tolerance of the least-squares fits: entries are O(1e-3..1e2),
/// and a rounding difference of a few ulps of the largest sums in the
/// normal equations stays below this.
const FIT_ATOL: f64 = 1e-10;

fn assert_fit_matches(fit: &str, model: &KalmanModel, tol: f64) {
    assert_fit_matches_from(&format!("wu2006_{fit}"), model, tol)
}

fn assert_fit_matches_from(stem: &str, model: &KalmanModel, tol: f64) {
    let fit = stem;
    let want = numpy_model_from(stem, &[], &[]);
    assert_close(
        &format!("{fit} A"),
        &model.a.data,
        &want.a.data,
        tol,
        FIT_ATOL,
    );
    assert_close(
        &format!("{fit} W"),
        &model.w.data,
        &want.w.data,
        tol,
        FIT_ATOL,
    );
    assert_close(
        &format!("{fit} H"),
        &model.h.data,
        &want.h.data,
        tol,
        FIT_ATOL,
    );
    let ObservationNoise::Full(q) = &model.q else {
        panic!("full Q expected")
    };
    let ObservationNoise::Full(want_q) = &want.q else {
        unreachable!()
    };
    assert_close(&format!("{fit} Q"), &q.data, &want_q.data, tol, FIT_ATOL);
    assert_close(&format!("{fit} x0"), &model.x0, &want.x0, tol, FIT_ATOL);
    assert_close(
        &format!("{fit} P0"),
        &model.p0.data,
        &want.p0.data,
        tol,
        FIT_ATOL,
    );
    assert_close(
        &format!("{fit} offset"),
        &model.count_offset,
        &want.count_offset,
        tol,
        FIT_ATOL,
    );
    assert_close(
        &format!("{fit} scale"),
        &model.count_scale,
        &want.count_scale,
        tol,
        FIT_ATOL,
    );
}

/// Reference: numpy.linalg.lstsq applied to the least-squares formulas of
/// Wu et al. 2006 (A = X2 X1ᵀ (X1 X1ᵀ)⁻¹, H = Y Xᵀ (X Xᵀ)⁻¹, W and Q the
/// residual covariances), no penalty, raw counts.
#[test]
fn training_without_ridge_equals_numpy_least_squares() {
    let (model, _) = fit_kalman(
        &block(),
        &options(&FULL_STATE, 0.0, CountNormalisation::None),
    )
    .unwrap();
    assert_fit_matches("plain", &model, 1e-9);
}

/// Reference: numpy.linalg.lstsq on the ridge-augmented system (rows √λ·I,
/// constant unpenalised), with z-scored counts.
#[test]
fn training_with_ridge_and_z_scoring_equals_numpy_least_squares() {
    let (model, _) = fit_kalman(
        &block(),
        &options(&FULL_STATE, 5.0, CountNormalisation::ZScored),
    )
    .unwrap();
    assert_fit_matches("ridge_z", &model, 1e-9);
}

/// Reference: numpy least squares, velocity-only state with no constant and
/// mean-centred counts.
#[test]
fn velocity_only_training_equals_numpy_least_squares() {
    let (model, _) = fit_kalman(
        &block(),
        &options(&["vel_x", "vel_y"], 0.0, CountNormalisation::MeanCentred),
    )
    .unwrap();
    assert_fit_matches("velocity_only", &model, 1e-9);
}

/// Reference: filterpy.kalman.KalmanFilter (predict, then update, every bin)
/// run with the same A, W, H, Q, x0, P0.
#[test]
fn decoded_states_equal_filterpy_to_1e9() {
    let session = block();
    let model = numpy_model("plain", &FULL_STATE, &["vel_x", "vel_y"]);
    let mut filter = KalmanFilter::new(&model, false).unwrap();
    let mut states = Vec::with_capacity(session.n_bins * 5);
    for t in 0..session.n_bins {
        assert!(filter.step(session.bin_counts(t)));
        states.extend_from_slice(filter.state());
    }
    let (_, want) = fixture("filterpy_states.npy");
    // The constant component is exactly 1 in both; compare the kinematics.
    let kin = |v: &[f64]| {
        v.chunks(5)
            .flat_map(|c| c[..4].to_vec())
            .collect::<Vec<f64>>()
    };
    assert_close(
        "filtered states vs filterpy",
        &kin(&states),
        &kin(&want),
        1e-9,
        1e-9,
    );
}

/// Reference: scipy.linalg.solve_discrete_are for the a-priori covariance,
/// K = P⁻Hᵀ(HP⁻Hᵀ + Q)⁻¹.
#[test]
fn steady_state_gain_equals_scipy_dare() {
    let model = numpy_model("velocity_only", &["vel_x", "vel_y"], &["vel_x", "vel_y"]);
    let steady = steady_state_gain(&model, 1e-13, 100_000).unwrap();
    let (_, want) = fixture("dare_gain.npy");
    assert_close(
        "steady-state gain vs scipy DARE",
        &steady.gain.data,
        &want,
        1e-9,
        1e-12,
    );
}

/// References: scipy.stats.pearsonr, sklearn.metrics.r2_score, and RMSE as
/// numpy.sqrt(numpy.mean((a - b)**2)).
#[test]
fn metrics_equal_scipy_and_sklearn() {
    let (_, truth) = fixture("metrics_truth.npy");
    let (_, est) = fixture("metrics_estimate.npy");
    let want = fixture_json("metrics.json");
    let s = metrics::scores(&truth, &est);
    let check = |what: &str, got: f64, key: &str| {
        let w = want[key].as_f64().unwrap();
        assert!(
            (got - w).abs() <= 1e-12 * w.abs().max(1.0),
            "{what}: {got} vs {key} {w}"
        );
    };
    check("CC", s.cc, "pearsonr");
    check("R²", s.r2, "r2_score");
    check("RMSE", s.rmse, "rmse");
}

/// Poisson GLM encoding models against statsmodels 0.15.0
/// `GLM(y, add_constant(X), family=Poisson()).fit()` (IRLS) on the same
/// design, for three channels of the numpy-written block: velocity only
/// (the LNP form), and with own-history columns. The raised-cosine basis
/// (Pillow et al. 2008) and the history columns are checked first against
/// the fixture script's independent numpy code.
#[test]
fn poisson_glms_match_statsmodels_without_and_with_history() {
    use decoder_core::decoders::history_basis::RaisedCosineBasis;
    use decoder_core::fit::glm::{GlmFitOptions, fit_poisson};
    let s = block();
    let kin = s.kinematics.as_ref().unwrap();
    let (vx, vy) = (
        s.kinematic_index("vel_x").unwrap(),
        s.kinematic_index("vel_y").unwrap(),
    );
    let basis = RaisedCosineBasis::new(4, 10);
    assert_close(
        "raised-cosine basis vs numpy",
        &basis.weights.data,
        &fixture("glm_basis.npy").1,
        1e-12,
        1e-15,
    );
    for c in [0usize, 5, 11] {
        let y: Vec<f64> = (0..s.n_bins)
            .map(|t| f64::from(s.bin_counts(t)[c]))
            .collect();
        let mut lnp = Mat::zeros(s.n_bins, 2);
        let mut hist = Mat::zeros(s.n_bins, 2 + 4);
        let mut h = [0.0; 4];
        for t in 0..s.n_bins {
            for (j, col) in [vx, vy].into_iter().enumerate() {
                lnp.set(t, j, kin.get(t, col));
                hist.set(t, j, kin.get(t, col));
            }
            basis.covariates(&y, t, &mut h);
            for (j, v) in h.iter().enumerate() {
                hist.set(t, 2 + j, *v);
            }
        }
        assert_close(
            &format!("channel {c}: history design vs numpy"),
            &hist.data,
            &fixture(&format!("glm_history_design_{c}.npy")).1,
            1e-12,
            1e-12,
        );
        // Both IRLS runs to convergence at machine precision, so the
        // coefficients can be compared at 1e-8.
        let opts = GlmFitOptions {
            tolerance: 1e-13,
            max_iterations: 200,
            ..GlmFitOptions::default()
        };
        let fit = fit_poisson(&lnp, &y, &opts).unwrap();
        assert!(fit.converged);
        assert_close(
            &format!("channel {c}: LNP coefficients vs statsmodels"),
            &fit.coefficients,
            &fixture(&format!("glm_lnp_coef_{c}.npy")).1,
            1e-8,
            1e-10,
        );
        let fit = fit_poisson(&hist, &y, &opts).unwrap();
        assert!(fit.converged);
        assert_close(
            &format!("channel {c}: history-GLM coefficients vs statsmodels"),
            &fit.coefficients,
            &fixture(&format!("glm_history_coef_{c}.npy")).1,
            1e-8,
            1e-10,
        );
        assert_close(
            &format!("channel {c}: deviance vs statsmodels"),
            &[fit.deviance],
            &fixture(&format!("glm_history_deviance_{c}.npy")).1,
            1e-10,
            0.0,
        );
    }
}

/// One point-process filter step (Eden et al. 2004) against the same step
/// written out in numpy from the equations (the fixture script).
#[test]
fn point_process_step_matches_the_eden_equations_in_numpy() {
    use decoder_core::decoders::point_process::{
        ChannelGlm, PointProcessFilter, PointProcessModel,
    };
    let beta = mat("eden_beta.npy");
    let b0 = fixture("eden_b0.npy").1;
    let channels = (0..beta.rows)
        .map(|c| {
            Some(ChannelGlm {
                b0: b0[c],
                beta: beta.row(c).to_vec(),
                history: Vec::new(),
                coupling: Vec::new(),
                deviance: 0.0,
                null_deviance: 0.0,
                iterations: 0,
            })
        })
        .collect();
    let model = PointProcessModel {
        state: vec!["vel_x".into(), "vel_y".into()],
        outputs: vec!["vel_x".into(), "vel_y".into()],
        a: mat("eden_A.npy"),
        w: mat("eden_W.npy"),
        x0: fixture("eden_x.npy").1,
        p0: mat("eden_P.npy"),
        channels,
        excluded: Vec::new(),
        history_basis: None,
    };
    let mut f = PointProcessFilter::new(&model).unwrap();
    let counts: Vec<u16> = fixture("eden_counts.npy")
        .1
        .iter()
        .map(|&c| c as u16)
        .collect();
    assert!(f.step(&counts));
    assert_close(
        "posterior state vs numpy",
        f.state(),
        &fixture("eden_x_post.npy").1,
        1e-12,
        1e-14,
    );
    assert_close(
        "posterior covariance vs numpy",
        f.covariance(),
        &fixture("eden_P_post.npy").1,
        1e-12,
        1e-14,
    );
}

/// Time-rescaled intervals (Brown et al. 2002; intensity constant within a
/// bin, spikes at uniform positions in it) against the fixture script's
/// numpy, and the KS
/// statistic against scipy.stats.kstest(u, "uniform") on them.
#[test]
fn time_rescaling_and_ks_match_numpy_and_scipy() {
    use decoder_core::fit::goodness::{ks_uniform, rescaled_intervals};
    let s = block();
    let meta = fixture_json("gof.json");
    let c = meta["channel"].as_u64().unwrap() as usize;
    let counts: Vec<u16> = (0..s.n_bins).map(|t| s.bin_counts(t)[c]).collect();
    let expected = fixture("gof_expected.npy").1;
    let uniforms = fixture("gof_uniforms.npy").1;
    let mut next = uniforms.iter().copied();
    let u = rescaled_intervals(&expected, &counts, || next.next().expect("enough uniforms"));
    assert_close(
        "rescaled intervals vs numpy",
        &u,
        &fixture("gof_intervals.npy").1,
        1e-12,
        1e-14,
    );
    let ks = ks_uniform(&u);
    assert_close(
        "KS statistic vs scipy.stats.kstest",
        &[ks],
        &[meta["ks_statistic"].as_f64().unwrap()],
        1e-12,
        0.0,
    );
}

/// Counts drawn from a known Poisson GLM at 20 ms bins (numpy) and each
/// channel's fit by statsmodels' `GLM(family=Poisson)`: a correctly
/// specified model passes the time-rescaling KS test at its 95 % band
/// (Brown et al. 2002) for about 95 % of channels, so at least 90 % must
/// pass on average over the seeds, under the true and under the fitted
/// rates. The rule for bins with more than one spike decides this: the
/// older sub-bin split passed none.
#[test]
fn goodness_of_fit_passes_correct_poisson_glms_fitted_by_statsmodels() {
    use decoder_core::fit::goodness::channel_fit;
    let seeds = [11, 12, 13];
    let (mut within_true, mut within_fitted, mut total, mut multi) = (0, 0, 0, 0u64);
    for seed in seeds {
        let (shape, counts) = fixture_counts(&format!("gof_glm_counts_{seed}.npy"));
        let (t, n) = (shape[0], shape[1]);
        let vel = fixture(&format!("gof_glm_velocity_{seed}.npy")).1;
        let rates = |coef: &[f64], ch: usize| -> Vec<f64> {
            let c = &coef[ch * 3..ch * 3 + 3];
            (0..t)
                .map(|k| (c[0] + c[1] * vel[2 * k] + c[2] * vel[2 * k + 1]).exp())
                .collect()
        };
        let truth = fixture(&format!("gof_glm_true_coef_{seed}.npy")).1;
        let fitted = fixture(&format!("gof_glm_fitted_coef_{seed}.npy")).1;
        for ch in 0..n {
            let y: Vec<u16> = (0..t).map(|k| counts[k * n + ch]).collect();
            let under_truth = channel_fit(ch, &rates(&truth, ch), &y);
            let under_fit = channel_fit(ch, &rates(&fitted, ch), &y);
            multi += under_truth.multi_spike_bins;
            within_true += usize::from(under_truth.within_band);
            within_fitted += usize::from(under_fit.within_band);
            total += 1;
        }
    }
    eprintln!(
        "within the KS band: {within_true} of {total} (true rates), {within_fitted} of {total} (statsmodels fits); {multi} bins with more than one spike"
    );
    assert!(
        multi > 1000,
        "the blocks must have bins with several spikes"
    );
    let share = |k: usize| k as f64 / total as f64;
    assert!(
        share(within_true) >= 0.9,
        "true rates: {within_true} of {total} channels within the band"
    );
    assert!(
        share(within_fitted) >= 0.9,
        "statsmodels fits: {within_fitted} of {total} channels within the band"
    );
}

/// The Wiener filter's weights against scikit-learn 1.9.1
/// `Ridge(alpha=5, fit_intercept=True, solver="cholesky")` on the same
/// lagged design (3 taps: the current bin and two back), intercept first.
#[test]
fn wiener_weights_equal_sklearn_ridge_on_the_lagged_design() {
    use decoder_core::fit::wiener::{WienerFitOptions, fit_wiener};
    let m = fit_wiener(
        &block(),
        &WienerFitOptions {
            outputs: vec!["vel_x".into(), "vel_y".into()],
            taps: 3,
            lag_bins: 0,
            ridge: 5.0,
            per_block: false,
        },
    )
    .unwrap();
    let want = mat("wiener_sklearn_weights.npy");
    assert_eq!((m.weights.rows, m.weights.cols), (want.rows, want.cols));
    assert_close(
        "Wiener weights vs sklearn Ridge",
        &m.weights.data,
        &want.data,
        1e-9,
        1e-12,
    );
}

/// Intention re-estimation against the rule of Gilja et al. 2012 written
/// out in numpy by the fixture script: within a trial, velocity turned
/// toward the target with its speed kept, zero within the radius; outside
/// trials, as decoded.
#[test]
fn intention_reestimation_equals_the_rule_in_numpy() {
    use decoder_core::fit::intention::reestimate_intention;
    use decoder_core::formats::block::Trial;
    let kin = mat("intention_kinematics.npy");
    let trials = mat("intention_trials.npy");
    let n_bins = kin.rows;
    let block = Block {
        input: decoder_core::wire::packet::BinKind::Counts,
        features: Vec::new(),
        bin_width: decoder_core::BinWidth::from_us(20_000).unwrap(),
        n_bins,
        n_channels: 1,
        counts: vec![0; n_bins],
        kinematic_names: ["pos_x", "pos_y", "vel_x", "vel_y"]
            .map(String::from)
            .to_vec(),
        kinematics: Some(kin),
        trials: Some(
            (0..trials.rows)
                .map(|k| Trial {
                    trial: k as u32,
                    start_bin: trials.get(k, 0) as usize,
                    end_bin: trials.get(k, 1) as usize,
                    target_x: trials.get(k, 2),
                    target_y: trials.get(k, 3),
                })
                .collect(),
        ),
        channel_labels: None,
        valid: None,
        notes: None,
        click: None,
    };
    let (refit, counted) = reestimate_intention(&block, 1.0).unwrap();
    assert!(
        counted.zeroed > 0 && counted.rotated > 0 && counted.untouched > 0,
        "{counted:?}"
    );
    let got = refit.kinematics.unwrap();
    let vel: Vec<f64> = (0..n_bins)
        .flat_map(|t| [got.get(t, 2), got.get(t, 3)])
        .collect();
    assert_close(
        "re-estimated velocity vs numpy",
        &vel,
        &fixture("intention_velocity.npy").1,
        1e-12,
        1e-14,
    );
}

/// Runs the Kalman decoder over the reference block's raw counts.
fn decode_block(model: &KalmanModel, steady: bool) -> Vec<Vec<f64>> {
    let session = block();
    let mut filter = KalmanFilter::new(model, steady).unwrap();
    (0..session.n_bins)
        .map(|t| {
            assert!(filter.step(session.bin_counts(t)));
            filter.state().to_vec()
        })
        .collect()
}

/// The first `k` components of each state from bin `from` on, flattened.
fn components(states: &[Vec<f64>], k: usize, from: usize) -> Vec<f64> {
    states[from..]
        .iter()
        .flat_map(|x| x[..k].to_vec())
        .collect()
}

fn fixture_states(name: &str, d: usize) -> Vec<Vec<f64>> {
    fixture(name).1.chunks(d).map(<[f64]>::to_vec).collect()
}

/// filterpy 2.0.0 `KalmanFilter` with R the diagonal of the plain fit's Q:
/// the decoder's diagonal-noise path (one reciprocal per channel).
#[test]
fn the_diagonal_noise_path_equals_filterpy() {
    let mut model = numpy_model("plain", &FULL_STATE, &["vel_x", "vel_y"]);
    let ObservationNoise::Full(q) = &model.q else {
        unreachable!()
    };
    let n = q.rows;
    model.q = ObservationNoise::Diagonal((0..n).map(|i| q.get(i, i)).collect());
    let got = decode_block(&model, false);
    let want = fixture_states("filterpy_diagonal_states.npy", 5);
    assert_close(
        "diagonal-Q states vs filterpy",
        &components(&got, 4, 0),
        &components(&want, 4, 0),
        1e-9,
        1e-9,
    );
}

/// filterpy on counts z-scored with the fit's offsets and scales, against
/// the decoder, which folds the normalisation into its observation terms.
#[test]
fn the_z_scored_path_equals_filterpy_on_z_scored_counts() {
    let model = numpy_model("ridge_z", &FULL_STATE, &["vel_x", "vel_y"]);
    let got = decode_block(&model, false);
    let want = fixture_states("filterpy_zscored_states.npy", 5);
    assert_close(
        "z-scored states vs filterpy",
        &components(&got, 4, 0),
        &components(&want, 4, 0),
        1e-9,
        1e-9,
    );
}

/// The steady-state decoder (fixed gain, Malik et al. 2011) against
/// filterpy's time-varying filter on the same mean-centred counts, once
/// the time-varying gain has settled (from bin 300 on): the two filters
/// are then the same linear recursion.
#[test]
fn the_steady_state_path_equals_filterpy_once_the_gain_has_settled() {
    let mut model = numpy_model("velocity_only", &["vel_x", "vel_y"], &["vel_x", "vel_y"]);
    model.steady = Some(steady_state_gain(&model, 1e-13, 100_000).unwrap());
    let steady = decode_block(&model, true);
    let full = decode_block(&model, false);
    let want = fixture_states("filterpy_velocity_only_states.npy", 2);
    // The full filter equals filterpy from the first bin ...
    assert_close(
        "velocity-only states vs filterpy",
        &components(&full, 2, 0),
        &components(&want, 2, 0),
        1e-9,
        1e-9,
    );
    // ... and the steady-state filter once the gain has converged.
    assert_close(
        "steady-state states vs filterpy after bin 300",
        &components(&steady, 2, 300),
        &components(&want, 2, 300),
        1e-9,
        1e-9,
    );
}

/// What online adaptation fits per point-process channel: a Poisson GLM
/// with the history drive held as a fixed offset. Reference: statsmodels
/// `GLM(family=Poisson(), offset=...)`, both run to convergence.
#[test]
fn poisson_fit_with_an_offset_matches_statsmodels() {
    use decoder_core::fit::adapt::poisson_with_offset;
    let s = block();
    let kin = s.kinematics.as_ref().unwrap();
    let (vx, vy) = (
        s.kinematic_index("vel_x").unwrap(),
        s.kinematic_index("vel_y").unwrap(),
    );
    let y: Vec<f64> = (0..s.n_bins)
        .map(|t| f64::from(s.bin_counts(t)[5]))
        .collect();
    let x = nalgebra::DMatrix::from_fn(s.n_bins, 3, |t, j| match j {
        0 => 1.0,
        1 => kin.get(t, vx),
        _ => kin.get(t, vy),
    });
    let offset = fixture("glm_offset_offset.npy").1;
    let got = poisson_with_offset(&x, &y, &offset, &[0.0, 0.0, 0.0], 0.0).unwrap();
    assert_close(
        "offset GLM coefficients vs statsmodels",
        &got,
        &fixture("glm_offset_coef.npy").1,
        1e-8,
        1e-10,
    );
}

/// The click decoder (Kim et al. 2011: a linear discriminant beside the
/// velocity decoder, filtered by a two-state hidden Markov model) against
/// scikit-learn's `LinearDiscriminantAnalysis(solver="lsqr",
/// shrinkage=0.1)` on the same lagged counts — coefficients, intercept and
/// every bin's posterior — and against the forward recursion (Rabiner
/// 1989) written out in numpy over those posteriors, with the label
/// sequence's transitions.
#[test]
fn click_decoder_equals_sklearn_lda_and_the_numpy_forward_recursion() {
    use decoder_core::decoders::click::{ClickFilter, logistic};
    use decoder_core::fit::click::{fit_click, lagged_rows};
    let (shape, counts) = fixture_counts("click_counts.npy");
    let (t, n) = (shape[0], shape[1]);
    let labels: Vec<bool> = fixture("click_labels.npy")
        .1
        .iter()
        .map(|&l| l > 0.5)
        .collect();
    let model = fit_click(&counts, n, &labels, 3, 0.1).unwrap();
    // The lsqr solve and ours sum in different orders: agreement to
    // about 1e-12 relative (the weights: 1.8e-13 at worst, measured).
    assert_close(
        "click weights vs sklearn coef_",
        &model.weights,
        &fixture("click_lda_coef.npy").1,
        1e-9,
        1e-12,
    );
    assert_close(
        "click intercept vs sklearn intercept_",
        &[model.intercept],
        &fixture("click_lda_intercept.npy").1,
        1e-9,
        1e-12,
    );
    let (x, _) = lagged_rows(&counts, n, &labels, 3);
    let posteriors: Vec<f64> = x
        .iter()
        .map(|r| {
            logistic(
                model.intercept
                    + r.iter()
                        .zip(&model.weights)
                        .map(|(a, b)| a * b)
                        .sum::<f64>(),
            )
        })
        .collect();
    assert_close(
        "click posteriors vs sklearn predict_proba",
        &posteriors,
        &fixture("click_lda_proba.npy").1,
        1e-9,
        1e-12,
    );
    assert_close(
        "click transitions vs numpy",
        &[model.stay_rest, model.stay_click],
        &fixture("click_transitions.npy").1,
        1e-15,
        0.0,
    );
    let mut filter = ClickFilter::new(model).unwrap();
    let forward: Vec<f64> = (0..t)
        .map(|b| filter.step(&counts[b * n..(b + 1) * n]))
        .collect();
    assert_close(
        "filtered click probability vs the numpy forward recursion",
        &forward,
        &fixture("click_forward.npy").1,
        1e-9,
        1e-12,
    );
    // The area under the ROC curve, as sklearn.metrics.roc_auc_score
    // computes it, on the numpy forward probabilities.
    let auc = decoder_core::fit::click::roc_auc(&fixture("click_forward.npy").1, &labels);
    assert_close(
        "click AUC vs sklearn roc_auc_score",
        &[auc],
        &fixture("click_auc.npy").1,
        1e-12,
        0.0,
    );
}

/// Two blocks of one array whose baselines moved between them
/// (`blocks/a`, `blocks/b`), joined as `train --session a --session b`
/// joins them, with per-block normalisation.
fn per_block_fit(options: KalmanFitOptions) -> KalmanModel {
    use decoder_core::formats::block_rows::{BlockRows, Joined};
    let dir = reference_dir().join("blocks");
    let a = Block::read(&dir.join("a")).expect("block a imports");
    let b = Block::read(&dir.join("b")).expect("block b imports");
    let joined = Joined::new(vec![
        ("a".into(), &a as &(dyn BlockRows + Sync)),
        ("b".into(), &b as &(dyn BlockRows + Sync)),
    ])
    .unwrap();
    fit_kalman(
        &joined,
        &KalmanFitOptions {
            per_block: true,
            ..options
        },
    )
    .unwrap()
    .0
}

fn assert_per_block_matches(fit: &str, model: &KalmanModel) {
    let p = |k: &str| format!("per_block_{fit}_{k}.npy");
    assert_close(
        &format!("per-block {fit} H"),
        &model.h.data,
        &mat(&p("H")).data,
        1e-9,
        FIT_ATOL,
    );
    let ObservationNoise::Full(q) = &model.q else {
        panic!("full Q expected")
    };
    assert_close(
        &format!("per-block {fit} Q"),
        &q.data,
        &mat(&p("Q")).data,
        1e-9,
        FIT_ATOL,
    );
    assert_close(
        &format!("per-block {fit} offset"),
        &model.count_offset,
        &fixture(&p("offset")).1,
        1e-12,
        1e-12,
    );
    assert_close(
        &format!("per-block {fit} scale"),
        &model.count_scale,
        &fixture(&p("scale")).1,
        1e-12,
        1e-12,
    );
}

/// Reference: numpy.linalg.lstsq of the counts on the state and one
/// indicator column per block (least squares with an intercept per block),
/// raw counts, no penalty. H's constant column is the last block's
/// intercept less its mean count, since the model subtracts that mean.
#[test]
fn per_block_normalisation_equals_numpy_least_squares_with_an_intercept_per_block() {
    let model = per_block_fit(options(&FULL_STATE, 0.0, CountNormalisation::None));
    assert_per_block_matches("plain", &model);
}

/// Reference: the same with each block's counts divided by that block's
/// standard deviation, and the ridge (rows √λ·I on the kinematics only).
#[test]
fn per_block_z_scoring_with_a_ridge_equals_numpy_least_squares() {
    let model = per_block_fit(options(&FULL_STATE, 5.0, CountNormalisation::ZScored));
    assert_per_block_matches("ridge_z", &model);
}

/// Reference: numpy.linalg.lstsq of velocity on each block's lagged counts
/// (3 taps, rows from the block's first full history) and one indicator per
/// block, ridge rows √5·I on the weights; the last block's intercept first.
#[test]
fn per_block_wiener_weights_equal_numpy_least_squares_with_an_intercept_per_block() {
    use decoder_core::fit::wiener::{WienerFitOptions, fit_wiener};
    use decoder_core::formats::block_rows::{BlockRows, Joined};
    let dir = reference_dir().join("blocks");
    let a = Block::read(&dir.join("a")).unwrap();
    let b = Block::read(&dir.join("b")).unwrap();
    let joined = Joined::new(vec![
        ("a".into(), &a as &(dyn BlockRows + Sync)),
        ("b".into(), &b as &(dyn BlockRows + Sync)),
    ])
    .unwrap();
    let m = fit_wiener(
        &joined,
        &WienerFitOptions {
            taps: 3,
            ridge: 5.0,
            per_block: true,
            ..WienerFitOptions::default()
        },
    )
    .unwrap();
    let want = mat("per_block_wiener_weights.npy");
    assert_eq!((m.weights.rows, m.weights.cols), (want.rows, want.cols));
    assert_close(
        "per-block Wiener weights vs numpy",
        &m.weights.data,
        &want.data,
        1e-9,
        1e-12,
    );
}

/// A block of continuous features (features.npy, float32): the Kalman fit
/// equals numpy least squares on the same features (Wu et al. 2006, the
/// 'plain' settings), and the daemon's decode path for features — the
/// model file's pipeline, one bin at a time — equals
/// filterpy.kalman.KalmanFilter run over them with numpy's parameters.
#[test]
fn features_train_and_decode_as_numpy_and_filterpy_do() {
    use decoder_core::decoders::DecoderModel;
    use decoder_core::formats::model_file::{ModelFile, Provenance};
    use decoder_core::wire::packet::{BinKind, BinValues};
    let session = Block::read(&reference_dir().join("features_block")).unwrap();
    assert_eq!(session.input, BinKind::Features);
    let (model, _) = fit_kalman(
        &session,
        &options(&FULL_STATE, 0.0, CountNormalisation::None),
    )
    .unwrap();
    assert_fit_matches_from("features_wu2006", &model, 1e-9);

    let numpy = numpy_model_from("features_wu2006", &FULL_STATE, &["vel_x", "vel_y"]);
    let file = ModelFile {
        bin_width: session.bin_width,
        decoder: DecoderModel::Kalman(numpy),
        provenance: Provenance::untracked(),
        click: None,
        input: BinKind::Features,
    };
    let mut pipeline = file.pipeline_with(false).unwrap();
    let mut got = Vec::with_capacity(2 * session.n_bins);
    for t in 0..session.n_bins {
        let BinValues::Features(f) = session.bin_values(t) else {
            unreachable!()
        };
        got.extend_from_slice(pipeline.step_features(t as u64, f).estimate);
    }
    let (_, states) = fixture("features_filterpy_states.npy");
    let want: Vec<f64> = states.chunks(5).flat_map(|s| s[2..4].to_vec()).collect();
    assert_close("decoded features vs filterpy", &got, &want, 1e-9, 1e-9);
}

/// The Wiener filter on features against scikit-learn's
/// `Ridge(alpha=5, fit_intercept=True, solver="cholesky")` on the same
/// lagged features (3 taps), intercept first.
#[test]
fn wiener_weights_on_features_equal_sklearn_ridge() {
    use decoder_core::fit::wiener::{WienerFitOptions, fit_wiener};
    let session = Block::read(&reference_dir().join("features_block")).unwrap();
    let m = fit_wiener(
        &session,
        &WienerFitOptions {
            taps: 3,
            ridge: 5.0,
            ..WienerFitOptions::default()
        },
    )
    .unwrap();
    let want = mat("features_wiener_weights.npy");
    assert_eq!((m.weights.rows, m.weights.cols), (want.rows, want.cols));
    assert_close(
        "Wiener weights on features vs sklearn Ridge",
        &m.weights.data,
        &want.data,
        1e-9,
        1e-10,
    );
}
