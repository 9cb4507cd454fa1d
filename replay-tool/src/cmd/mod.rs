//! One module per verb; each has an `Args` (clap) and a `run`. What several
//! verbs share is here: the training config with its flag overrides, the
//! block behind `--session`, and the `decoderd` binary to launch.

pub mod bench;
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

use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};
use decoder_core::Block;
use decoder_core::fit::config::TrainConfig;
use decoder_core::formats::block_rows::{BlockFiles, BlockRows};

/// Reads `--config FILE` (or the defaults when absent).
pub fn load_train_config(path: Option<&Path>) -> Result<TrainConfig> {
    Ok(TrainConfig::read(path)?)
}

/// A block behind `--session`, with what a session log adds.
pub struct SessionBlock {
    pub block: Block,
    /// The target radius the task packets gave (a session log only).
    pub target_radius: Option<f64>,
}

/// The block behind `--session` for a verb that needs kinematics (train,
/// evaluate): a session directory (PROTOCOL.md §3), or a session log with
/// task packets, read as `export` writes it (PROTOCOL.md §5). A log
/// without task packets has no kinematics and is refused with the reason.
pub fn block_with_kinematics(session: &Path) -> Result<SessionBlock> {
    if session.is_file() {
        let log = decoder_core::formats::log_block::read_log_block(session)
            .with_context(|| format!("--session {}", session.display()))?;
        if log.block.kinematics.is_none() {
            bail!("{}", no_task_packets(session));
        }
        let s = &log.summary;
        eprintln!(
            "replay-tool: {}: {} slots, {} valid for training ({} bins missing, {} before the first task packet)",
            session.display(),
            s.rows,
            log.block.n_valid(),
            s.bins_missing,
            s.rows_without_task_state
        );
        return Ok(SessionBlock {
            block: log.block,
            target_radius: log.summary.target_radius,
        });
    }
    Ok(SessionBlock {
        block: Block::read(session)?,
        target_radius: None,
    })
}

/// The rows behind `--session` for a verb that reads them in passes
/// (evaluate): a session directory read a chunk at a time, or a session
/// log first exported (streaming, as `export` does) to a temporary session
/// directory under TMPDIR, removed when this is dropped. Neither is held in
/// memory.
pub struct SessionRows {
    pub rows: BlockFiles,
    /// The target radius the task packets gave (a session log only).
    pub target_radius: Option<f64>,
    _exported: Option<tempfile::TempDir>,
}

pub fn rows_with_kinematics(session: &Path) -> Result<SessionRows> {
    if session.is_file() {
        let tmp = tempfile::Builder::new()
            .prefix("replay-tool-session-")
            .tempdir()
            .context("creating a temporary folder for the session log's rows (set TMPDIR to a disk with room)")?;
        let s = decoder_core::formats::log_block::export_log(session, tmp.path())
            .with_context(|| format!("--session {}", session.display()))?;
        let rows = BlockFiles::open(tmp.path())
            .with_context(|| format!("--session {}", session.display()))?;
        if !rows.info().has_kinematics {
            bail!("{}", no_task_packets(session));
        }
        eprintln!(
            "replay-tool: {}: {} slots, {} valid for training ({} bins missing, {} before the first task packet)",
            session.display(),
            s.rows,
            s.valid_rows,
            s.bins_missing,
            s.rows_without_task_state
        );
        return Ok(SessionRows {
            rows,
            target_radius: s.target_radius,
            _exported: Some(tmp),
        });
    }
    Ok(SessionRows {
        rows: BlockFiles::open(session)?,
        target_radius: None,
        _exported: None,
    })
}

fn no_task_packets(session: &Path) -> String {
    format!(
        "--session {}: the log holds no task packets, so it has no kinematics to train or score on; record the block with the task computer sending task packets (PROTOCOL.md §6) to the daemon's task socket (network.task_listen)",
        session.display()
    )
}

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
