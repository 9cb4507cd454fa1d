//! `replay-tool evaluate`: cross-validated scores of one or more decoders on
//! a block, always beside the Wiener baseline, as a table and optionally a
//! report directory (CSV, JSON, plots of decoded against true velocity).
//! Many sessions at once (`--sessions LIST --shard I/N`, then `--merge`)
//! are in [`super::evaluate_many`].

use std::fmt::Write as _;
use std::path::PathBuf;

use anyhow::{Context, Result};
use decoder_core::fit::evaluate::{DecoderSpec, Evaluation, cross_validate};

use super::train::SideBySide;
use decoder_core::formats::block_rows::BlockRows;

use super::train::{DecoderKind, config_with_overrides, spec_for};
use crate::output::write_atomic;
use crate::{plot, progress};
use decoder_core::session::open::Session;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Block to evaluate on: a session directory with kinematics, or a
    /// session log recorded with task packets.
    #[arg(long, required_unless_present_any = ["sessions", "merge"], conflicts_with_all = ["sessions", "merge"])]
    pub session: Option<PathBuf>,
    /// A list of sessions, one path per line (directories or logs; blank
    /// lines and lines starting with # are skipped), evaluated into
    /// --report DIR one file per session.
    #[arg(long, requires = "report", conflicts_with = "merge")]
    pub sessions: Option<PathBuf>,
    /// With --sessions: evaluate only share I of N (I from 1 to N;
    /// sessions I, I + N, I + 2N, … of the list), as one task of a job
    /// array. Default 1/1.
    #[arg(long, requires = "sessions")]
    pub shard: Option<String>,
    /// Merge the per-session results that sharded runs wrote into DIR:
    /// the combined table, a summary per decoder and a plot.
    #[arg(long, value_name = "DIR")]
    pub merge: Option<PathBuf>,
    /// Decoders to compare, comma-separated (kalman, wiener,
    /// point-process); the Wiener baseline is always added.
    #[arg(long, value_enum, value_delimiter = ',', default_value = "kalman")]
    pub decoders: Vec<DecoderKind>,
    /// Number of folds (whole trials when the block has trials.csv).
    #[arg(long)]
    pub folds: Option<usize>,
    /// Folder for scores.csv, evaluation.json and plots (created).
    #[arg(long)]
    pub report: Option<PathBuf>,
    /// Training options (see config/train.toml); flags override it.
    #[arg(long)]
    pub config: Option<PathBuf>,
    /// Bins by which the counts lead the kinematics they are paired with
    /// (overrides lag_bins).
    #[arg(long)]
    pub lag: Option<usize>,
    /// Ridge penalty λ for every decoder; 0 fits without a penalty
    /// (overrides the ridge keys).
    #[arg(long)]
    pub ridge: Option<f64>,
    /// Also cross-validate a click decoder on the block's click cues
    /// (click.npy): AUC, cues caught within 300 ms of their end, false
    /// clicks per minute, latency; written to click.json with --report.
    #[arg(long, conflicts_with_all = ["sessions", "merge"])]
    pub click: bool,
}

pub fn run(args: &Args) -> Result<()> {
    if let Some(dir) = &args.merge {
        return super::evaluate_many::merge(dir);
    }
    let cfg = config_with_overrides(args.config.as_deref(), args.lag, args.ridge)?;
    let folds = args.folds.unwrap_or(cfg.folds);
    let specs = specs(&args.decoders, &cfg)?;
    if let Some(list) = &args.sessions {
        let report = args.report.as_deref().expect("clap requires --report");
        return super::evaluate_many::run_shard(
            list,
            args.shard.as_deref().unwrap_or("1/1"),
            report,
            &specs,
            folds,
        );
    }
    let session_path = args.session.as_ref().expect("clap requires --session");
    // Read in passes, a chunk at a time: memory does not grow with the
    // block's length.
    let session = Session::at(session_path)?.rows_with_kinematics()?;
    if let Some(s) = &session.from_log {
        super::train::print_log_rows(session_path, s);
    }
    let info = session.rows.info();
    for spec in &specs {
        super::warn_unused_kinematics(&info.kinematic_names, session_path, spec);
    }
    let pb = progress::bar((folds * specs.len()) as u64, "evaluate");
    let eval = cross_validate(&session.rows, &specs, folds, &SideBySide, |_, _| pb.inc(1))
        .with_context(|| format!("evaluating on {}", session_path.display()))?;
    pb.finish_and_clear();
    print!("{}", table(&eval));
    print!("{}", goodness_table(&eval));
    let click = if args.click {
        Some(evaluate_click(session_path, folds)?)
    } else {
        None
    };
    if let Some(dir) = &args.report {
        write_report(dir, &eval, info.bin_width.ms())?;
        if let Some(c) = &click {
            write_atomic(
                &dir.join("click.json"),
                serde_json::to_string_pretty(c)?.as_bytes(),
            )?;
        }
        println!("report: {}", dir.display());
    }
    Ok(())
}

/// `evaluate --click`: the scores of `train --click`'s defaults, printed.
fn evaluate_click(
    session_path: &std::path::Path,
    folds: usize,
) -> Result<decoder_core::fit::click::ClickScores> {
    use decoder_core::fit::click::{DEFAULT_LAGS, DEFAULT_SHRINKAGE};
    let block = Session::at(session_path)?.block_with_kinematics()?.block;
    let s =
        super::click::click_scores(&block, session_path, DEFAULT_LAGS, DEFAULT_SHRINKAGE, folds)?;
    println!(
        "click decoder ({folds} contiguous folds): AUC {:.3}; {} of {} cued attempts caught within {} ms of their end (median latency from the cue {}); {:.2} false clicks a minute",
        s.auc,
        s.caught,
        s.cues,
        s.catch_ms,
        s.median_latency_ms
            .map_or("n/a".to_string(), |l| format!("{l:.0} ms")),
        s.false_per_minute
    );
    Ok(s)
}

/// The decoder specs to compare: the kinds asked for and always the
/// Wiener baseline; the point-process decoder in its forms.
pub fn specs(
    decoders: &[DecoderKind],
    cfg: &decoder_core::fit::config::TrainConfig,
) -> Result<Vec<DecoderSpec>> {
    let mut kinds = decoders.to_vec();
    if !kinds.contains(&DecoderKind::Wiener) {
        kinds.push(DecoderKind::Wiener);
    }
    // The point-process decoder is compared in its forms: without history
    // (LNP), with history, and with coupling when the config enables it.
    let mut specs = Vec::new();
    for k in &kinds {
        if *k == DecoderKind::PointProcess {
            let full = cfg.point_process.clone();
            let mut lnp = full.clone();
            lnp.history = None;
            lnp.coupling = false;
            specs.push(DecoderSpec::PointProcess(lnp));
            let mut history = full.clone();
            history.coupling = false;
            if history.history.is_some() {
                specs.push(DecoderSpec::PointProcess(history));
            }
            if full.coupling {
                specs.push(DecoderSpec::PointProcess(full));
            }
        } else {
            specs.push(spec_for(*k, cfg));
        }
    }
    Ok(specs)
}

/// The per-fold and mean table, as printed.
pub fn table(eval: &Evaluation) -> String {
    let mut s = String::new();
    let unit = if eval.by_trial {
        "trials"
    } else {
        "contiguous blocks"
    };
    let _ = writeln!(s, "{}-fold cross-validation by {unit}", eval.folds);
    let _ = writeln!(
        s,
        "{:<8} {:>5} {:<8} {:>7} {:>7} {:>8}",
        "decoder", "fold", "output", "CC", "R²", "RMSE"
    );
    for d in &eval.decoders {
        for (f, fold) in d.per_fold.iter().enumerate() {
            for (dim, sc) in fold.iter().enumerate() {
                let _ = writeln!(
                    s,
                    "{:<8} {:>5} {:<8} {:>7.3} {:>7.3} {:>8.3}",
                    d.decoder,
                    f + 1,
                    d.outputs[dim],
                    sc.cc,
                    sc.r2,
                    sc.rmse
                );
            }
        }
        for (dim, sc) in d.mean.iter().enumerate() {
            let _ = writeln!(
                s,
                "{:<8} {:>5} {:<8} {:>7.3} {:>7.3} {:>8.3}",
                d.decoder, "mean", d.outputs[dim], sc.cc, sc.r2, sc.rmse
            );
        }
    }
    s
}

/// One line per point-process decoder: how many channels' encoding models
/// pass the time-rescaling KS test, and the information they carry.
pub fn goodness_table(eval: &Evaluation) -> String {
    let mut s = String::new();
    if let Some(g) = eval.goodness.first() {
        let multi: u64 = g.channels.iter().map(|c| c.multi_spike_bins).sum();
        let _ = writeln!(
            s,
            "goodness of fit (time rescaling, Brown et al. 2002): a channel whose model is right falls outside the 95 % KS band about 1 time in 20, so expect about {:.0} of {} outside by chance; {multi} held-out channel-bins held more than one spike (their spikes are placed at seeded uniform positions inside the bin, which keeps the test exact for a correct model)",
            0.05 * g.channels.len() as f64,
            g.channels.len()
        );
    }
    for g in &eval.goodness {
        let _ = writeln!(
            s,
            "{:<10} encoding models on held-out bins: {} of {} channels within the KS 95 % band; {:.3} bits/spike over a homogeneous Poisson model",
            g.decoder,
            g.within_band,
            g.channels.len(),
            g.mean_bits_per_spike
        );
    }
    s
}

pub fn write_report(dir: &std::path::Path, eval: &Evaluation, bin_ms: f64) -> Result<()> {
    std::fs::create_dir_all(dir)
        .with_context(|| format!("cannot create report directory {}", dir.display()))?;
    let mut csv = String::from("decoder,fold,output,cc,r2,rmse\n");
    for d in &eval.decoders {
        let rows = d
            .per_fold
            .iter()
            .enumerate()
            .map(|(f, s)| ((f + 1).to_string(), s))
            .chain(std::iter::once(("mean".to_string(), &d.mean)));
        for (fold, fold_scores) in rows {
            for (dim, sc) in fold_scores.iter().enumerate() {
                let _ = writeln!(
                    csv,
                    "{},{},{},{:?},{:?},{:?}",
                    d.decoder, fold, d.outputs[dim], sc.cc, sc.r2, sc.rmse
                );
            }
        }
    }
    write_atomic(&dir.join("scores.csv"), csv.as_bytes())?;
    write_atomic(
        &dir.join("evaluation.json"),
        serde_json::to_string_pretty(eval)?.as_bytes(),
    )?;
    plot::held_out_velocity(
        &eval.traces,
        bin_ms,
        eval.by_trial,
        &dir.join("held-out-velocity"),
    )?;
    if !eval.goodness.is_empty() {
        let mut csv = String::from(
            "decoder,channel,spikes,ks,ks_resolution,band_95,within_band,bits_per_spike\n",
        );
        for g in &eval.goodness {
            for c in &g.channels {
                let _ = writeln!(
                    csv,
                    "{},{},{},{:?},{:?},{:?},{},{:?}",
                    g.decoder,
                    c.channel,
                    c.spikes,
                    c.ks,
                    c.ks_resolution,
                    c.band,
                    c.within_band,
                    c.bits_per_spike
                );
            }
        }
        write_atomic(&dir.join("goodness-of-fit.csv"), csv.as_bytes())?;
        plot::ks_plots(&eval.goodness, &dir.join("ks-plots"))?;
    }
    Ok(())
}
