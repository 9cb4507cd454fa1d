//! The one way to train a decoder on a session: fit it, cross-validate it
//! for its provenance, and hand back the model file with what the fit did
//! as typed data ([`FitRecord`]). `replay-tool train` parses its flags,
//! opens the session, calls [`train`] (or [`train_refit`] for a closed-loop
//! block) and writes the file.
//!
//! The core starts no threads: a point-process fit's channels are fitted
//! one after another here ([`OneAfterAnother`]), and a caller that may use
//! every core passes its own [`ChannelFits`].

use serde::Serialize;

use crate::decoders::DecoderModel;
use crate::fit::TrainError;
use crate::fit::evaluate::{DecoderSpec, Evaluation, cross_validate};
use crate::fit::intention::{Reestimated, reestimate_intention};
use crate::fit::kalman::{KalmanFitOptions, KalmanFitReport, fit_kalman};
use crate::fit::metrics::Scores;
use crate::fit::point_process::{PointProcessFitOptions, PointProcessFitReport};
use crate::fit::wiener::{WienerFitOptions, fit_wiener};
use crate::formats::block::Block;
use crate::formats::block_rows::{BlockRows, data_sha256};
use crate::formats::model_file::{CrossValidation, ModelFile, OutputScores, Provenance};

/// What a fit did: the options it ran with and its report. Written into
/// the model file's provenance (PROTOCOL.md §4 `fit`) as JSON.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[serde(tag = "decoder", rename_all = "kebab-case")]
pub enum FitRecord {
    Kalman {
        options: KalmanFitOptions,
        report: KalmanFitReport,
    },
    Wiener {
        options: WienerFitOptions,
    },
    PointProcess {
        options: PointProcessFitOptions,
        report: PointProcessFitReport,
    },
}

/// A trained model and what its fit did.
#[derive(Clone, Debug, PartialEq)]
pub struct Trained {
    /// The model file, provenance filled in, ready to write.
    pub model: ModelFile,
    pub fit: FitRecord,
}

/// Who trained, when, and on what: the core reads no clock and opens no
/// file.
#[derive(Clone, Debug)]
pub struct Stamp {
    /// RFC 3339 UTC.
    pub trained_at: String,
    pub tool_version: String,
    /// The calibration blocks, in order, when there are several (written
    /// into the fit document as `blocks`; a model of one block names it by
    /// its data hash alone, as before).
    pub blocks: Vec<BlockSource>,
}

/// One calibration block of several trained as one.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct BlockSource {
    /// The session directory or log, as given.
    pub session: String,
    /// Its valid rows: what training used.
    pub rows: usize,
    /// Its [`data_sha256`].
    pub data_sha256: String,
}

pub use crate::fit::point_process::{ChannelFits, OneAfterAnother, fit_point_process_with};

/// Trains `spec` on `rows`; with `folds`, cross-validates it first for the
/// provenance (`on_fold` after each fold).
pub fn train(
    rows: &(dyn BlockRows + Sync),
    spec: &DecoderSpec,
    folds: Option<usize>,
    stamp: &Stamp,
    fits: &dyn ChannelFits,
    on_fold: &mut dyn FnMut(),
) -> Result<Trained, TrainError> {
    let (decoder, fit, silent_channels) = match spec {
        DecoderSpec::Kalman(opts) => {
            let (model, report) = fit_kalman(rows, opts)?;
            let silent = report.excluded_channels.clone();
            (
                DecoderModel::Kalman(model),
                FitRecord::Kalman {
                    options: opts.clone(),
                    report,
                },
                silent,
            )
        }
        DecoderSpec::Wiener(opts) => (
            DecoderModel::Wiener(fit_wiener(rows, opts)?),
            FitRecord::Wiener {
                options: opts.clone(),
            },
            Vec::new(),
        ),
        DecoderSpec::PointProcess(opts) => {
            let (model, report) = fit_point_process_with(rows, opts, fits)?;
            (
                DecoderModel::PointProcess(model),
                FitRecord::PointProcess {
                    options: opts.clone(),
                    report,
                },
                Vec::new(),
            )
        }
    };
    let cv = match folds {
        Some(k) => {
            let eval = cross_validate(rows, std::slice::from_ref(spec), k, fits, |_, _| on_fold())?;
            Some(cross_validation(&eval))
        }
        None => None,
    };
    let model = ModelFile {
        bin_width: rows.info().bin_width,
        decoder,
        provenance: Provenance {
            trained_at: stamp.trained_at.clone(),
            tool_version: stamp.tool_version.clone(),
            data_sha256: data_sha256(rows)?,
            fit_document: fit_document(&fit, &stamp.blocks),
            silent_channels,
            cv,
        },
        click: None,
        input: rows.info().input,
    };
    // Never hand back a model its readers would refuse.
    model.decoder.validate()?;
    Ok(Trained { model, fit })
}

/// Retrains from a closed-loop block with intention re-estimation (the
/// decoded velocity turned toward the target, zero within
/// `target_radius`), then as [`train`] does; says how many bins it turned.
pub fn train_refit(
    block: &Block,
    target_radius: f64,
    spec: &DecoderSpec,
    folds: Option<usize>,
    stamp: &Stamp,
    fits: &dyn ChannelFits,
    on_fold: &mut dyn FnMut(),
) -> Result<(Trained, Reestimated), TrainError> {
    if !(target_radius.is_finite() && target_radius >= 0.0) {
        return Err(TrainError::Option {
            key: "target radius",
            problem: format!("{target_radius} must be a finite distance ≥ 0"),
        });
    }
    let (refit, counts) = reestimate_intention(block, target_radius)?;
    Ok((train(&refit, spec, folds, stamp, fits, on_fold)?, counts))
}

/// The fit record as JSON, with the blocks when there are several.
fn fit_document(fit: &FitRecord, blocks: &[BlockSource]) -> String {
    if blocks.len() < 2 {
        return serde_json::to_string(fit).expect("a fit record serialises");
    }
    let mut doc = serde_json::to_value(fit).expect("a fit record serialises");
    if let Some(o) = doc.as_object_mut() {
        o.insert(
            "blocks".into(),
            serde_json::to_value(blocks).expect("blocks serialise"),
        );
    }
    serde_json::to_string(&doc).expect("a JSON value serialises")
}

fn cross_validation(eval: &Evaluation) -> CrossValidation {
    let d = &eval.decoders[0];
    let scores = |s: &Scores| OutputScores {
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
