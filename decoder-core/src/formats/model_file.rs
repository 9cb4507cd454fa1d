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

pub const MODEL_MAGIC: &[u8; 8] = b"VDECMODL";
pub const MODEL_FORMAT_VERSION: u32 = 1;
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
    /// The fit options as JSON text (bincode cannot carry free-form JSON).
    pub fit_json: String,
    /// Cross-validated scores as JSON text, `null` when none were run.
    pub cv_json: String,
}

impl Provenance {
    /// Provenance of a model built in code rather than trained from a block
    /// (tests, benchmarks): every field empty, `fit` and `cv` null.
    pub fn untracked() -> Provenance {
        Provenance {
            trained_at: String::new(),
            tool_version: String::new(),
            data_sha256: String::new(),
            fit_json: "null".into(),
            cv_json: "null".into(),
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
        "{path}: model format version {found}; this build reads version {MODEL_FORMAT_VERSION}; retrain or use a matching build"
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
    #[error("{path}: payload does not decode: {problem}")]
    Decode { path: String, problem: String },
    #[error("{path}: invalid model: {problem}")]
    Invalid { path: String, problem: String },
}

impl ModelFile {
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
        if version != MODEL_FORMAT_VERSION {
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
        let (model, _): (ModelFile, usize) = bincode::serde::decode_from_slice(payload, config)
            .map_err(|e| ModelFileError::Decode {
                path: path_s.clone(),
                problem: e.to_string(),
            })?;
        model
            .validate()
            .map_err(|problem| ModelFileError::Invalid {
                path: path_s,
                problem,
            })?;
        Ok(model)
    }

    pub fn read(path: &Path) -> Result<ModelFile, ModelFileError> {
        let bytes = std::fs::read(path).map_err(|source| ModelFileError::Io {
            path: path.display().to_string(),
            source,
        })?;
        ModelFile::from_bytes(&bytes, &path.display().to_string())
    }

    pub fn validate(&self) -> Result<(), String> {
        match &self.decoder {
            DecoderModel::Kalman(m) => m.validate().map_err(|e| e.to_string()),
            DecoderModel::Wiener(m) => m.validate(),
            DecoderModel::PointProcess(m) => m.validate(),
        }
    }
}

/// The PROTOCOL.md §4 JSON export.
pub fn export_json(model: &ModelFile) -> Value {
    let prov = &model.provenance;
    let fit: Value = serde_json::from_str(&prov.fit_json).unwrap_or(Value::Null);
    let cv: Value = serde_json::from_str(&prov.cv_json).unwrap_or(Value::Null);
    let mut obj = json!({
        "kind": model.decoder.kind(),
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
