//! The model file: a trained decoder with its provenance, as `train` writes
//! it and `replay`, `model show` and the daemon load it.
//!
//! Layout (little-endian): 8-byte magic `VDECMODL`, u32 format version, u64
//! payload length, u32 CRC-32 of the payload, then the payload (bincode of
//! [`ModelFile`]). A wrong magic, version, length or checksum is refused
//! before anything is decoded, so a truncated copy or a file of another kind
//! never reaches the filter. The JSON export (PROTOCOL.md §4) is in [`export_json`].

use std::path::Path;

use serde::{Deserialize, Serialize};
use serde_json::{Value, json};

use crate::bin_width::BinWidth;
use crate::decoders::DecoderModel;
use crate::decoders::click::ClickModel;
use crate::engine::pipeline::{DecodePipeline, PipelineError};
use crate::wire::packet::BinKind;

pub const MODEL_MAGIC: &[u8; 8] = b"VDECMODL";
/// Version 4 says what the model decodes (counts or continuous features);
/// version 3 (a click decoder beside the velocity decoder), version 2
/// (typed provenance) and version 1 (scores as JSON text) files are still
/// read, as models of counts.
pub const MODEL_FORMAT_VERSION: u32 = 4;
const HEADER_LEN: usize = 8 + 4 + 8 + 4;
/// Largest payload a model file may declare (1 GiB).
const MAX_PAYLOAD: usize = 1 << 30;

/// Where a model came from.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Provenance {
    /// RFC 3339 UTC time of training (supplied by the caller; this crate
    /// reads no clock).
    pub trained_at: String,
    pub tool_version: String,
    /// [`crate::formats::block::Block::data_sha256`] of the training block.
    pub data_sha256: String,
    /// The fit's options and report as a JSON document, exported verbatim
    /// (PROTOCOL.md §4 `fit`) and never read back here; the options are
    /// each decoder's own training types, which this layer does not know.
    pub fit_document: String,
    /// Channels the fit gave no weight (silent in the training block).
    pub silent_channels: Vec<usize>,
    /// Cross-validated scores, when they were run.
    pub cv: Option<CrossValidation>,
}

/// Cross-validated scores of the decoder on its training block.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct CrossValidation {
    pub folds: u32,
    /// Folds are runs of whole trials (else contiguous runs of bins).
    pub by_trial: bool,
    pub outputs: Vec<String>,
    /// Per output, over the folds.
    pub mean: Vec<OutputScores>,
    /// Per fold, per output.
    pub per_fold: Vec<Vec<OutputScores>>,
}

/// Held-out scores of one output.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct OutputScores {
    pub cc: f64,
    pub r2: f64,
    pub rmse: f64,
}

impl Provenance {
    /// Provenance of a model built in code rather than trained from a block
    /// (tests, benchmarks): every field empty, no fit document, no scores.
    pub fn untracked() -> Provenance {
        Provenance {
            trained_at: String::new(),
            tool_version: String::new(),
            data_sha256: String::new(),
            fit_document: "null".into(),
            silent_channels: Vec::new(),
            cv: None,
        }
    }
}

/// The version 1 layout, read and converted; never written.
mod v1 {
    use serde::Deserialize;

    use super::{BinWidth, CrossValidation, DecoderModel, ModelFile, Provenance};

    #[derive(Deserialize)]
    pub struct ProvenanceV1 {
        trained_at: String,
        tool_version: String,
        data_sha256: String,
        fit_json: String,
        cv_json: String,
    }

    #[derive(Deserialize)]
    pub struct ModelFileV1 {
        #[serde(with = "crate::bin_width::as_ms")]
        bin_width: BinWidth,
        decoder: DecoderModel,
        provenance: ProvenanceV1,
    }

    impl From<ModelFileV1> for ModelFile {
        fn from(m: ModelFileV1) -> ModelFile {
            let p = m.provenance;
            let fit: serde_json::Value = serde_json::from_str(&p.fit_json).unwrap_or_default();
            let silent_channels = fit["report"]["excluded_channels"]
                .as_array()
                .map(|a| {
                    a.iter()
                        .filter_map(|v| v.as_u64())
                        .map(|c| c as usize)
                        .collect()
                })
                .unwrap_or_default();
            // Scores written by version 1 have this struct's field names; a
            // document that does not parse was not a run (`null`).
            let cv: Option<CrossValidation> = serde_json::from_str(&p.cv_json).ok().flatten();
            ModelFile {
                bin_width: m.bin_width,
                decoder: m.decoder,
                provenance: Provenance {
                    trained_at: p.trained_at,
                    tool_version: p.tool_version,
                    data_sha256: p.data_sha256,
                    fit_document: p.fit_json,
                    silent_channels,
                    cv,
                },
                click: None,
                input: crate::wire::packet::BinKind::Counts,
            }
        }
    }
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ModelFile {
    /// The bin width the model was trained on (f64 ms on disk).
    #[serde(with = "crate::bin_width::as_ms")]
    pub bin_width: BinWidth,
    pub decoder: DecoderModel,
    pub provenance: Provenance,
    /// A click decoder trained beside the velocity decoder, if any.
    pub click: Option<ClickModel>,
    /// What the model was trained on and decodes: spike counts, or
    /// continuous features such as spike band power (PROTOCOL.md §1); a
    /// bin of the other kind is refused.
    pub input: BinKind,
}

/// The version 3 layout: a model of counts.
#[derive(Deserialize)]
struct ModelFileV3 {
    #[serde(with = "crate::bin_width::as_ms")]
    bin_width: BinWidth,
    decoder: DecoderModel,
    provenance: Provenance,
    click: Option<ClickModel>,
}

/// The version 2 layout: a model file without a click decoder.
#[derive(Deserialize)]
struct ModelFileV2 {
    #[serde(with = "crate::bin_width::as_ms")]
    bin_width: BinWidth,
    decoder: DecoderModel,
    provenance: Provenance,
}

#[derive(Debug, thiserror::Error)]
pub enum ModelFileError {
    #[error("{path}: cannot read: {source}")]
    Io {
        path: String,
        source: std::io::Error,
    },
    #[error(
        "{path}: not a model file (magic {found:?}, expected \"VDECMODL\"); pass a file written by replay-tool train"
    )]
    BadMagic { path: String, found: String },
    #[error(
        "{path}: model format version {found}; this build reads versions 1 to {MODEL_FORMAT_VERSION}; retrain or use a matching build"
    )]
    UnsupportedVersion { path: String, found: u32 },
    #[error("{path}: truncated ({got} bytes, header declares {want}); copy the file again")]
    Truncated {
        path: String,
        got: usize,
        want: usize,
    },
    #[error(
        "{path}: checksum mismatch (stored {stored:08x}, computed {computed:08x}); the file is damaged, copy it again"
    )]
    Checksum {
        path: String,
        stored: u32,
        computed: u32,
    },
    #[error(
        "{path}: not a regular file (a device, a pipe or a directory); pass the model file replay-tool train wrote"
    )]
    NotAFile { path: String },
    #[error(
        "{path}: {size} bytes, more than any model file (the header and at most 1 GiB of payload); pass the model file replay-tool train wrote"
    )]
    TooLarge { path: String, size: u64 },
    #[error(
        "{path}: {extra} bytes after the model's payload; the file was appended to or is not one model, copy it again"
    )]
    TrailingBytes { path: String, extra: usize },
    #[error("{path}: payload does not decode: {problem}")]
    Decode { path: String, problem: String },
    #[error("{path}: invalid model: {source}; retrain it, or copy the file again")]
    Invalid {
        path: String,
        source: crate::decoders::ModelError,
    },
}

impl ModelFile {
    /// The per-bin pipeline for this model, with the steady-state gain
    /// when the model has one.
    pub fn pipeline(&self) -> Result<DecodePipeline, PipelineError> {
        self.pipeline_with(true)
    }

    /// The per-bin pipeline; `use_steady_state = false` runs the full
    /// covariance update even when the model has a steady-state gain.
    pub fn pipeline_with(&self, use_steady_state: bool) -> Result<DecodePipeline, PipelineError> {
        // A click decoder was checked on load; one that cannot run leaves
        // the pipeline without clicks rather than refusing the model.
        let click = self
            .click
            .clone()
            .and_then(|c| crate::decoders::click::ClickFilter::new(c).ok());
        Ok(
            DecodePipeline::from_decoder(&self.decoder, self.bin_width, use_steady_state)?
                .with_click(click)
                .with_input(self.input),
        )
    }

    pub fn to_bytes(&self) -> Vec<u8> {
        let payload = bincode::serde::encode_to_vec(self, bincode::config::standard())
            .expect("model serialises");
        let mut out = Vec::with_capacity(HEADER_LEN + payload.len());
        out.extend_from_slice(MODEL_MAGIC);
        out.extend_from_slice(&MODEL_FORMAT_VERSION.to_le_bytes());
        out.extend_from_slice(&(payload.len() as u64).to_le_bytes());
        out.extend_from_slice(&crc32fast::hash(&payload).to_le_bytes());
        out.extend_from_slice(&payload);
        out
    }

    /// Decodes and validates; `path` is only used in messages.
    pub fn from_bytes(bytes: &[u8], path: &str) -> Result<ModelFile, ModelFileError> {
        let path_s = path.to_string();
        if bytes.len() < 8 || &bytes[..8] != MODEL_MAGIC {
            let found = String::from_utf8_lossy(&bytes[..bytes.len().min(8)]).into_owned();
            return Err(ModelFileError::BadMagic {
                path: path_s,
                found,
            });
        }
        if bytes.len() < HEADER_LEN {
            return Err(ModelFileError::Truncated {
                path: path_s,
                got: bytes.len(),
                want: HEADER_LEN,
            });
        }
        let version = u32::from_le_bytes(bytes[8..12].try_into().expect("4 bytes"));
        if version == 0 || version > MODEL_FORMAT_VERSION {
            return Err(ModelFileError::UnsupportedVersion {
                path: path_s,
                found: version,
            });
        }
        let len = u64::from_le_bytes(bytes[12..20].try_into().expect("8 bytes"));
        let stored = u32::from_le_bytes(bytes[20..24].try_into().expect("4 bytes"));
        let len = usize::try_from(len)
            .unwrap_or(usize::MAX)
            .min(MAX_PAYLOAD + 1);
        if len > MAX_PAYLOAD || bytes.len() - HEADER_LEN < len {
            return Err(ModelFileError::Truncated {
                path: path_s,
                got: bytes.len(),
                want: HEADER_LEN.saturating_add(len),
            });
        }
        if bytes.len() > HEADER_LEN + len {
            return Err(ModelFileError::TrailingBytes {
                path: path_s,
                extra: bytes.len() - HEADER_LEN - len,
            });
        }
        let payload = &bytes[HEADER_LEN..HEADER_LEN + len];
        let computed = crc32fast::hash(payload);
        if computed != stored {
            return Err(ModelFileError::Checksum {
                path: path_s,
                stored,
                computed,
            });
        }
        let config = bincode::config::standard().with_limit::<MAX_PAYLOAD>();
        let decode_error = |e: bincode::error::DecodeError| ModelFileError::Decode {
            path: path_s.clone(),
            problem: e.to_string(),
        };
        let model: ModelFile = match version {
            1 => {
                let (m, _): (v1::ModelFileV1, usize) =
                    bincode::serde::decode_from_slice(payload, config).map_err(decode_error)?;
                m.into()
            }
            2 => {
                let (m, _): (ModelFileV2, usize) =
                    bincode::serde::decode_from_slice(payload, config).map_err(decode_error)?;
                ModelFile {
                    bin_width: m.bin_width,
                    decoder: m.decoder,
                    provenance: m.provenance,
                    click: None,
                    input: BinKind::Counts,
                }
            }
            3 => {
                let (m, _): (ModelFileV3, usize) =
                    bincode::serde::decode_from_slice(payload, config).map_err(decode_error)?;
                ModelFile {
                    bin_width: m.bin_width,
                    decoder: m.decoder,
                    provenance: m.provenance,
                    click: m.click,
                    input: BinKind::Counts,
                }
            }
            _ => {
                bincode::serde::decode_from_slice(payload, config)
                    .map_err(decode_error)?
                    .0
            }
        };
        model
            .decoder
            .validate()
            .map_err(|source| ModelFileError::Invalid {
                path: path_s.clone(),
                source,
            })?;
        if model.input == BinKind::Features {
            let problem = if model.decoder.kind() == "point-process" {
                Some("a point-process decoder of features: it needs counts")
            } else if model.click.is_some() {
                Some("a click decoder beside a decoder of features: it reads counts")
            } else {
                None
            };
            if let Some(problem) = problem {
                return Err(ModelFileError::Decode {
                    path: path_s,
                    problem: problem.into(),
                });
            }
        }
        if let Some(c) = &model.click {
            let problem = match c.validate() {
                Err(e) => Some(e.to_string()),
                Ok(()) if c.n_channels != model.decoder.n_channels() => Some(format!(
                    "its click decoder reads {} channels, its velocity decoder {}",
                    c.n_channels,
                    model.decoder.n_channels()
                )),
                Ok(()) => None,
            };
            if let Some(problem) = problem {
                return Err(ModelFileError::Decode {
                    path: path_s,
                    problem,
                });
            }
        }
        Ok(model)
    }

    pub fn read(path: &Path) -> Result<ModelFile, ModelFileError> {
        let bytes = read_model_bytes(path)?;
        ModelFile::from_bytes(&bytes, &path.display().to_string())
    }
}

/// The bytes of a model file, read only when they can be one: a regular
/// file no larger than a header and the largest payload, so a device
/// (`/dev/zero`), a pipe or a huge file is refused at once, before any
/// read. The header is then checked by [`ModelFile::from_bytes`].
pub fn read_model_bytes(path: &Path) -> Result<Vec<u8>, ModelFileError> {
    let path_s = path.display().to_string();
    let io = |source| ModelFileError::Io {
        path: path_s.clone(),
        source,
    };
    let meta = std::fs::metadata(path).map_err(io)?;
    if !meta.is_file() {
        return Err(ModelFileError::NotAFile { path: path_s });
    }
    if meta.len() > (HEADER_LEN + MAX_PAYLOAD) as u64 {
        return Err(ModelFileError::TooLarge {
            path: path_s,
            size: meta.len(),
        });
    }
    use std::io::Read;
    let file = std::fs::File::open(path).map_err(io)?;
    // Never more than the limit, even if the file grows while it is read.
    let mut bytes = Vec::with_capacity(meta.len() as usize);
    file.take((HEADER_LEN + MAX_PAYLOAD + 1) as u64)
        .read_to_end(&mut bytes)
        .map_err(io)?;
    Ok(bytes)
}

/// The PROTOCOL.md §4 JSON export.
pub fn export_json(model: &ModelFile) -> Value {
    let prov = &model.provenance;
    let fit: Value = serde_json::from_str(&prov.fit_document).unwrap_or(Value::Null);
    let cv = serde_json::to_value(&prov.cv).unwrap_or(Value::Null);
    let mut obj = json!({
        "kind": model.decoder.kind(),
        "input": model.input.name(),
        "bin_ms": model.bin_width.ms(),
        "channels": model.decoder.n_channels(),
        "outputs": model.decoder.outputs(),
        "trained_at": prov.trained_at,
        "tool_version": prov.tool_version,
        "data_sha256": prov.data_sha256,
        "fit": fit,
        "cv": cv,
    });
    let map = obj.as_object_mut().expect("object");
    map.insert(
        "click".into(),
        model.click.as_ref().map_or(Value::Null, |c| {
            json!({
                "kind": "lda-hmm",
                "lags": c.lags,
                "weights": (0..c.lags)
                    .map(|l| c.weights[l * c.n_channels..(l + 1) * c.n_channels].to_vec())
                    .collect::<Vec<_>>(),
                "intercept": c.intercept,
                "prior_click": c.prior_click,
                "stay_rest": c.stay_rest,
                "stay_click": c.stay_click,
            })
        }),
    );
    match &model.decoder {
        DecoderModel::Kalman(k) => {
            map.insert("state".into(), json!(k.state));
            map.insert("A".into(), json!(k.a.to_nested()));
            map.insert("W".into(), json!(k.w.to_nested()));
            map.insert("H".into(), json!(k.h.to_nested()));
            map.insert("Q".into(), json!(k.q.to_full().to_nested()));
            map.insert("x0".into(), json!(k.x0));
            map.insert("P0".into(), json!(k.p0.to_nested()));
            map.insert("count_offset".into(), json!(k.count_offset));
            map.insert("count_scale".into(), json!(k.count_scale));
            let steady = k.steady.as_ref().map(|s| {
                json!({
                    "K": s.gain.to_nested(),
                    "P": s.posterior_cov.to_nested(),
                    "tolerance": s.tolerance,
                    "iterations": s.iterations,
                    "max_iterations": s.max_iterations,
                })
            });
            map.insert("steady_state".into(), steady.unwrap_or(Value::Null));
        }
        DecoderModel::PointProcess(p) => {
            map.insert("state".into(), json!(p.state));
            map.insert("A".into(), json!(p.a.to_nested()));
            map.insert("W".into(), json!(p.w.to_nested()));
            map.insert("x0".into(), json!(p.x0));
            map.insert("P0".into(), json!(p.p0.to_nested()));
            // Channels left out carry no coefficients: null in each list.
            let per =
                |f: &dyn Fn(&crate::decoders::point_process::ChannelGlm) -> Value| -> Vec<Value> {
                    p.channels
                        .iter()
                        .map(|c| c.as_ref().map_or(Value::Null, f))
                        .collect()
                };
            map.insert("b0".into(), json!(per(&|c| json!(c.b0))));
            map.insert("beta".into(), json!(per(&|c| json!(c.beta))));
            map.insert("history".into(), json!(per(&|c| json!(c.history))));
            map.insert(
                "history_basis".into(),
                p.history_basis.as_ref().map_or(Value::Null, |b| {
                    json!({
                        "kind": "raised_cosine_log",
                        "n_basis": b.n_basis,
                        "span_bins": b.span_bins,
                        "weights": b.weights.to_nested(),
                    })
                }),
            );
            if p.channels.iter().flatten().any(|c| !c.coupling.is_empty()) {
                map.insert("coupling".into(), json!(per(&|c| json!(c.coupling))));
            }
            map.insert(
                "excluded".into(),
                json!(
                    p.excluded
                        .iter()
                        .map(|(c, why)| json!({"channel": c, "reason": why}))
                        .collect::<Vec<_>>()
                ),
            );
        }
        DecoderModel::Wiener(w) => {
            map.insert("state".into(), json!(w.outputs));
            map.insert("taps".into(), json!(w.taps));
            map.insert("weights".into(), json!(w.weights.to_nested()));
            map.insert("mean_counts".into(), json!(w.mean_counts));
        }
    }
    obj
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::decoders::wiener::WienerModel;
    use crate::linalg::Mat;

    /// The version 1 payload, as the earlier build wrote it.
    #[derive(Serialize)]
    struct WrittenV1<'a> {
        bin_ms: f64,
        decoder: &'a DecoderModel,
        provenance: (&'a str, &'a str, &'a str, &'a str, &'a str),
    }

    fn wiener() -> DecoderModel {
        DecoderModel::Wiener(WienerModel {
            outputs: vec!["vel_x".into()],
            taps: 1,
            n_channels: 2,
            weights: Mat::from_rows(&[vec![0.5, 1.0, -1.0]]),
            mean_counts: vec![1.0, 2.0],
        })
    }

    fn framed(version: u32, payload: &[u8]) -> Vec<u8> {
        let mut out = MODEL_MAGIC.to_vec();
        out.extend_from_slice(&version.to_le_bytes());
        out.extend_from_slice(&(payload.len() as u64).to_le_bytes());
        out.extend_from_slice(&crc32fast::hash(payload).to_le_bytes());
        out.extend_from_slice(payload);
        out
    }

    #[test]
    fn a_version_1_file_reads_with_its_scores_typed() {
        let decoder = wiener();
        let cv = r#"{"folds":5,"by_trial":true,"outputs":["vel_x"],"mean":[{"cc":0.9,"r2":0.8,"rmse":1.5}],"per_fold":[]}"#;
        let fit = r#"{"decoder":"kalman","report":{"excluded_channels":[3,7]}}"#;
        let payload = bincode::serde::encode_to_vec(
            WrittenV1 {
                bin_ms: 20.0,
                decoder: &decoder,
                provenance: ("2026-01-01T00:00:00Z", "0.1.0", "abc", fit, cv),
            },
            bincode::config::standard(),
        )
        .unwrap();
        let m = ModelFile::from_bytes(&framed(1, &payload), "old.model").unwrap();
        assert_eq!(m.bin_width, BinWidth::from_us(20_000).unwrap());
        assert_eq!(m.decoder, decoder);
        assert_eq!(m.provenance.silent_channels, vec![3, 7]);
        let cv = m.provenance.cv.unwrap();
        assert_eq!((cv.folds, cv.by_trial), (5, true));
        assert_eq!(cv.mean[0].cc, 0.9);
        assert_eq!(m.provenance.fit_document, fit);
    }

    #[test]
    fn a_version_4_file_round_trips_version_3_and_2_files_read_and_version_5_is_refused() {
        let mut p = Provenance::untracked();
        p.cv = Some(CrossValidation {
            folds: 3,
            by_trial: false,
            outputs: vec!["vel_x".into()],
            mean: vec![OutputScores {
                cc: 0.5,
                r2: 0.25,
                rmse: 2.0,
            }],
            per_fold: vec![],
        });
        let without = ModelFile {
            input: crate::wire::packet::BinKind::Counts,
            bin_width: BinWidth::from_us(1_000).unwrap(),
            decoder: wiener(),
            provenance: p,
            click: None,
        };
        let n = without.decoder.n_channels();
        let m = ModelFile {
            click: Some(ClickModel {
                n_channels: n,
                lags: 2,
                weights: (0..2 * n).map(|i| i as f64 * 0.1 - 0.3).collect(),
                intercept: -2.5,
                prior_click: 0.05,
                stay_rest: 0.99,
                stay_click: 0.9,
            }),
            ..without.clone()
        };
        let bytes = m.to_bytes();
        assert_eq!(u32::from_le_bytes(bytes[8..12].try_into().unwrap()), 4);
        assert_eq!(ModelFile::from_bytes(&bytes, "m").unwrap(), m);
        // A model of features round-trips and says so in its export.
        let of_features = ModelFile {
            input: crate::wire::packet::BinKind::Features,
            ..without.clone()
        };
        assert_eq!(
            ModelFile::from_bytes(&of_features.to_bytes(), "f").unwrap(),
            of_features
        );
        assert_eq!(export_json(&of_features)["input"], "features");
        assert_eq!(export_json(&m)["input"], "counts");
        // ... but not beside a click decoder, which reads counts.
        let e = ModelFile::from_bytes(
            &ModelFile {
                input: crate::wire::packet::BinKind::Features,
                ..m.clone()
            }
            .to_bytes(),
            "fc",
        )
        .unwrap_err()
        .to_string();
        assert!(
            e.contains("click decoder beside a decoder of features"),
            "{e}"
        );
        assert_eq!(
            export_json(&m)["click"]["weights"][1]
                .as_array()
                .unwrap()
                .len(),
            n
        );
        assert!(export_json(&without)["click"].is_null());

        // A file written before click decoders existed: the version 2
        // payload (the same fields, no click), read as a model without one.
        #[derive(Serialize)]
        struct V2<'a> {
            #[serde(with = "crate::bin_width::as_ms")]
            bin_width: BinWidth,
            decoder: &'a DecoderModel,
            provenance: &'a Provenance,
        }
        let payload = bincode::serde::encode_to_vec(
            V2 {
                bin_width: without.bin_width,
                decoder: &without.decoder,
                provenance: &without.provenance,
            },
            bincode::config::standard(),
        )
        .unwrap();
        let mut v2 = MODEL_MAGIC.to_vec();
        v2.extend_from_slice(&2u32.to_le_bytes());
        v2.extend_from_slice(&(payload.len() as u64).to_le_bytes());
        v2.extend_from_slice(&crc32fast::hash(&payload).to_le_bytes());
        v2.extend_from_slice(&payload);
        assert_eq!(ModelFile::from_bytes(&v2, "old").unwrap(), without);

        // Version 3: a click decoder, no input kind; read as counts.
        #[derive(Serialize)]
        struct V3<'a> {
            #[serde(with = "crate::bin_width::as_ms")]
            bin_width: BinWidth,
            decoder: &'a DecoderModel,
            provenance: &'a Provenance,
            click: &'a Option<ClickModel>,
        }
        let payload = bincode::serde::encode_to_vec(
            V3 {
                bin_width: m.bin_width,
                decoder: &m.decoder,
                provenance: &m.provenance,
                click: &m.click,
            },
            bincode::config::standard(),
        )
        .unwrap();
        let mut v3 = MODEL_MAGIC.to_vec();
        v3.extend_from_slice(&3u32.to_le_bytes());
        v3.extend_from_slice(&(payload.len() as u64).to_le_bytes());
        v3.extend_from_slice(&crc32fast::hash(&payload).to_le_bytes());
        v3.extend_from_slice(&payload);
        assert_eq!(ModelFile::from_bytes(&v3, "v3").unwrap(), m);

        let mut future = bytes.clone();
        future[8..12].copy_from_slice(&5u32.to_le_bytes());
        assert!(matches!(
            ModelFile::from_bytes(&future, "m"),
            Err(ModelFileError::UnsupportedVersion { found: 5, .. })
        ));

        // A click decoder over another array than the velocity decoder's
        // is refused, naming both.
        let mut odd = m.clone();
        if let Some(c) = odd.click.as_mut() {
            c.n_channels += 1;
            c.weights.extend([0.0, 0.0]);
        }
        let e = ModelFile::from_bytes(&odd.to_bytes(), "odd")
            .unwrap_err()
            .to_string();
        assert!(e.contains("click decoder reads"), "{e}");
    }
}
