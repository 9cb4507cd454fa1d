//! `replay-tool train`: fit a decoder on a calibration block, cross-validate
//! it for the model's provenance, and write the model file.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};
use decoder_core::decoders::DecoderModel;
use decoder_core::decoders::point_process::{ChannelGlm, PointProcessModel};
use decoder_core::fit::config::TrainConfig;
use decoder_core::fit::evaluate::{DecoderSpec, Evaluation, cross_validate};
use decoder_core::fit::intention::reestimate_intention;
use decoder_core::fit::kalman::fit_kalman;
use decoder_core::fit::point_process::{
    ChannelLeftOut, PointProcessFitOptions, PointProcessFitReport, assemble, fit_channels,
};
use decoder_core::fit::wiener::fit_wiener;
use decoder_core::formats::block_rows::{BlockRows, data_sha256};
use decoder_core::formats::model_file::{CrossValidation, ModelFile, OutputScores, Provenance};
use serde_json::json;

use super::load_train_config;
use crate::output::write_atomic;
use crate::progress;

#[derive(Clone, Copy, Debug, PartialEq, Eq, clap::ValueEnum)]
pub enum DecoderKind {
    Kalman,
    Wiener,
    PointProcess,
}

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Calibration block: a session directory with kinematics, or a
    /// session log recorded with task packets (with --refit, a closed-loop
    /// block or log with cursor, shown velocity and targets).
    #[arg(long)]
    pub session: PathBuf,
    /// Retrain from a closed-loop block or log (such as the session log
    /// `replay-tool closed-loop` records) with intention re-estimation:
    /// decoded velocity turned toward the target, zero inside it (Gilja et
    /// al. 2012).
    #[arg(long)]
    pub refit: bool,
    /// With --refit: the target's acceptance radius, in position units;
    /// inside it the intended velocity is zero [default: the radius the
    /// log's task packets gave, else 2].
    #[arg(long, requires = "refit")]
    pub target_radius: Option<f64>,
    /// Decoder to train.
    #[arg(long, value_enum)]
    pub decoder: DecoderKind,
    /// Model file to write.
    #[arg(long)]
    pub out: PathBuf,
    /// Training options (see config/train.toml); flags override it.
    #[arg(long)]
    pub config: Option<PathBuf>,
    /// Bins by which the counts lead the kinematics they are paired with.
    #[arg(long)]
    pub lag: Option<usize>,
    /// Ridge penalty λ; 0 fits without a penalty.
    #[arg(long)]
    pub ridge: Option<f64>,
    /// Point-process only: fit encoding models without spike history.
    #[arg(long)]
    pub no_history: bool,
    /// Skip the cross-validation that fills the model's `cv` scores.
    #[arg(long)]
    pub no_cv: bool,
}

/// The validated configuration after flags.
pub fn config_with_overrides(
    config: Option<&Path>,
    lag: Option<usize>,
    ridge: Option<f64>,
) -> Result<TrainConfig> {
    let mut cfg = load_train_config(config)?;
    if let Some(lag) = lag {
        cfg.override_lag(lag)?;
    }
    if let Some(ridge) = ridge {
        cfg.override_ridge(ridge)?;
    }
    Ok(cfg)
}

pub fn spec_for(kind: DecoderKind, cfg: &TrainConfig) -> Result<DecoderSpec> {
    match kind {
        DecoderKind::Kalman => Ok(DecoderSpec::Kalman(cfg.kalman.clone())),
        DecoderKind::Wiener => Ok(DecoderSpec::Wiener(cfg.wiener.clone())),
        DecoderKind::PointProcess => Ok(DecoderSpec::PointProcess(cfg.point_process.clone())),
    }
}

/// Trains and returns the model file (not yet written).
pub fn train_model(
    session: &(dyn BlockRows + Sync),
    spec: &DecoderSpec,
    folds: Option<usize>,
) -> Result<ModelFile> {
    let (decoder, fit, silent_channels) = match spec {
        DecoderSpec::Kalman(opts) => {
            let (model, report) = fit_kalman(session, opts)?;
            let silent = report.excluded_channels.clone();
            (
                DecoderModel::Kalman(model),
                json!({ "decoder": "kalman", "options": opts, "report": report }),
                silent,
            )
        }
        DecoderSpec::Wiener(opts) => {
            let model = fit_wiener(session, opts)?;
            (
                DecoderModel::Wiener(model),
                json!({ "decoder": "wiener", "options": opts }),
                Vec::new(),
            )
        }
        DecoderSpec::PointProcess(opts) => {
            let (model, report) = fit_point_process_parallel(session, opts)?;
            (
                DecoderModel::PointProcess(model),
                json!({ "decoder": "point-process", "options": opts, "report": report }),
                Vec::new(),
            )
        }
    };
    let cv = match folds {
        Some(k) => {
            let pb = progress::bar(k as u64, "cross-val");
            let eval = cross_validate(session, std::slice::from_ref(spec), k, |_, _| pb.inc(1))?;
            pb.finish_and_clear();
            Some(cross_validation(&eval))
        }
        None => None,
    };
    Ok(ModelFile {
        bin_width: session.info().bin_width,
        decoder,
        provenance: Provenance {
            trained_at: humantime::format_rfc3339_seconds(std::time::SystemTime::now()).to_string(),
            tool_version: env!("CARGO_PKG_VERSION").to_string(),
            data_sha256: data_sha256(session)?,
            fit_document: fit.to_string(),
            silent_channels,
            cv,
        },
    })
}

fn cross_validation(eval: &Evaluation) -> CrossValidation {
    let d = &eval.decoders[0];
    let scores = |s: &decoder_core::fit::metrics::Scores| OutputScores {
        cc: s.cc,
        r2: s.r2,
        rmse: s.rmse,
    };
    CrossValidation {
        folds: eval.folds as u32,
        by_trial: eval.by_trial,
        outputs: d.outputs.clone(),
        mean: d.mean.iter().map(scores).collect(),
        per_fold: d
            .per_fold
            .iter()
            .map(|f| f.iter().map(scores).collect())
            .collect(),
    }
}

/// Fits the point-process decoder, its channels in parallel on all cores
/// (each channel's GLM is independent of the others): channels are dealt
/// to one group per core, each group fitted side by side in its own passes
/// over the block.
pub fn fit_point_process_parallel(
    session: &(dyn BlockRows + Sync),
    options: &PointProcessFitOptions,
) -> Result<(PointProcessModel, PointProcessFitReport)> {
    let info = session.info();
    if !info.has_kinematics {
        return Err(decoder_core::TrainError::NoKinematics.into());
    }
    decoder_core::fit::kalman::state_sources(&info.kinematic_names, &options.state)?;
    let n = info.n_channels;
    let threads = std::thread::available_parallelism()
        .map_or(1, |t| t.get())
        .min(n.max(1));
    let groups: Vec<Vec<usize>> = (0..threads)
        .map(|g| (g..n).step_by(threads).collect())
        .collect();
    let pb = progress::bar(threads as u64, "fit GLMs");
    let results: Vec<Result<Vec<Result<ChannelGlm, ChannelLeftOut>>, decoder_core::TrainError>> =
        std::thread::scope(|scope| {
            let handles: Vec<_> = groups
                .iter()
                .map(|channels| {
                    let pb = &pb;
                    scope.spawn(move || {
                        let fits = fit_channels(session, options, channels);
                        pb.inc(1);
                        fits
                    })
                })
                .collect();
            handles
                .into_iter()
                .map(|h| h.join().expect("a fitting thread panicked"))
                .collect()
        });
    pb.finish_and_clear();
    let mut fits: Vec<Result<ChannelGlm, ChannelLeftOut>> =
        (0..n).map(|_| Err(ChannelLeftOut::NotRun)).collect();
    for (channels, group) in groups.iter().zip(results) {
        for (&c, fit) in channels.iter().zip(group?) {
            fits[c] = fit;
        }
    }
    let (model, report) = assemble(session, options, fits)?;
    for (c, why) in &report.excluded {
        tracing::warn!("channel {c} left out of the point-process model: {why}");
    }
    Ok((model, report))
}

pub fn run(args: &Args) -> Result<()> {
    let mut cfg = config_with_overrides(args.config.as_deref(), args.lag, args.ridge)?;
    if args.no_history && args.decoder != DecoderKind::PointProcess {
        bail!("--no-history applies to --decoder point-process only");
    }
    if args.no_history {
        cfg.point_process.history = None;
        cfg.point_process.coupling = false;
    }
    let spec = spec_for(args.decoder, &cfg)?;
    let source = args.session.clone();
    let folds = if args.no_cv { None } else { Some(cfg.folds) };
    let model = if args.refit {
        let super::SessionBlock {
            block,
            target_radius: logged_radius,
        } = super::block_with_kinematics(&source)?;
        let radius = args.target_radius.or(logged_radius).unwrap_or(2.0);
        if !(radius.is_finite() && radius >= 0.0) {
            bail!("--target-radius {radius}: must be a finite distance ≥ 0");
        }
        let (refit, n) = reestimate_intention(&block, radius)
            .with_context(|| format!("re-estimating intention in {}", source.display()))?;
        println!(
            "intention re-estimated in {}: {} bins turned toward the target, {} zeroed inside it, {} outside trials left as decoded",
            source.display(),
            n.rotated,
            n.zeroed,
            n.untouched
        );
        // Bins that never came, or came before the task said anything,
        // train nothing (a pass visits the valid rows only).
        super::warn_unused_kinematics(&refit.kinematic_names, &source, &spec);
        train_model(&refit, &spec, folds)
    } else {
        // Read in passes, a chunk at a time.
        let session = super::rows_with_kinematics(&source)?;
        super::warn_unused_kinematics(&session.rows.info().kinematic_names, &source, &spec);
        train_model(&session.rows, &spec, folds)
    }
    .with_context(|| format!("training on {}", source.display()))?;
    // Never write a file its readers would refuse.
    ModelFile::from_bytes(&model.to_bytes(), &args.out.display().to_string()).with_context(
        || {
            format!(
                "the model trained on {} cannot be written",
                source.display()
            )
        },
    )?;
    write_atomic(&args.out, &model.to_bytes())?;
    println!(
        "wrote {} ({} decoder, {} channels, {} ms bins)",
        args.out.display(),
        model.decoder.kind(),
        model.decoder.n_channels(),
        model.bin_width.ms()
    );
    if let DecoderModel::PointProcess(m) = &model.decoder {
        println!(
            "point-process encoding models: {} channels fitted of {}, history {}",
            m.channels.iter().flatten().count(),
            m.n_channels(),
            if m.history_basis.is_some() {
                "yes"
            } else {
                "no (LNP)"
            }
        );
        for (c, why) in &m.excluded {
            println!("left out: channel {c} ({why})");
        }
    }
    print_cv_line(&model);
    Ok(())
}

pub fn print_cv_line(model: &ModelFile) {
    if let Some(cv) = &model.provenance.cv {
        let parts: Vec<String> = cv
            .outputs
            .iter()
            .zip(&cv.mean)
            .map(|(o, s)| format!("{o} CC {:.3} R² {:.3}", s.cc, s.r2))
            .collect();
        println!("cross-validated ({} folds): {}", cv.folds, parts.join(", "));
    }
}
