//! `replay-tool demo`: the whole offline job on synthetic data, in one
//! command: simulate a calibration block and a later block from the same
//! simulated array, train a Kalman decoder, cross-validate it against the
//! Wiener baseline with a report, and replay the later block.

use std::path::PathBuf;
use std::time::Instant;

use anyhow::{Context, Result};
use decoder_core::evaluate::{DecoderSpec, cross_validate};
use decoder_core::simulate::{SimOptions, simulate};
use decoder_core::train_config::TrainConfig;

use super::{evaluate, replay, train};
use crate::output::write_atomic;
use crate::progress;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Directory for everything the demo writes.
    #[arg(long, default_value = "demo-output")]
    pub out: PathBuf,
    #[arg(long, default_value_t = 96)]
    pub channels: usize,
    /// Minutes of calibration block.
    #[arg(long, default_value_t = 10.0)]
    pub minutes: f64,
}

pub fn run(args: &Args) -> Result<()> {
    let started = Instant::now();
    let out = &args.out;
    std::fs::create_dir_all(out).with_context(|| format!("cannot create {}", out.display()))?;
    let calibration = out.join("calibration");
    let later = out.join("later-block");
    let sim = SimOptions {
        n_channels: args.channels,
        minutes: args.minutes,
        ..SimOptions::default()
    };
    let (cal, _) = simulate(&SimOptions {
        seed: 1,
        ..sim.clone()
    })?;
    cal.write(&calibration)?;
    let (blk, _) = simulate(&SimOptions {
        seed: 2,
        minutes: 2.0,
        ..sim
    })?;
    blk.write(&later)?;
    println!(
        "1. simulated a {}-min calibration block ({} channels, {} trials) -> {}",
        args.minutes,
        cal.n_channels,
        cal.trials.as_ref().map_or(0, Vec::len),
        calibration.display()
    );
    println!(
        "   and a 2-min later block from the same simulated array -> {}",
        later.display()
    );

    let cfg = TrainConfig::default();
    let kalman = DecoderSpec::Kalman(cfg.kalman.clone());
    let model = train::train_model(&cal, &kalman, Some(cfg.folds))?;
    let model_path = out.join("kalman.model");
    write_atomic(&model_path, &model.to_bytes())?;
    println!("2. trained a Kalman decoder -> {}", model_path.display());
    print!("   ");
    train::print_cv_line(&model);

    let specs = [kalman, DecoderSpec::Wiener(cfg.wiener.clone())];
    let pb = progress::bar((cfg.folds * specs.len()) as u64, "evaluate");
    let eval = cross_validate(&cal, &specs, cfg.folds, |_, _| pb.inc(1))?;
    pb.finish_and_clear();
    let report = out.join("report");
    evaluate::write_report(&report, &eval, cal.bin_ms)?;
    println!("3. cross-validated Kalman against the Wiener baseline:");
    for d in &eval.decoders {
        let parts: Vec<String> = d
            .outputs
            .iter()
            .zip(&d.mean)
            .map(|(o, s)| format!("{o} CC {:.3} R² {:.3}", s.cc, s.r2))
            .collect();
        println!("   {:<7} {}", d.decoder, parts.join(", "));
    }
    println!(
        "   report (scores.csv, evaluation.json, heldout_velocity.svg/.png) -> {}",
        report.display()
    );

    let estimates = out.join("later-block-estimates.npy");
    let summary = replay::replay(&replay::Args {
        session: later.clone(),
        model: Some(model_path.clone()),
        out: estimates.clone(),
        no_steady_state: false,
    })?;
    let parts: Vec<String> = summary
        .cc
        .iter()
        .map(|(n, c)| format!("{n} CC {c:.3}"))
        .collect();
    println!(
        "4. replayed the later block through the decode pipeline: {} bins at {:.0} bins/s, {} -> {}",
        summary.n_bins,
        summary.bins_per_second,
        parts.join(", "),
        estimates.display()
    );
    println!("done in {:.1} s", started.elapsed().as_secs_f64());
    Ok(())
}
