//! Leaving channels out of the Kalman filter is exact: the filter with
//! channels R left out follows, bin for bin, the filter built from the same
//! model with rows R of H and rows and columns R of Q deleted (the
//! Kalman filter conditioned on the other channels only, textbook
//! algebra), for a full and a diagonal Q, with and without the
//! steady-state gain, and the full filter again once every channel is back.

use decoder_core::decoders::kalman::steady::steady_state_gain;
use decoder_core::decoders::kalman::{KalmanFilter, KalmanModel, ObservationNoise};
use decoder_core::linalg::Mat;

/// A small deterministic generator (the values only need to be varied).
struct Lcg(u64);
impl Lcg {
    fn next(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((self.0 >> 11) as f64) / ((1u64 << 53) as f64) - 0.5
    }
}

const N: usize = 9;

fn model(diagonal: bool, steady: bool) -> KalmanModel {
    let mut r = Lcg(7);
    let a = Mat::from_rows(&[
        vec![0.95, 0.02, 0.0],
        vec![-0.03, 0.9, 0.0],
        vec![0.0, 0.0, 1.0],
    ]);
    let w = Mat::from_rows(&[
        vec![0.04, 0.01, 0.0],
        vec![0.01, 0.05, 0.0],
        vec![0.0, 0.0, 0.0],
    ]);
    let h = Mat::from_rows(
        &(0..N)
            .map(|_| vec![r.next() * 4.0, r.next() * 4.0, 3.0 + r.next()])
            .collect::<Vec<_>>(),
    );
    // Q = B Bᵀ + I: symmetric positive definite with real correlations.
    let b: Vec<Vec<f64>> = (0..N).map(|_| (0..N).map(|_| r.next()).collect()).collect();
    let q = if diagonal {
        ObservationNoise::Diagonal((0..N).map(|i| 1.0 + i as f64 * 0.3).collect())
    } else {
        let mut q = Mat::zeros(N, N);
        for i in 0..N {
            for j in 0..N {
                let v: f64 = (0..N).map(|k| b[i][k] * b[j][k]).sum();
                q.set(i, j, v + if i == j { 1.0 } else { 0.0 });
            }
        }
        ObservationNoise::Full(q)
    };
    let mut m = KalmanModel {
        state: vec!["vel_x".into(), "vel_y".into(), "1".into()],
        outputs: vec!["vel_x".into(), "vel_y".into()],
        a,
        w,
        h,
        q,
        x0: vec![0.0, 0.0, 1.0],
        p0: Mat::from_rows(&[
            vec![0.1, 0.0, 0.0],
            vec![0.0, 0.1, 0.0],
            vec![0.0, 0.0, 0.0],
        ]),
        count_offset: (0..N).map(|i| 0.5 * i as f64).collect(),
        count_scale: (0..N).map(|i| 1.0 + 0.1 * i as f64).collect(),
        steady: None,
    };
    m.validate().unwrap();
    if steady {
        m.steady = Some(steady_state_gain(&m, 1e-13, 10_000).unwrap());
    }
    m
}

/// The model without channels `out`: rows of H, rows and columns of Q, and
/// their offsets and scales deleted; no steady gain (the reduced filter
/// runs the full recursion).
fn without(m: &KalmanModel, out: &[usize]) -> KalmanModel {
    let keep: Vec<usize> = (0..N).filter(|c| !out.contains(c)).collect();
    let h = Mat::from_rows(
        &keep
            .iter()
            .map(|&c| m.h.row(c).to_vec())
            .collect::<Vec<_>>(),
    );
    let q = match &m.q {
        ObservationNoise::Full(q) => ObservationNoise::Full(Mat::from_rows(
            &keep
                .iter()
                .map(|&i| keep.iter().map(|&j| q.get(i, j)).collect())
                .collect::<Vec<_>>(),
        )),
        ObservationNoise::Diagonal(q) => {
            ObservationNoise::Diagonal(keep.iter().map(|&c| q[c]).collect())
        }
    };
    KalmanModel {
        h,
        q,
        count_offset: keep.iter().map(|&c| m.count_offset[c]).collect(),
        count_scale: keep.iter().map(|&c| m.count_scale[c]).collect(),
        steady: None,
        ..m.clone()
    }
}

fn counts(t: usize) -> Vec<u16> {
    (0..N).map(|c| ((t * 7 + c * 3) % 11) as u16).collect()
}

fn assert_close(a: &[f64], b: &[f64], what: &str) {
    for (i, (x, y)) in a.iter().zip(b).enumerate() {
        // Two algebraically equal routes (a Schur complement of Q⁻¹ against
        // a fresh Cholesky of the smaller Q) round differently.
        assert!(
            (x - y).abs() <= 1e-10 + 1e-9 * y.abs(),
            "{what}[{i}]: {x} against {y}"
        );
    }
}

fn check(diagonal: bool, steady: bool) {
    let m = model(diagonal, steady);
    let out = [2usize, 5, 6];
    let mut flags = vec![false; N];
    for &c in &out {
        flags[c] = true;
    }
    let reduced_model = without(&m, &out);
    let keep: Vec<usize> = (0..N).filter(|c| !out.contains(c)).collect();

    let mut full = KalmanFilter::new(&m, true).unwrap();
    let mut reference_full = KalmanFilter::new(&m, true).unwrap();
    // Some bins with every channel.
    for t in 0..20 {
        full.step(&counts(t));
        reference_full.step(&counts(t));
    }
    // Leave three out: the reduced model's filter, started from the same
    // state and covariance, is the reference.
    full.set_left_out(&flags);
    let mut reference = KalmanFilter::new(&reduced_model, false).unwrap();
    let start_p = if steady {
        m.steady.as_ref().unwrap().posterior_cov.data.clone()
    } else {
        reference_full.covariance().to_vec()
    };
    reference.restore(full.state(), &start_p);
    for t in 20..60 {
        let c = counts(t);
        let kept: Vec<u16> = keep.iter().map(|&k| c[k]).collect();
        // What the left-out channels send must not matter.
        let mut noisy = c.clone();
        for &k in &out {
            noisy[k] = 400;
        }
        assert!(full.step(&noisy));
        assert!(reference.step(&kept));
        assert_close(full.state(), reference.state(), "state");
        assert_close(full.covariance(), reference.covariance(), "covariance");
    }
    // Every channel back: the full model's filter again (its steady gain
    // when it has one), from where the reduced one stood.
    full.set_left_out(&[false; N]);
    let mut back = KalmanFilter::new(&m, true).unwrap();
    back.restore(full.state(), full.covariance());
    for t in 60..80 {
        full.step(&counts(t));
        back.step(&counts(t));
        assert_eq!(full.state(), back.state(), "bin {t}");
    }
}

#[test]
fn left_out_channels_match_the_reduced_model_full_q() {
    check(false, false);
}

#[test]
fn left_out_channels_match_the_reduced_model_diagonal_q() {
    check(true, false);
}

#[test]
fn left_out_channels_match_the_reduced_model_steady_state() {
    check(false, true);
}

#[test]
fn nothing_left_out_changes_nothing() {
    let m = model(false, false);
    let mut a = KalmanFilter::new(&m, true).unwrap();
    let mut b = KalmanFilter::new(&m, true).unwrap();
    b.set_left_out(&[false; N]);
    for t in 0..30 {
        a.step(&counts(t));
        b.step(&counts(t));
        assert_eq!(a.state(), b.state());
    }
}
