//! A trained model without a training run: a Kalman decoder fitted to a
//! simulated block, for the tests, benchmarks and bench verbs that need a
//! model to run but are not about training. One builder, so every caller
//! gets the same kind of model from the same options.

use crate::bin_width::BinWidth;
use crate::decoders::DecoderModel;
use crate::engine::slot_engine::EngineSettings;
use crate::engine::supervisor::SafetyLimits;
use crate::fit::TrainError;
use crate::fit::kalman::{KalmanFitOptions, fit_kalman};
use crate::formats::block::Block;
use crate::formats::model_file::{ModelFile, Provenance};
use crate::sim::reaching::{SimError, SimOptions, simulate};

#[derive(Debug, thiserror::Error)]
pub enum SimModelError {
    #[error(transparent)]
    Sim(#[from] SimError),
    #[error(transparent)]
    Train(#[from] TrainError),
}

/// Simulates a block with `sim` and fits a velocity Kalman filter to it
/// with `fit`; returns the model (untracked provenance) and the block.
pub fn simulated_kalman(
    sim: &SimOptions,
    fit: &KalmanFitOptions,
) -> Result<(ModelFile, Block), SimModelError> {
    let (block, _) = simulate(sim)?;
    let (kalman, _) = fit_kalman(&block, fit)?;
    let model = ModelFile {
        bin_width: block.bin_width,
        decoder: DecoderModel::Kalman(kalman),
        provenance: Provenance::untracked(),
        click: None,
        input: block.input,
    };
    Ok((model, block))
}

/// [`simulated_kalman`] with default fit options on a `minutes`-long block
/// of `n_channels` channels at 20 ms, block seed `seed`.
pub fn small_kalman(n_channels: usize, seed: u64, minutes: f64) -> (ModelFile, Block) {
    simulated_kalman(
        &SimOptions {
            minutes,
            n_channels,
            seed,
            ..SimOptions::default()
        },
        &KalmanFitOptions::default(),
    )
    .expect("default options on a simulated block always train")
}

/// Slot-engine settings for a simulated rig at 20 ms bins: half a bin of
/// deadline slack, a reorder window of 8, the daemon's default safety
/// limits (50 units/s, 500 units/s², 5 coasted bins, decay 0.8), armed at
/// start. Tests and benches change the fields they are about.
pub fn rig_settings() -> EngineSettings {
    let bin_width = BinWidth::from_us(20_000).expect("20 ms");
    EngineSettings {
        bin_width,
        deadline_slack_ns: bin_width.ns() / 2,
        reorder_window: 8,
        clock_tracking: 0.01,
        limits: SafetyLimits {
            max_speed: 50.0,
            max_accel: 500.0,
            max_coast_bins: 5,
            coast_decay: 0.8,
            bin_width,
        },
        armed_at_start: true,
        dead_channel_bins: 100,
        saturation_count: 21,
        click_gate: Default::default(),
        drift: Default::default(),
    }
}
