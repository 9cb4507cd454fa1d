//! One module per verb; each has an `Args` (clap) and a `run`.

pub mod bench;
pub mod closed_loop;
pub mod demo;
pub mod evaluate;
pub mod live_replay;
pub mod model_show;
pub mod replay;
pub mod simulate;
pub mod train;
pub mod verify;

use std::path::Path;

use anyhow::{Context, Result};
use decoder_core::fit::config::TrainConfig;

/// Reads `--config FILE` (or the defaults when absent).
pub fn load_train_config(path: Option<&Path>) -> Result<TrainConfig> {
    match path {
        None => Ok(TrainConfig::default()),
        Some(p) => {
            let text = std::fs::read_to_string(p)
                .with_context(|| format!("cannot read config {}", p.display()))?;
            Ok(TrainConfig::from_toml(&text, &p.display().to_string())?)
        }
    }
}
