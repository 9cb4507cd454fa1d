//! Held-out accuracy on simulated blocks: the decoder must recover the
//! velocity the simulated channels were tuned to.
//!
//! The bar, CC ≥ 0.8 for both velocity components, is this project's
//! acceptance figure (README). For scale: offline linear and Kalman
//! decoders of hand velocity from ~100 motor-cortex channels are reported
//! at CC of about 0.7 to 0.9 (Wu et al. 2006 and later work; from memory).
//! The simulator's channels are cosine-tuned (Georgopoulos et al. 1982)
//! with Poisson spiking, which a linear decoder should do at least as well
//! on.

use decoder_core::fit::evaluate::{DecoderSpec, cross_validate};
use decoder_core::fit::kalman::KalmanFitOptions;
use decoder_core::fit::point_process::OneAfterAnother;
use decoder_core::fit::wiener::WienerFitOptions;
use decoder_core::sim::reaching::{SimOptions, simulate};

#[test]
fn kalman_reaches_cc_08_on_ten_minutes_of_96_channels() {
    let (session, _) = simulate(&SimOptions {
        seed: 7,
        minutes: 10.0,
        n_channels: 96,
        ..SimOptions::default()
    })
    .unwrap();
    let eval = cross_validate(
        &session,
        &[
            DecoderSpec::Kalman(KalmanFitOptions::default()),
            DecoderSpec::Wiener(WienerFitOptions::default()),
        ],
        5,
        &OneAfterAnother,
        |_, _| {},
    )
    .unwrap();
    let kalman = &eval.decoders[0];
    for (dim, s) in kalman.mean.iter().enumerate() {
        eprintln!(
            "kalman {}: cc {:.3} r2 {:.3} rmse {:.2}",
            kalman.outputs[dim], s.cc, s.r2, s.rmse
        );
        assert!(
            s.cc >= 0.8,
            "held-out CC of {} is {:.3}",
            kalman.outputs[dim],
            s.cc
        );
    }
    for (dim, s) in eval.decoders[1].mean.iter().enumerate() {
        eprintln!(
            "wiener {}: cc {:.3} r2 {:.3}",
            eval.decoders[1].outputs[dim], s.cc, s.r2
        );
        assert!(
            s.cc >= 0.8,
            "Wiener held-out CC of {} is {:.3}",
            eval.decoders[1].outputs[dim],
            s.cc
        );
    }
}
