//! Online adaptation (SmoothBatch, Orsborn et al. 2012) in a simulated
//! closed loop run in-process: the simulated user's channels fire for the
//! velocity they intend, the decode pipeline decodes each bin, the cursor
//! moves by the decoded velocity, and every batch of bins becomes an
//! update of the running Kalman filter's observation model, exactly as the
//! daemon's worker computes it. No threads, so every run repeats.
//!
//! The claims checked: adaptation improves a poor decoder (preferred
//! directions rotated by 60°, the classic perturbation) and does not
//! degrade a good one beyond a stated margin; the safety checks hold
//! (a short batch is skipped, a large step is cut to the limit).

use decoder_core::ModelFile;
use decoder_core::decoders::DecoderModel;
use decoder_core::fit::adapt::{
    AdaptOptions, AdaptSkip, Batch, BatchRow, adapt_kalman, adapt_point_process,
};
use decoder_core::fit::kalman::KalmanFitOptions;
use decoder_core::sim::model::simulated_kalman;
use decoder_core::sim::reaching::{SimOptions, population};
use decoder_core::sim::user::{CenterOut, SimulatedUser, TaskOptions, TaskSummary};
use decoder_core::wire::task_packet::MAX_TASK_DIMS;

const CHANNELS: usize = 32;
const MAX_SPEED: f64 = 50.0;

fn good_model() -> ModelFile {
    simulated_kalman(
        &SimOptions {
            minutes: 3.0,
            n_channels: CHANNELS,
            ..SimOptions::default()
        },
        &KalmanFitOptions::default(),
    )
    .unwrap()
    .0
}

/// A point-process decoder (history terms) of the same array.
fn point_process_model() -> ModelFile {
    let (block, _) = decoder_core::sim::reaching::simulate(&SimOptions {
        minutes: 3.0,
        n_channels: CHANNELS,
        ..SimOptions::default()
    })
    .unwrap();
    let (pp, _) = decoder_core::fit::point_process::fit_point_process(
        &block,
        &decoder_core::fit::point_process::PointProcessFitOptions::default(),
    )
    .unwrap();
    ModelFile {
        input: decoder_core::wire::packet::BinKind::Counts,
        bin_width: block.bin_width,
        decoder: DecoderModel::PointProcess(pp),
        provenance: decoder_core::formats::model_file::Provenance::untracked(),
        click: None,
    }
}

/// The model with each channel's velocity weights rotated by `degrees`:
/// the decoder reads every channel's preferred direction wrong.
fn rotated(model: &ModelFile, degrees: f64) -> ModelFile {
    let mut m = model.clone();
    if let DecoderModel::PointProcess(p) = &mut m.decoder {
        let vx = p.state.iter().position(|s| s == "vel_x").unwrap();
        let vy = p.state.iter().position(|s| s == "vel_y").unwrap();
        let (s, c) = degrees.to_radians().sin_cos();
        for ch in p.channels.iter_mut().flatten() {
            let (a, b) = (ch.beta[vx], ch.beta[vy]);
            ch.beta[vx] = c * a - s * b;
            ch.beta[vy] = s * a + c * b;
        }
        return m;
    }
    let DecoderModel::Kalman(k) = &mut m.decoder else {
        unreachable!()
    };
    let vx = k.state.iter().position(|s| s == "vel_x").unwrap();
    let vy = k.state.iter().position(|s| s == "vel_y").unwrap();
    let (s, c) = degrees.to_radians().sin_cos();
    for ch in 0..k.h.rows {
        let (a, b) = (k.h.get(ch, vx), k.h.get(ch, vy));
        k.h.set(ch, vx, c * a - s * b);
        k.h.set(ch, vy, s * a + c * b);
    }
    m
}

struct Session {
    summary: TaskSummary,
    updates: usize,
    skipped: usize,
    limited: usize,
}

/// A closed-loop session of `trials` trials; with `adapt`, an update after
/// every batch.
fn session(start: &ModelFile, trials: usize, seed: u64, adapt: Option<&AdaptOptions>) -> Session {
    let opts = TaskOptions {
        seed,
        n_trials: trials,
        ..TaskOptions::default()
    };
    let mut user = SimulatedUser::new(population(1, CHANNELS), &opts);
    let mut task = CenterOut::new(opts.clone());
    let mut model = start.clone();
    let mut pipeline = model.pipeline().unwrap();
    let bins = adapt.map_or(1, |a| (a.batch_s / 0.02).round() as usize);
    let mut batch = Batch::with_capacity(CHANNELS, bins);
    let mut counts = vec![0u16; CHANNELS];
    let (mut updates, mut skipped, mut limited) = (0, 0, 0);
    let mut seq = 0u64;
    while !task.done() {
        user.bin_counts(task.intended_velocity(), &mut counts);
        let e = pipeline.step(seq, &counts);
        let mut command = [e.estimate[0], e.estimate[1]];
        // The daemon's speed limit.
        let speed = command[0].hypot(command[1]);
        if speed > MAX_SPEED {
            command = command.map(|v| v * MAX_SPEED / speed);
        }
        if let Some(a) = adapt {
            let mut row = BatchRow {
                seq,
                usable: true,
                dims: 2,
                cursor: [0.0; MAX_TASK_DIMS],
                target: [0.0; MAX_TASK_DIMS],
                radius: opts.window,
                decoded: [0.0; MAX_TASK_DIMS],
            };
            row.cursor[..2].copy_from_slice(&task.cursor());
            row.target[..2].copy_from_slice(&task.target());
            row.decoded[..2].copy_from_slice(&[e.estimate[0], e.estimate[1]]);
            batch.counts.extend_from_slice(&counts);
            batch.rows.push(row);
            batch.slots += 1;
            if batch.slots == bins {
                let result = match &model.decoder {
                    DecoderModel::Kalman(k) => {
                        adapt_kalman(k, &batch, a).map(|(m, r)| (DecoderModel::Kalman(m), r))
                    }
                    DecoderModel::PointProcess(p) => adapt_point_process(p, &batch, a)
                        .map(|(m, r)| (DecoderModel::PointProcess(m), r)),
                    _ => unreachable!(),
                };
                match result {
                    Ok((adapted, report)) => {
                        updates += 1;
                        limited += usize::from(report.limited);
                        model.decoder = adapted;
                        pipeline = model.pipeline().unwrap();
                    }
                    Err(e) => {
                        eprintln!("skipped: {e}");
                        skipped += 1
                    }
                }
                batch.clear();
            }
        }
        task.advance(command);
        seq += 1;
    }
    Session {
        summary: task.summary(),
        updates,
        skipped,
        limited,
    }
}

/// 5 s batches, 20 s half-life: a few updates within a short session.
fn quick() -> AdaptOptions {
    AdaptOptions {
        batch_s: 5.0,
        half_life_s: 20.0,
        ..AdaptOptions::default()
    }
}

/// The same session without and with adaptation: with it, at least
/// `min_updates` updates, 20 points more success and less time per target.
fn assert_rescued(what: &str, poor: &ModelFile, trials: usize, seed: u64, min_updates: usize) {
    let without = session(poor, trials, seed, None);
    let with = session(poor, trials, seed, Some(&quick()));
    eprintln!(
        "{what}: without {:?}\nwith {:?} ({} updates, {} limited, {} skipped)",
        without.summary, with.summary, with.updates, with.limited, with.skipped
    );
    assert!(with.updates >= min_updates, "{} updates", with.updates);
    assert_eq!(with.skipped, 0, "every bin of a batch was usable");
    assert!(
        with.summary.success_rate >= without.summary.success_rate + 0.2,
        "success {} with vs {} without",
        with.summary.success_rate,
        without.summary.success_rate
    );
    assert!(with.summary.mean_trial_time_s < without.summary.mean_trial_time_s);
}

#[test]
fn adaptation_rescues_a_decoder_with_rotated_preferred_directions() {
    assert_rescued("rotated 60°", &rotated(&good_model(), 60.0), 40, 7, 5);
}

#[test]
fn adaptation_does_not_degrade_a_good_decoder_beyond_the_margin() {
    // The margin: at most 10 points of success and 0.5 s per target.
    let good = good_model();
    let without = session(&good, 40, 8, None);
    let with = session(&good, 40, 8, Some(&quick()));
    eprintln!(
        "good: without {:?}\nwith {:?} ({} updates)",
        without.summary, with.summary, with.updates
    );
    assert!(with.updates >= 5);
    assert!(with.summary.success_rate >= without.summary.success_rate - 0.10);
    assert!(with.summary.mean_trial_time_s <= without.summary.mean_trial_time_s + 0.5);
}

fn still_batch(model: &ModelFile, rows: usize, slots: usize) -> Batch {
    // Cursor at the centre, target 10 cm to the right, decoded 10 cm/s up.
    let opts = TaskOptions::default();
    let mut user = SimulatedUser::new(population(1, CHANNELS), &opts);
    let mut batch = Batch::with_capacity(model.decoder.n_channels(), rows);
    let mut counts = vec![0u16; CHANNELS];
    for r in 0..rows {
        let angle = r as f64 * 0.37;
        let target = [10.0 * angle.cos(), 10.0 * angle.sin()];
        user.bin_counts([target[0] * 2.0, target[1] * 2.0], &mut counts);
        let mut row = BatchRow {
            seq: r as u64,
            usable: true,
            dims: 2,
            cursor: [0.0; MAX_TASK_DIMS],
            target: [0.0; MAX_TASK_DIMS],
            radius: 2.0,
            decoded: [0.0; MAX_TASK_DIMS],
        };
        row.target[..2].copy_from_slice(&target);
        row.decoded[1] = 20.0;
        batch.counts.extend_from_slice(&counts);
        batch.rows.push(row);
    }
    batch.slots = slots;
    batch
}

#[test]
fn a_batch_with_too_few_usable_bins_is_skipped() {
    let good = good_model();
    let DecoderModel::Kalman(k) = &good.decoder else {
        unreachable!()
    };
    let batch = still_batch(&good, 100, 500);
    match adapt_kalman(k, &batch, &AdaptOptions::default()) {
        Err(AdaptSkip::TooFewBins {
            usable: 100,
            slots: 500,
            needed: 250,
        }) => {}
        other => panic!("{other:?}"),
    }
}

#[test]
fn a_large_step_is_cut_to_the_limit() {
    let poor = rotated(&good_model(), 120.0);
    let DecoderModel::Kalman(k) = &poor.decoder else {
        unreachable!()
    };
    let batch = still_batch(&poor, 500, 500);
    let options = AdaptOptions {
        half_life_s: 1.0,
        max_relative_change: 0.05,
        ..AdaptOptions::default()
    };
    let (adapted, report) = adapt_kalman(k, &batch, &options).unwrap();
    assert!(report.limited, "{report:?}");
    let change = {
        let (a, b) = (adapted.h.to_dmatrix(), k.h.to_dmatrix());
        (a - &b).norm() / b.norm()
    };
    assert!((change - 0.05).abs() < 1e-12, "change {change}");
    assert!(report.spectral_radius.unwrap() < 1.0);
    // A and W, the state model, never move.
    assert_eq!(adapted.a, k.a);
    assert_eq!(adapted.w, k.w);
}

#[test]
fn adaptation_rescues_a_point_process_decoder_with_rotated_tuning() {
    // The point-process channels' tuning (b0, β) adapts with their
    // spike-history terms held as an offset.
    assert_rescued(
        "point process rotated 60°",
        &rotated(&point_process_model(), 60.0),
        30,
        9,
        4,
    );
}
