//! `replay-tool simulate`: a synthetic reaching block as a session directory.

use std::path::PathBuf;

use anyhow::{Context, Result};
use decoder_core::sim::reaching::{SimOptions, simulate_to_dir};

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Session directory to write (created if missing).
    #[arg(long)]
    pub out: PathBuf,
    /// Seed of the block (movements and spikes).
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Seed of the simulated array (each channel's tuning); keep it fixed
    /// to get several blocks from the same channels.
    #[arg(long, default_value_t = 1)]
    pub array_seed: u64,
    /// Length of the block in minutes.
    #[arg(long, default_value_t = 10.0)]
    pub minutes: f64,
    /// Number of channels.
    #[arg(long, default_value_t = 96)]
    pub channels: usize,
    /// Bin width in milliseconds (whole ms).
    #[arg(long, default_value_t = 20.0)]
    pub bin_ms: f64,
    /// Absolute refractory period, ms.
    #[arg(long, default_value_t = 2)]
    pub refractory_ms: usize,
    /// Relative refractoriness: the rate recovers as 1 − exp(−t/M) after
    /// the absolute period (0 = off). With 1 ms bins this makes spike
    /// history matter to the encoding models.
    #[arg(long, default_value_t = 0.0)]
    pub recovery_ms: f64,
    /// Click attempts: for --click-ms from the start of each hold in the
    /// target, a share of the channels fire faster; the block gets
    /// click.npy (the bins cued as clicks).
    #[arg(long)]
    pub click: bool,
    /// With --click: the share of channels whose rate changes (0..1).
    #[arg(long, requires = "click", default_value_t = 0.25)]
    pub click_share: f64,
    /// With --click: their rate during an attempt, as a factor.
    #[arg(long, requires = "click", default_value_t = 2.0)]
    pub click_gain: f64,
    /// With --click: how long an attempt lasts, ms.
    #[arg(long, requires = "click", default_value_t = 300)]
    pub click_ms: usize,
    /// Write continuous features (features.npy: simulated spike band
    /// power, an offset plus a gain times each bin's spikes plus noise, µV)
    /// instead of counts, for decoders trained on features.
    #[arg(long, conflicts_with = "click")]
    pub features: bool,
    #[command(flatten)]
    pub world: super::world::WorldArgs,
}

pub fn run(args: &Args) -> Result<()> {
    let options = SimOptions {
        seed: args.seed,
        population_seed: args.array_seed,
        minutes: args.minutes,
        n_channels: args.channels,
        bin_width: super::bin_width_flag(args.bin_ms)?,
        refractory_ms: args.refractory_ms,
        recovery_ms: args.recovery_ms,
        drift: args.world.drift()?,
        click: args.click.then_some(decoder_core::sim::reaching::ClickSim {
            share: args.click_share,
            gain: args.click_gain,
            attempt_ms: args.click_ms,
        }),
        features: args.features,
        ..SimOptions::default()
    };
    // Written a chunk of bins at a time: a block of any length.
    let written = simulate_to_dir(&options, &args.out)
        .with_context(|| format!("writing session {}", args.out.display()))?;
    println!(
        "wrote {}: {} bins of {} ms, {} channels{}, {} trials",
        args.out.display(),
        written.n_bins,
        written.bin_width.ms(),
        written.n_channels,
        if args.features { " of features" } else { "" },
        written.trials
    );
    Ok(())
}
