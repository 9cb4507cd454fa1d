//! One module per verb; each has an `Args` (clap) and a `run`: it parses
//! its flags, calls the core (`decoder_core::session` opens what
//! `--session` names, trains and replays) and prints. What several verbs
//! share is here: flag checks, the kinematics warning and the `decoderd`
//! binary to launch.

pub mod bench;
pub mod click;
pub mod closed_loop;
pub mod demo;
pub mod evaluate;
pub mod evaluate_many;
pub mod export;
pub mod import;
pub mod model_show;
pub mod replay;
pub mod simulate;
pub mod stream;
pub mod train;
pub mod verify;
pub mod world;

use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};

/// Says which of the block's kinematics the decoder leaves out, so a 3-D
/// block never trains a 2-D decoder without a word.
pub fn warn_unused_kinematics(
    kinematic_names: &[String],
    source: &Path,
    spec: &decoder_core::fit::evaluate::DecoderSpec,
) {
    let unused = spec.unused_kinematics(kinematic_names);
    if unused.is_empty() {
        return;
    }
    let section = match spec {
        decoder_core::fit::evaluate::DecoderSpec::Kalman(_) => "[kalman] state and outputs",
        decoder_core::fit::evaluate::DecoderSpec::Wiener(_) => "[wiener] outputs",
        decoder_core::fit::evaluate::DecoderSpec::PointProcess(_) => {
            "[point_process] state and outputs"
        }
    };
    eprintln!(
        "replay-tool: warning: {}: kinematics {} {} not decoded by the {} decoder; name {} in {section} of the training config (--config) to decode {}",
        source.display(),
        unused.join(", "),
        if unused.len() == 1 { "is" } else { "are" },
        spec.name(),
        if unused.len() == 1 { "it" } else { "them" },
        if unused.len() == 1 { "it" } else { "them" },
    );
}

/// The `decoderd` binary: `explicit`, else the one beside this executable;
/// `None` when there is none (the caller then runs the daemon in-process).
pub fn find_decoderd(explicit: Option<&Path>) -> Result<Option<PathBuf>> {
    if let Some(p) = explicit {
        if p.is_file() {
            return Ok(Some(p.to_path_buf()));
        }
        bail!("--decoderd {}: no such file", p.display());
    }
    Ok(std::env::current_exe()
        .ok()
        .map(|me| me.with_file_name("decoderd"))
        .filter(|p| p.is_file()))
}

/// Parses an address flag, naming the flag when it does not parse.
pub fn socket_addr(flag: &str, text: &str) -> Result<std::net::SocketAddr> {
    text.parse()
        .with_context(|| format!("{flag} {text}: not an address (HOST:PORT, e.g. 127.0.0.1:27400)"))
}

/// Reads `--bin-ms`, naming the flag when it is not a usable bin width.
pub fn bin_width_flag(ms: f64) -> Result<decoder_core::BinWidth> {
    decoder_core::BinWidth::from_ms(ms).with_context(|| format!("--bin-ms {ms}"))
}

/// Checks a `--time-scale` value: a multiple of the bin period between
/// bins, finite and ≥ 0 (0 where `zero_ok`: as fast as the loop turns).
pub fn check_time_scale(x: f64, zero_ok: bool) -> Result<()> {
    if !x.is_finite() || x < 0.0 || (x == 0.0 && !zero_ok) {
        bail!(
            "--time-scale {x}: must be a finite number {} 0 (1 = the bin rate, 0.5 = twice as fast)",
            if zero_ok { "≥" } else { "above" }
        );
    }
    Ok(())
}
