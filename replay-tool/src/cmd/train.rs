//! `replay-tool train`: fit a decoder on a calibration block, cross-validate
//! it for the model's provenance, and write the model file.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};
use decoder_core::decoders::DecoderModel;
use decoder_core::decoders::click::ClickModel;
use decoder_core::decoders::point_process::ChannelGlm;
use decoder_core::fit::click::fit_click;
use decoder_core::fit::config::TrainConfig;
use decoder_core::fit::evaluate::DecoderSpec;
use decoder_core::fit::point_process::{ChannelLeftOut, PointProcessFitOptions, fit_channels};
use decoder_core::formats::block_rows::{BlockRows, Joined, data_sha256};
use decoder_core::formats::log_block::LogBlockSummary;
use decoder_core::formats::model_file::ModelFile;
use decoder_core::session::open::Session;
use decoder_core::session::train::{
    BlockSource, ChannelFits, FitRecord, Stamp, Trained, train, train_refit,
};
use decoder_core::{Block, TrainError};

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
    /// block or log with cursor, shown velocity and targets). Give it
    /// several times to train on the blocks together (same channels and
    /// bin width; no row is paired across a block's edge).
    #[arg(long, required = true)]
    pub session: Vec<PathBuf>,
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
    /// Kalman and Wiener: per-block normalisation. With several --session
    /// blocks, each block's counts are centred on their own means
    /// (z-scored by their own deviations with
    /// kalman.count_normalisation = "z-scored"), so each block keeps its
    /// own baselines; the model decodes with the last block's. Same as
    /// per_block_normalisation = true in the config.
    #[arg(long)]
    pub per_block: bool,
    /// Point-process only: fit encoding models without spike history.
    #[arg(long)]
    pub no_history: bool,
    /// Skip the cross-validation that fills the model's `cv` scores.
    #[arg(long)]
    pub no_cv: bool,
    /// Also fit a click decoder from the block's click cues (click.npy)
    /// into the same model file: a linear discriminant on the counts of
    /// the last --click-lags bins, filtered by a two-state hidden Markov
    /// model.
    #[arg(long)]
    pub click: bool,
    /// With --click: bins of counts the discriminant reads (the current
    /// one and those before it).
    #[arg(long, requires = "click", default_value_t = decoder_core::fit::click::DEFAULT_LAGS)]
    pub click_lags: usize,
    /// With --click: shrinkage of the discriminant's covariance toward its
    /// mean variance, 0 to 1.
    #[arg(long, requires = "click", default_value_t = decoder_core::fit::click::DEFAULT_SHRINKAGE)]
    pub click_shrinkage: f64,
}

/// The validated configuration after flags.
pub fn config_with_overrides(
    config: Option<&Path>,
    lag: Option<usize>,
    ridge: Option<f64>,
) -> Result<TrainConfig> {
    let mut cfg = TrainConfig::read(config)?;
    if let Some(lag) = lag {
        cfg.override_lag(lag)?;
    }
    if let Some(ridge) = ridge {
        cfg.override_ridge(ridge)?;
    }
    Ok(cfg)
}

pub fn spec_for(kind: DecoderKind, cfg: &TrainConfig) -> DecoderSpec {
    match kind {
        DecoderKind::Kalman => DecoderSpec::Kalman(cfg.kalman.clone()),
        DecoderKind::Wiener => DecoderSpec::Wiener(cfg.wiener.clone()),
        DecoderKind::PointProcess => DecoderSpec::PointProcess(cfg.point_process.clone()),
    }
}

/// This run's stamp: when (the tool reads the clock, the core does not)
/// and which version.
pub fn stamp() -> Stamp {
    Stamp {
        trained_at: humantime::format_rfc3339_seconds(std::time::SystemTime::now()).to_string(),
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        blocks: Vec::new(),
    }
}

/// A point-process fit's channels side by side on every core: channels
/// are dealt to one group per core, each group fitted in its own passes
/// over the block (each channel's GLM is independent of the others).
pub struct SideBySide;

impl ChannelFits for SideBySide {
    fn fit(
        &self,
        rows: &(dyn BlockRows + Sync),
        options: &PointProcessFitOptions,
        n: usize,
    ) -> Result<Vec<Result<ChannelGlm, ChannelLeftOut>>, TrainError> {
        let threads = std::thread::available_parallelism()
            .map_or(1, |t| t.get())
            .min(n.max(1));
        let groups: Vec<Vec<usize>> = (0..threads)
            .map(|g| (g..n).step_by(threads).collect())
            .collect();
        let pb = progress::bar(threads as u64, "fit GLMs");
        let results: Vec<_> = std::thread::scope(|scope| {
            let handles: Vec<_> = groups
                .iter()
                .map(|channels| {
                    let pb = &pb;
                    scope.spawn(move || {
                        let fits = fit_channels(rows, options, channels);
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
        Ok(fits)
    }
}

/// Runs a training with a progress bar over its cross-validation folds.
fn with_fold_progress<T>(
    folds: Option<usize>,
    run: impl FnOnce(&mut dyn FnMut()) -> Result<T, TrainError>,
) -> Result<T> {
    let pb = progress::bar(folds.unwrap_or(0) as u64, "cross-val");
    let done = run(&mut || pb.inc(1))?;
    pb.finish_and_clear();
    Ok(done)
}

/// Trains `spec` on `rows` with a progress bar over the folds.
pub fn train_with_progress(
    rows: &(dyn BlockRows + Sync),
    spec: &DecoderSpec,
    folds: Option<usize>,
) -> Result<Trained> {
    train_stamped(rows, spec, folds, &stamp())
}

fn train_stamped(
    rows: &(dyn BlockRows + Sync),
    spec: &DecoderSpec,
    folds: Option<usize>,
    stamp: &Stamp,
) -> Result<Trained> {
    with_fold_progress(folds, |on_fold| {
        train(rows, spec, folds, stamp, &SideBySide, on_fold)
    })
}

pub fn run(args: &Args) -> Result<()> {
    let mut cfg = config_with_overrides(args.config.as_deref(), args.lag, args.ridge)?;
    if args.no_history && args.decoder != DecoderKind::PointProcess {
        bail!("--no-history applies to --decoder point-process only");
    }
    if args.per_block {
        cfg.set_per_block(true);
    }
    if cfg.per_block && args.decoder == DecoderKind::PointProcess {
        bail!(
            "per-block normalisation (--per-block, per_block_normalisation) applies to --decoder kalman and wiener; the point-process fit has one intercept per channel: train it without, or on one block"
        );
    }
    if args.no_history {
        cfg.point_process.history = None;
        cfg.point_process.coupling = false;
    }
    let spec = spec_for(args.decoder, &cfg);
    let folds = if args.no_cv { None } else { Some(cfg.folds) };
    if args.session.len() > 1 {
        if args.click {
            bail!(
                "--click fits the click decoder from one block; give --session once (the velocity decoder can train on several)"
            );
        }
        if args.refit {
            bail!(
                "--refit retrains from one closed-loop block or log; give --session once (or refit each and train on the refit blocks)"
            );
        }
        let trained = train_several(&args.session, &spec, folds)?;
        return write_model(args, trained, &describe_sessions(&args.session));
    }
    let source = &args.session[0];
    let session = Session::at(source)?;
    let trained = if args.refit {
        let opened = session.block_with_kinematics()?;
        if let Some(s) = &opened.from_log {
            print_log_rows(source, s);
        }
        let logged_radius = opened.from_log.as_ref().and_then(|s| s.target_radius);
        let radius = args.target_radius.or(logged_radius).unwrap_or(2.0);
        super::warn_unused_kinematics(&opened.block.kinematic_names, source, &spec);
        let (trained, n) = with_fold_progress(folds, |on_fold| {
            train_refit(
                &opened.block,
                radius,
                &spec,
                folds,
                &stamp(),
                &SideBySide,
                on_fold,
            )
        })
        .with_context(|| format!("training on {}", source.display()))?;
        println!(
            "intention re-estimated in {}: {} bins turned toward the target, {} zeroed inside it, {} outside trials left as decoded",
            source.display(),
            n.rotated,
            n.zeroed,
            n.untouched
        );
        trained
    } else {
        // Read in passes, a chunk at a time.
        let opened = session.rows_with_kinematics()?;
        if let Some(s) = &opened.from_log {
            print_log_rows(source, s);
        }
        super::warn_unused_kinematics(&opened.rows.info().kinematic_names, source, &spec);
        train_with_progress(&opened.rows, &spec, folds)
            .with_context(|| format!("training on {}", source.display()))?
    };
    write_model(args, trained, &source.display().to_string())
}

fn describe_sessions(sessions: &[PathBuf]) -> String {
    format!(
        "{} blocks ({})",
        sessions.len(),
        sessions
            .iter()
            .map(|s| s.display().to_string())
            .collect::<Vec<_>>()
            .join(", ")
    )
}

/// Trains on several blocks as one calibration set: each opened and read
/// in passes as a single block is, joined end to end with no row paired
/// across a block's edge, every block named in the model's provenance.
fn train_several(
    sessions: &[PathBuf],
    spec: &DecoderSpec,
    folds: Option<usize>,
) -> Result<Trained> {
    let mut opened = Vec::with_capacity(sessions.len());
    for source in sessions {
        let rows = Session::at(source)?.rows_with_kinematics()?;
        if let Some(s) = &rows.from_log {
            print_log_rows(source, s);
        }
        super::warn_unused_kinematics(&rows.rows.info().kinematic_names, source, spec);
        opened.push(rows);
    }
    let mut blocks = Vec::with_capacity(sessions.len());
    for (source, o) in sessions.iter().zip(&opened) {
        blocks.push(BlockSource {
            session: source.display().to_string(),
            rows: o.rows.info().n_bins,
            data_sha256: data_sha256(&o.rows)
                .with_context(|| format!("reading {}", source.display()))?,
        });
    }
    let joined = Joined::new(
        sessions
            .iter()
            .zip(&opened)
            .map(|(s, o)| (s.display().to_string(), &o.rows as &(dyn BlockRows + Sync)))
            .collect(),
    )
    .context("--session blocks are trained as one calibration set")?;
    for b in &blocks {
        println!("   block {}: {} rows", b.session, b.rows);
    }
    let stamp = Stamp { blocks, ..stamp() };
    train_stamped(&joined, spec, folds, &stamp)
        .with_context(|| format!("training on {}", describe_sessions(sessions)))
}

/// The click decoder of `block`'s click cues (its valid rows).
fn fit_click_on(args: &Args, block: &Block, source: &Path) -> Result<ClickModel> {
    if block.input != decoder_core::wire::packet::BinKind::Counts {
        bail!(
            "{}: --click fits the click decoder on spike counts, and this block holds features; train the velocity decoder without --click",
            source.display()
        );
    }
    let block = block.valid_only();
    let click = super::click::click_cues(&block, source)?;
    let model = fit_click(
        &block.counts,
        block.n_channels,
        click,
        args.click_lags,
        args.click_shrinkage,
    )
    .with_context(|| format!("fitting the click decoder on {}", source.display()))?;
    println!(
        "click decoder: {} lags, {} cued click bins of {} ({:.1} %), P(stay at rest) {:.4}, P(stay in a click) {:.4}",
        model.lags,
        click.iter().filter(|c| **c).count(),
        click.len(),
        100.0 * model.prior_click,
        model.stay_rest,
        model.stay_click
    );
    Ok(model)
}

/// Cross-validated click scores for the model's fit document, as
/// `evaluate --click` computes them.
fn click_scores_on(
    args: &Args,
    block: &Block,
    source: &Path,
    folds: usize,
) -> Result<serde_json::Value> {
    let s =
        super::click::click_scores(block, source, args.click_lags, args.click_shrinkage, folds)?;
    println!(
        "click decoder cross-validated ({folds} contiguous folds): AUC {:.3}, {} of {} attempts caught, {:.2} false clicks a minute",
        s.auc, s.caught, s.cues, s.false_per_minute
    );
    Ok(serde_json::to_value(s)?)
}

fn write_model(args: &Args, trained: Trained, source: &str) -> Result<()> {
    let mut model = trained.model;
    if args.click {
        let source = &args.session[0];
        let block = Session::at(source)?.block_with_kinematics()?.block;
        let click = fit_click_on(args, &block, source)?;
        // The click decoder's options, and its cross-validated scores unless
        // --no-cv, in the fit document beside the velocity decoder's.
        let cv = if args.no_cv {
            serde_json::Value::Null
        } else {
            let folds = TrainConfig::read(args.config.as_deref())?.folds;
            click_scores_on(args, &block, source, folds)?
        };
        let mut doc: serde_json::Value =
            serde_json::from_str(&model.provenance.fit_document).unwrap_or_default();
        if let Some(o) = doc.as_object_mut() {
            o.insert(
                "click".into(),
                serde_json::json!({
                    "lags": args.click_lags,
                    "shrinkage": args.click_shrinkage,
                    "cv": cv,
                }),
            );
            model.provenance.fit_document = doc.to_string();
        }
        model.click = Some(click);
    }
    // Never write a file its readers would refuse.
    let bytes = model.to_bytes();
    ModelFile::from_bytes(&bytes, &args.out.display().to_string())
        .with_context(|| format!("the model trained on {source} cannot be written",))?;
    write_atomic(&args.out, &bytes)?;
    println!(
        "wrote {} ({} decoder, {} channels, {} ms bins)",
        args.out.display(),
        model.decoder.kind(),
        model.decoder.n_channels(),
        model.bin_width.ms()
    );
    if let (DecoderModel::PointProcess(m), FitRecord::PointProcess { report, .. }) =
        (&model.decoder, &trained.fit)
    {
        for (c, why) in &report.excluded {
            tracing::warn!("channel {c} left out of the point-process model: {why}");
        }
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

/// What reading a session log as a block found, for the operator.
pub fn print_log_rows(source: &Path, s: &LogBlockSummary) {
    eprintln!(
        "replay-tool: {}: {} slots, {} valid for training ({} bins missing, {} before the first task packet)",
        source.display(),
        s.rows,
        s.valid_rows,
        s.bins_missing,
        s.rows_without_task_state
    );
}
