//! What a user names with `--session`, opened the one way: a session
//! directory (PROTOCOL.md §3) or a session log recorded by `decoderd`
//! (§7), decided once, here, with one message when it is neither. A verb
//! that trains or scores reads the session's rows in passes: a directory a
//! chunk at a time, a log first exported, streaming, to a temporary session
//! directory (removed when the rows are dropped), so neither is held in
//! memory. Intention re-estimation rewrites kinematics and reads the block
//! whole.

use std::path::{Path, PathBuf};

use crate::formats::block::{Block, BlockError};
use crate::formats::block_rows::{BlockFiles, BlockRows};
use crate::formats::log_block::{LogBlockError, LogBlockSummary, export_log, read_log_block};

/// A session on disk.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Session {
    /// A session directory: manifest, counts or features, kinematics.
    Directory(PathBuf),
    /// A session log from `decoderd` (`*.vdlog`).
    Log(PathBuf),
}

/// Why a session could not be opened.
#[derive(Debug, thiserror::Error)]
pub enum SessionError {
    #[error(
        "--session {}: no such session directory or session log; pass a directory with manifest.toml or a .vdlog file decoderd recorded",
        .0.display()
    )]
    Missing(PathBuf),
    #[error("{}: {what} reads a session log (.vdlog) from decoderd, not a session directory", .path.display())]
    NotALog { path: PathBuf, what: &'static str },
    #[error(
        "--session {}: the log holds no task packets, so it has no kinematics to train or score on; record the block with the task computer sending task packets (PROTOCOL.md §6) to the daemon's task socket (network.task_listen)",
        .0.display()
    )]
    NoTaskPackets(PathBuf),
    #[error("--session {}: {source}", .path.display())]
    Log {
        path: PathBuf,
        source: LogBlockError,
    },
    #[error("--session {}: {source}", .path.display())]
    Block { path: PathBuf, source: BlockError },
    #[error(
        "creating a temporary folder for the session log's rows: {0} (set TMPDIR to a disk with room)"
    )]
    Scratch(std::io::Error),
}

/// A session's rows, read in passes.
pub struct SessionRows {
    pub rows: BlockFiles,
    /// For a log: what its export found (slots, valid rows, missing bins,
    /// the target radius its task packets gave).
    pub from_log: Option<LogBlockSummary>,
    /// The log's temporary export, removed when this is dropped.
    _exported: Option<tempfile::TempDir>,
}

/// A session's block, whole in memory.
pub struct SessionBlock {
    pub block: Block,
    /// For a log: what reading it found.
    pub from_log: Option<LogBlockSummary>,
}

impl Session {
    /// The one decision: a file is a session log, a directory a session
    /// directory.
    pub fn at(path: &Path) -> Result<Session, SessionError> {
        if path.is_dir() {
            Ok(Session::Directory(path.to_path_buf()))
        } else if path.is_file() {
            Ok(Session::Log(path.to_path_buf()))
        } else {
            Err(SessionError::Missing(path.to_path_buf()))
        }
    }

    /// A session log, for the verbs that read only logs (`what` names the
    /// verb in the refusal).
    pub fn log_at(path: &Path, what: &'static str) -> Result<PathBuf, SessionError> {
        match Session::at(path)? {
            Session::Log(p) => Ok(p),
            Session::Directory(path) => Err(SessionError::NotALog { path, what }),
        }
    }

    pub fn path(&self) -> &Path {
        match self {
            Session::Directory(p) | Session::Log(p) => p,
        }
    }

    /// The rows, read in passes, of a session with kinematics (to train or
    /// score on). A log without task packets has none and is refused.
    pub fn rows_with_kinematics(&self) -> Result<SessionRows, SessionError> {
        let path = self.path().to_path_buf();
        let block_err = |source| SessionError::Block {
            path: path.clone(),
            source,
        };
        match self {
            Session::Directory(dir) => Ok(SessionRows {
                rows: BlockFiles::open(dir).map_err(block_err)?,
                from_log: None,
                _exported: None,
            }),
            Session::Log(log) => {
                let tmp = tempfile::Builder::new()
                    .prefix("replay-tool-session-")
                    .tempdir()
                    .map_err(SessionError::Scratch)?;
                let summary = export_log(log, tmp.path()).map_err(|source| SessionError::Log {
                    path: path.clone(),
                    source,
                })?;
                let rows = BlockFiles::open(tmp.path()).map_err(block_err)?;
                if !rows.info().has_kinematics {
                    return Err(SessionError::NoTaskPackets(path));
                }
                Ok(SessionRows {
                    rows,
                    from_log: Some(summary),
                    _exported: Some(tmp),
                })
            }
        }
    }

    /// The whole block of a session with kinematics, in memory.
    pub fn block_with_kinematics(&self) -> Result<SessionBlock, SessionError> {
        let path = self.path().to_path_buf();
        match self {
            Session::Directory(dir) => Ok(SessionBlock {
                block: Block::read(dir).map_err(|source| SessionError::Block { path, source })?,
                from_log: None,
            }),
            Session::Log(log) => {
                let l = read_log_block(log).map_err(|source| SessionError::Log {
                    path: path.clone(),
                    source,
                })?;
                if l.block.kinematics.is_none() {
                    return Err(SessionError::NoTaskPackets(path));
                }
                Ok(SessionBlock {
                    block: l.block,
                    from_log: Some(l.summary),
                })
            }
        }
    }
}
