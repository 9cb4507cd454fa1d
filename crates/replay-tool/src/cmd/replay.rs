//! `replay-tool replay`: decode a stored block with a model, bin by bin,
//! through the same pipeline the daemon runs, and write the estimates.

use std::path::PathBuf;
use std::time::Instant;

use anyhow::{Context, Result, bail};
use decoder_core::metrics::scores;
use decoder_core::pipeline::{DecodePipeline, replay_block};
use decoder_core::{ModelFile, Session};

use crate::output::write_table;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Block to replay (session directory).
    #[arg(long)]
    pub session: PathBuf,
    /// Model file from `replay-tool train`.
    #[arg(long)]
    pub model: PathBuf,
    /// Estimates to write: FILE.npy (shape bins × outputs, float64) or FILE.csv.
    #[arg(long)]
    pub out: PathBuf,
    /// Run the full covariance update even when the model has a steady-state gain.
    #[arg(long)]
    pub no_steady_state: bool,
}

pub struct ReplaySummary {
    pub n_bins: usize,
    pub bins_per_second: f64,
    /// (output, CC) against the block's own kinematics, when it has them.
    pub cc: Vec<(String, f64)>,
}

pub fn replay(args: &Args) -> Result<ReplaySummary> {
    if args.session.is_file() {
        bail!(
            "{} is a file; expected a session directory (manifest.toml, counts.npy)",
            args.session.display()
        );
    }
    let model = ModelFile::read(&args.model)?;
    let session = Session::read(&args.session)?;
    let mut pipeline = DecodePipeline::with_options(&model, !args.no_steady_state)
        .with_context(|| format!("building the decoder from {}", args.model.display()))?;
    let started = Instant::now();
    let (estimates, faults) = replay_block(&mut pipeline, &session).with_context(|| {
        format!(
            "{} does not fit {}",
            args.session.display(),
            args.model.display()
        )
    })?;
    let elapsed = started.elapsed().as_secs_f64();
    if faults > 0 {
        tracing::warn!(faults, "bins with a numerical fault (estimate unusable)");
    }
    let outputs = model.decoder.outputs().to_vec();
    write_table(&args.out, &outputs, session.n_bins, &estimates)?;
    let d = outputs.len();
    let mut cc = Vec::new();
    if let Some(kin) = &session.kinematics {
        for (dim, name) in outputs.iter().enumerate() {
            if let Some(col) = session.kinematic_index(name) {
                let truth: Vec<f64> = (0..session.n_bins).map(|t| kin.get(t, col)).collect();
                let est: Vec<f64> = (0..session.n_bins)
                    .map(|t| estimates[t * d + dim])
                    .collect();
                cc.push((name.clone(), scores(&truth, &est).cc));
            }
        }
    }
    Ok(ReplaySummary {
        n_bins: session.n_bins,
        bins_per_second: session.n_bins as f64 / elapsed.max(1e-9),
        cc,
    })
}

pub fn run(args: &Args) -> Result<()> {
    let summary = replay(args)?;
    println!(
        "replayed {} bins through the decode pipeline ({:.0} bins/s); wrote {}",
        summary.n_bins,
        summary.bins_per_second,
        args.out.display()
    );
    if !summary.cc.is_empty() {
        let parts: Vec<String> = summary
            .cc
            .iter()
            .map(|(n, c)| format!("{n} CC {c:.3}"))
            .collect();
        println!("against the block's own kinematics: {}", parts.join(", "));
    }
    Ok(())
}
