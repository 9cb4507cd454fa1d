//! Criterion benchmarks of the decoding core: one decode step by channel
//! count (Kalman full and steady-state; point-process without and with
//! history), offline replay throughput, training time on a 30-minute,
//! 192-channel block, and leaving channels out of a Kalman filter with a
//! full Q. Figures are in BENCHMARKS.md.

use std::hint::black_box;

use criterion::{BenchmarkId, Criterion, Throughput, criterion_group, criterion_main};
use decoder_core::decoders::DecoderModel;
use decoder_core::decoders::history_basis::RaisedCosineBasis;
use decoder_core::decoders::kalman::steady::steady_state_gain;
use decoder_core::decoders::kalman::{KalmanFilter, KalmanModel, ObservationNoise};
use decoder_core::decoders::point_process::{ChannelGlm, PointProcessFilter, PointProcessModel};
use decoder_core::fit::kalman::{KalmanFitOptions, fit_kalman};
use decoder_core::formats::block::Block;
use decoder_core::formats::model_file::{ModelFile, Provenance};
use decoder_core::linalg::Mat;
use decoder_core::session::replay::replay_block;
use decoder_core::sim::reaching::{SimOptions, simulate};
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// A d = 5 model with random tuning over N channels. The step's cost does not
/// depend on whether Q was full or diagonal (both become HᵀQ⁻¹ at load), so
/// Q is diagonal to keep setup at N = 4096 quick.
fn random_model(n: usize) -> KalmanModel {
    let mut rng = ChaCha8Rng::seed_from_u64(n as u64);
    let d = 5;
    let mut a = Mat::identity(d);
    a.set(0, 2, 0.02);
    a.set(1, 3, 0.02);
    a.set(2, 2, 0.95);
    a.set(3, 3, 0.95);
    let mut w = Mat::zeros(d, d);
    for i in 0..4 {
        w.set(i, i, if i < 2 { 1e-4 } else { 1.0 });
    }
    let mut h = Mat::zeros(n, d);
    for ch in 0..n {
        // Weak position tuning keeps position observable, as in fitted models,
        // so the Riccati recursion has a steady state.
        h.set(ch, 0, rng.random_range(-0.01..0.01));
        h.set(ch, 1, rng.random_range(-0.01..0.01));
        h.set(ch, 2, rng.random_range(-0.05..0.05));
        h.set(ch, 3, rng.random_range(-0.05..0.05));
        h.set(ch, 4, rng.random_range(0.1..0.6));
    }
    let q = (0..n).map(|_| rng.random_range(0.1..0.6)).collect();
    let mut p0 = Mat::zeros(d, d);
    for i in 0..4 {
        p0.set(i, i, 1.0);
    }
    KalmanModel {
        state: ["pos_x", "pos_y", "vel_x", "vel_y", "1"]
            .map(String::from)
            .to_vec(),
        outputs: vec!["vel_x".into(), "vel_y".into()],
        a,
        w,
        h,
        q: ObservationNoise::Diagonal(q),
        x0: vec![0.0, 0.0, 0.0, 0.0, 1.0],
        p0,
        count_offset: vec![0.0; n],
        count_scale: vec![1.0; n],
        steady: None,
    }
}

fn random_counts(n: usize, bins: usize) -> Vec<u16> {
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    (0..n * bins)
        .map(|_| {
            if rng.random::<f64>() < 0.3 {
                rng.random_range(1..4)
            } else {
                0
            }
        })
        .collect()
}

fn decode_step(c: &mut Criterion) {
    let mut group = c.benchmark_group("decode_step");
    for n in [96usize, 192, 1024, 4096] {
        let mut model = random_model(n);
        let bins = 256;
        let counts = random_counts(n, bins);
        let mut full = KalmanFilter::new(&model, false).unwrap();
        let mut i = 0;
        group.bench_with_input(BenchmarkId::new("full", n), &n, |b, _| {
            b.iter(|| {
                i = (i + 1) % bins;
                black_box(full.step(black_box(&counts[i * n..(i + 1) * n])))
            })
        });
        model.steady = Some(steady_state_gain(&model, 1e-12, 10_000).unwrap());
        let mut steady = KalmanFilter::new(&model, true).unwrap();
        group.bench_with_input(BenchmarkId::new("steady", n), &n, |b, _| {
            b.iter(|| {
                i = (i + 1) % bins;
                black_box(steady.step(black_box(&counts[i * n..(i + 1) * n])))
            })
        });
    }
    group.finish();
}

fn session_from(counts: Vec<u16>, n: usize) -> Block {
    let n_bins = counts.len() / n;
    Block {
        input: decoder_core::wire::packet::BinKind::Counts,
        features: Vec::new(),
        bin_width: decoder_core::BinWidth::from_us(20000).unwrap(),
        n_bins,
        n_channels: n,
        counts,
        kinematic_names: vec!["vel_x".into()],
        kinematics: None,
        trials: None,
        channel_labels: None,
        valid: None,
        notes: None,
        click: None,
    }
}

fn replay_throughput(c: &mut Criterion) {
    let n = 192;
    let bins = 20_000;
    let session = session_from(random_counts(n, bins), n);
    let mut group = c.benchmark_group("replay");
    group.throughput(Throughput::Elements(bins as u64));
    group.sample_size(20);
    for steady in [false, true] {
        let mut model = random_model(n);
        if steady {
            model.steady = Some(steady_state_gain(&model, 1e-12, 10_000).unwrap());
        }
        let mf = ModelFile {
            input: decoder_core::wire::packet::BinKind::Counts,
            bin_width: decoder_core::BinWidth::from_us(20000).unwrap(),
            decoder: DecoderModel::Kalman(model),
            provenance: Provenance::untracked(),
            click: None,
        };
        let mut pipeline = mf.pipeline().unwrap();
        let name = if steady { "steady/192" } else { "full/192" };
        group.bench_function(name, |b| {
            b.iter(|| black_box(replay_block(&mut pipeline, &session).unwrap()))
        });
    }
    group.finish();
}

fn training(c: &mut Criterion) {
    // 3 simulated minutes tiled to 30 (90 000 bins x 192 channels), so the
    // counts have the sparsity of real 20 ms bins without a slow setup.
    let (base, _) = simulate(&SimOptions {
        minutes: 3.0,
        n_channels: 192,
        ..SimOptions::default()
    })
    .unwrap();
    let mut s = base.clone();
    let kin = base.kinematics.as_ref().unwrap();
    let mut kin_data = Vec::with_capacity(kin.data.len() * 10);
    s.counts.clear();
    for _ in 0..10 {
        s.counts.extend_from_slice(&base.counts);
        kin_data.extend_from_slice(&kin.data);
    }
    s.n_bins = base.n_bins * 10;
    s.kinematics = Some(Mat {
        rows: s.n_bins,
        cols: kin.cols,
        data: kin_data,
    });
    s.trials = None;
    assert_eq!(s.n_bins, 90_000);
    let mut group = c.benchmark_group("train");
    group.sample_size(10);
    group.bench_function("kalman/90000x192", |b| {
        b.iter(|| black_box(fit_kalman(&s, &KalmanFitOptions::default()).unwrap()))
    });
    group.finish();
}

/// A point-process model over N channels: velocity tuning, and own history
/// through 4 raised cosines over 10 bins when `history`.
fn random_pp_model(n: usize, history: bool) -> PointProcessModel {
    let mut rng = ChaCha8Rng::seed_from_u64(n as u64 + 11);
    let basis = history.then(|| RaisedCosineBasis::new(4, 10));
    let channels = (0..n)
        .map(|_| {
            Some(ChannelGlm {
                b0: rng.random_range(0.1f64..0.6).ln(),
                beta: vec![rng.random_range(-0.05..0.05), rng.random_range(-0.05..0.05)],
                history: if history {
                    (0..4).map(|_| rng.random_range(-0.3..0.1)).collect()
                } else {
                    Vec::new()
                },
                coupling: Vec::new(),
                deviance: 0.0,
                null_deviance: 0.0,
                iterations: 0,
            })
        })
        .collect();
    PointProcessModel {
        state: vec!["vel_x".into(), "vel_y".into()],
        outputs: vec!["vel_x".into(), "vel_y".into()],
        a: Mat::from_rows(&[vec![0.95, 0.0], vec![0.0, 0.95]]),
        w: Mat::from_rows(&[vec![1.0, 0.0], vec![0.0, 1.0]]),
        x0: vec![0.0, 0.0],
        p0: Mat::from_rows(&[vec![10.0, 0.0], vec![0.0, 10.0]]),
        channels,
        excluded: Vec::new(),
        history_basis: basis,
    }
}

fn point_process_step(c: &mut Criterion) {
    let mut group = c.benchmark_group("pp_step");
    for n in [96usize, 192, 1024] {
        let bins = 256;
        let counts = random_counts(n, bins);
        for history in [false, true] {
            let mut f = PointProcessFilter::new(&random_pp_model(n, history)).unwrap();
            let mut i = 0;
            let name = if history { "history" } else { "lnp" };
            group.bench_with_input(BenchmarkId::new(name, n), &n, |b, _| {
                b.iter(|| {
                    i = (i + 1) % bins;
                    black_box(f.step(black_box(&counts[i * n..(i + 1) * n])))
                })
            });
        }
    }
    group.finish();
}

/// The click decoder's step: the discriminant over the last 6 bins'
/// counts and the two-state forward recursion.
fn click_step(c: &mut Criterion) {
    use decoder_core::decoders::click::{ClickFilter, ClickModel};
    let mut group = c.benchmark_group("click_step");
    for n in [96usize, 192, 1024] {
        let bins = 256;
        let counts = random_counts(n, bins);
        let lags = 6;
        let mut f = ClickFilter::new(ClickModel {
            n_channels: n,
            lags,
            weights: (0..n * lags)
                .map(|i| ((i * 37 % 101) as f64 - 50.0) * 1e-3)
                .collect(),
            intercept: -2.0,
            prior_click: 0.1,
            stay_rest: 0.99,
            stay_click: 0.93,
        })
        .unwrap();
        let mut i = 0;
        group.bench_with_input(BenchmarkId::new("lags6", n), &n, |b, _| {
            b.iter(|| {
                i = (i + 1) % bins;
                black_box(f.step(black_box(&counts[i * n..(i + 1) * n])))
            })
        });
    }
    group.finish();
}

/// Leaving channels out of a Kalman filter with a full Q: building the
/// reduced terms (what the daemon's worker does, O(r·N²)) and putting them
/// in place (what the decode thread does at the change's bin).
fn left_out_reduction(c: &mut Criterion) {
    let mut group = c.benchmark_group("left_out");
    group.sample_size(10);
    for n in [96usize, 1024] {
        let mut model = random_model(n);
        // A full Q: independent noise plus a shared component.
        let ObservationNoise::Diagonal(diag) = &model.q else {
            unreachable!()
        };
        let mut q = Mat::zeros(n, n);
        for (i, &d) in diag.iter().enumerate() {
            for j in 0..n {
                q.set(i, j, if i == j { d + 0.05 } else { 0.05 });
            }
        }
        model.q = ObservationNoise::Full(q);
        let mut filter = KalmanFilter::new(&model, false).unwrap();
        let reducer = filter.reducer();
        // A tenth of the channels out.
        let flags: Vec<bool> = (0..n).map(|c| c % 10 == 3).collect();
        group.bench_function(BenchmarkId::new("build_full_q", n), |b| {
            b.iter(|| black_box(reducer.terms(black_box(&flags))))
        });
        let terms = reducer.terms(&flags);
        group.bench_function(BenchmarkId::new("put_in_place", n), |b| {
            b.iter_batched(
                || terms.clone(),
                |t| black_box(filter.apply_reduced(t)),
                criterion::BatchSize::LargeInput,
            )
        });
    }
    group.finish();
}

criterion_group!(
    benches,
    left_out_reduction,
    decode_step,
    point_process_step,
    click_step,
    replay_throughput,
    training
);
criterion_main!(benches);
