//! After construction, a decode step allocates nothing: a counting global
//! allocator watches every pipeline kind through steps and missing bins.
//! (Its own test binary, so no other test's allocations are counted.)

use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::atomic::{AtomicUsize, Ordering};

use decoder_core::decoders::DecoderModel;
use decoder_core::fit::kalman::{KalmanFitOptions, SteadyStateOptions, fit_kalman};
use decoder_core::fit::wiener::{WienerFitOptions, fit_wiener};
use decoder_core::formats::model_file::{ModelFile, Provenance};
use decoder_core::sim::reaching::{SimOptions, simulate};

struct Counting;
static ALLOCATIONS: AtomicUsize = AtomicUsize::new(0);

// SAFETY: forwards every call unchanged to the system allocator; the counter
// is a relaxed atomic, which cannot affect allocation.
unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        ALLOCATIONS.fetch_add(1, Ordering::Relaxed);
        // SAFETY: same contract as the caller's.
        unsafe { System.alloc(layout) }
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        // SAFETY: same contract as the caller's.
        unsafe { System.dealloc(ptr, layout) }
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        ALLOCATIONS.fetch_add(1, Ordering::Relaxed);
        // SAFETY: same contract as the caller's.
        unsafe { System.realloc(ptr, layout, new_size) }
    }
}

#[global_allocator]
static GLOBAL: Counting = Counting;

fn model_file(decoder: DecoderModel) -> ModelFile {
    ModelFile {
        input: decoder_core::wire::packet::BinKind::Counts,
        bin_width: decoder_core::BinWidth::from_us(20000).unwrap(),
        decoder,
        provenance: Provenance::untracked(),
        click: None,
    }
}

#[test]
fn decode_steps_allocate_nothing() {
    let (session, _) = simulate(&SimOptions {
        minutes: 1.0,
        n_channels: 32,
        ..SimOptions::default()
    })
    .unwrap();
    let (full, _) = fit_kalman(&session, &KalmanFitOptions::default()).unwrap();
    let steady_opts = KalmanFitOptions {
        steady_state: Some(SteadyStateOptions {
            tolerance: 1e-12,
            max_iterations: 10_000,
        }),
        ..KalmanFitOptions::default()
    };
    let (steady, _) = fit_kalman(&session, &steady_opts).unwrap();
    let wiener = fit_wiener(&session, &WienerFitOptions::default()).unwrap();
    // The point-process decoder with spike history and coupling: its ring
    // of past counts and its information-form update run every bin.
    let (pp, _) = decoder_core::fit::point_process::fit_point_process(
        &session,
        &decoder_core::fit::point_process::PointProcessFitOptions {
            coupling: true,
            ..Default::default()
        },
    )
    .unwrap();
    assert!(pp.history_basis.is_some());
    for (name, decoder) in [
        ("kalman", DecoderModel::Kalman(full)),
        ("kalman steady-state", DecoderModel::Kalman(steady)),
        ("wiener", DecoderModel::Wiener(wiener)),
        ("point process", DecoderModel::PointProcess(pp)),
    ] {
        let mut pipeline = model_file(decoder).pipeline().unwrap();
        let before = ALLOCATIONS.load(Ordering::Relaxed);
        let mut checksum = 0.0;
        for bin in 0..session.n_bins {
            let est = if bin % 17 == 5 {
                pipeline.predict_only(bin as u64)
            } else {
                pipeline.step(bin as u64, session.bin_counts(bin))
            };
            checksum += est.estimate[0];
        }
        pipeline.reset();
        let after = ALLOCATIONS.load(Ordering::Relaxed);
        assert_eq!(
            after - before,
            0,
            "{name}: {} allocations in {} bins",
            after - before,
            session.n_bins
        );
        assert!(checksum.is_finite());
    }
}
