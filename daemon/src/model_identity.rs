//! A model's identity: the file it came from, the hash of its bytes, its
//! kind and shape. Status shows it, the log's events name it, and every
//! load computes it the one way ([`ModelInfo::of`]); it sits below every
//! other module of the daemon.

use decoder_core::ModelFile;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

/// A model's identity, as status shows it and the log's events name it.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ModelInfo {
    /// Where it came from: a file path, or which adaptation update of which
    /// file.
    pub path: String,
    /// SHA-256 of the model file's bytes, hex.
    pub sha256: String,
    pub kind: String,
    pub channels: usize,
    pub bin_ms: f64,
    pub outputs: Vec<String>,
}

impl ModelInfo {
    /// The identity of `file`, whose bytes are `bytes`, known as `path`.
    pub fn of(path: String, file: &ModelFile, bytes: &[u8]) -> ModelInfo {
        ModelInfo {
            path,
            sha256: Sha256::digest(bytes)
                .iter()
                .map(|b| format!("{b:02x}"))
                .collect(),
            kind: file.decoder.kind().into(),
            channels: file.decoder.n_channels(),
            bin_ms: file.bin_width.ms(),
            outputs: file.decoder.outputs().to_vec(),
        }
    }
}
