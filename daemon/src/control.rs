//! The local control socket: a Unix domain socket (mode 0600) served by a
//! tokio task, one JSON request line in, one JSON reply line out. Status
//! and operator commands are passed to the real-time thread and answered
//! from there; a model load is read, checked and turned into a pipeline
//! here, off the real-time thread, and only the finished pipeline crosses
//! over to be swapped in at the next bin boundary.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};
use decoder_core::engine::pipeline::DecodePipeline;
use decoder_core::engine::slot_engine::{OperatorCommand, check_swap_against};
use decoder_core::formats::model_file::ModelFile;
use serde::{Deserialize, Serialize};
use tokio::io::{AsyncBufReadExt, AsyncReadExt, AsyncWriteExt, BufReader};
use tokio::net::{UnixListener, UnixStream};
use tokio::sync::oneshot;

use crate::model_identity::ModelInfo;
use crate::requests::{ControlRequest, LoadRequest, Refused, Swapped, ToLoop};
use crate::status::Status;

#[derive(Debug, Serialize, Deserialize)]
#[serde(tag = "cmd", rename_all = "lowercase")]
pub enum Request {
    Status,
    Arm,
    Disarm,
    Halt,
    Load { path: PathBuf },
    Adapt { on: bool },
    Drift { on: bool },
}

#[derive(Debug, Serialize, Deserialize)]
pub struct Reply {
    pub ok: bool,
    pub message: String,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub status: Option<Box<Status>>,
}

/// The running stream's shape, against which a load is checked.
#[derive(Clone, Copy, Debug)]
pub struct StreamShape {
    pub n_channels: usize,
    pub bin_width: decoder_core::BinWidth,
    pub n_outputs: usize,
    /// What the running model decodes: counts or features.
    pub input: decoder_core::wire::packet::BinKind,
}

/// A model file read and checked for loading, with what status shows.
pub struct LoadedModel {
    pub file: ModelFile,
    pub bytes: Vec<u8>,
    pub info: ModelInfo,
}

/// Reads and validates a model file (used at start and for `load`).
pub fn read_model(path: &Path) -> Result<LoadedModel> {
    let bytes = decoder_core::formats::model_file::read_model_bytes(path)?;
    let file = ModelFile::from_bytes(&bytes, &path.display().to_string())?;
    let info = ModelInfo::of(path.display().to_string(), &file, &bytes);
    Ok(LoadedModel { file, bytes, info })
}

/// Binds the control socket with mode 0600. Only a stale socket (a socket
/// file nobody answers on) is removed first; a live socket, or anything
/// that is not a socket (a user's file at a mistyped path), is left alone
/// and is an error.
pub fn bind(path: &Path) -> Result<std::os::unix::net::UnixListener> {
    use std::os::unix::fs::{DirBuilderExt, FileTypeExt};
    if let Ok(meta) = std::fs::symlink_metadata(path) {
        if !meta.file_type().is_socket() {
            bail!(
                "{} exists and is not a socket; refusing to replace it (set control.socket to another path)",
                path.display()
            );
        }
        if std::os::unix::net::UnixStream::connect(path).is_ok() {
            bail!(
                "control socket {} is in use by another decoderd; stop it or set control.socket to another path",
                path.display()
            );
        }
        std::fs::remove_file(path)
            .with_context(|| format!("cannot remove stale control socket {}", path.display()))?;
    } else if path
        .file_name()
        .is_some_and(|n| n == crate::config::SOCKET_NAME)
    {
        // The default's own directory ($HOME/.decoderd), private to the user.
        if let Some(dir) = path
            .parent()
            .filter(|d| !d.as_os_str().is_empty() && !d.exists())
        {
            std::fs::DirBuilder::new()
                .recursive(true)
                .mode(0o700)
                .create(dir)
                .with_context(|| format!("cannot create {}", dir.display()))?;
        }
    }
    let std_listener =
        crate::sys::with_umask(0o177, || std::os::unix::net::UnixListener::bind(path))
            .with_context(|| format!("cannot bind control socket {}", path.display()))?;
    std_listener.set_nonblocking(true)?;
    Ok(std_listener)
}

/// Serves control connections until the task is dropped.
pub async fn serve(listener: std::os::unix::net::UnixListener, to_rt: ToLoop, shape: StreamShape) {
    let listener = match UnixListener::from_std(listener) {
        Ok(l) => l,
        Err(e) => {
            tracing::error!("control socket unusable: {e}; ctl commands will not work");
            return;
        }
    };
    let open = std::sync::Arc::new(tokio::sync::Semaphore::new(MAX_CONNECTIONS));
    loop {
        let stream = match listener.accept().await {
            Ok((stream, _)) => stream,
            Err(e) => {
                // Out of file descriptors under a flood: back off instead
                // of spinning on accept.
                tracing::warn!("control socket accept failed: {e}");
                tokio::time::sleep(std::time::Duration::from_millis(50)).await;
                continue;
            }
        };
        let Ok(permit) = open.clone().try_acquire_owned() else {
            // Over the limit: close at once; a real operator retries.
            drop(stream);
            continue;
        };
        let to_rt = to_rt.clone();
        tokio::spawn(async move {
            if let Err(e) = handle(stream, to_rt, shape).await {
                tracing::warn!("control connection: {e:#}");
            }
            drop(permit);
        });
    }
}

/// Connections served at once; more are closed on accept.
const MAX_CONNECTIONS: usize = 64;
/// The longest request line accepted.
const MAX_REQUEST_BYTES: u64 = 64 * 1024;
/// A connection that has not sent its request line by then is closed.
const IDLE_TIMEOUT: std::time::Duration = std::time::Duration::from_secs(2);

async fn handle(stream: UnixStream, to_rt: ToLoop, shape: StreamShape) -> Result<()> {
    let (read, mut write) = stream.into_split();
    let mut line = String::new();
    let mut reader = BufReader::new(read.take(MAX_REQUEST_BYTES));
    let reading = reader.read_line(&mut line);
    match tokio::time::timeout(IDLE_TIMEOUT, reading).await {
        Ok(r) => {
            r?;
        }
        Err(_) => bail!("no request within {} s; closed", IDLE_TIMEOUT.as_secs()),
    }
    let reply = match serde_json::from_str::<Request>(&line) {
        Ok(request) => answer(request, &to_rt, shape).await,
        Err(e) => Reply {
            ok: false,
            message: format!("bad request: {e}"),
            status: None,
        },
    };
    let mut text = serde_json::to_string(&reply)?;
    text.push('\n');
    write.write_all(text.as_bytes()).await?;
    Ok(())
}

fn fail(message: impl Into<String>) -> Reply {
    Reply {
        ok: false,
        message: message.into(),
        status: None,
    }
}

const RT_GONE: &str = "the decode loop is not running (daemon shutting down)";
const RT_BUSY: &str = "the decode loop has too many control requests queued; try again";

/// Hands a request to the real-time thread without ever blocking the
/// control runtime: a full queue is an answer, not a wait.
fn to_rt_now(to_rt: &ToLoop, request: ControlRequest) -> Result<(), Reply> {
    to_rt.try_send(request).map_err(|e| match e {
        crossbeam_channel::TrySendError::Full(_) => fail(RT_BUSY),
        crossbeam_channel::TrySendError::Disconnected(_) => fail(RT_GONE),
    })
}

async fn answer(request: Request, to_rt: &ToLoop, shape: StreamShape) -> Reply {
    match request {
        Request::Status => {
            let (tx, rx) = oneshot::channel();
            if let Err(reply) = to_rt_now(to_rt, ControlRequest::Status(tx)) {
                return reply;
            }
            match rx.await {
                Ok(mut s) => {
                    s.rss_bytes = crate::sys::rss_bytes();
                    Reply {
                        ok: true,
                        message: String::new(),
                        status: Some(Box::new(s)),
                    }
                }
                Err(_) => fail(RT_GONE),
            }
        }
        Request::Arm | Request::Disarm | Request::Halt => {
            let command = match request {
                Request::Arm => OperatorCommand::Arm,
                Request::Disarm => OperatorCommand::Disarm,
                _ => OperatorCommand::Halt,
            };
            let what = format!("operator {command:?}");
            operator_reply(to_rt, &what, |reply| ControlRequest::Operator {
                command,
                reply,
            })
            .await
        }
        Request::Drift { on } => {
            let command = if on {
                OperatorCommand::DriftOn
            } else {
                OperatorCommand::DriftOff
            };
            let what = format!("operator drift {}", if on { "on" } else { "off" });
            operator_reply(to_rt, &what, |reply| ControlRequest::Operator {
                command,
                reply,
            })
            .await
        }
        Request::Adapt { on } => {
            let what = format!("operator adapt {}", if on { "on" } else { "off" });
            operator_reply(to_rt, &what, |reply| ControlRequest::Adapt { on, reply }).await
        }
        Request::Load { path } => {
            let loaded = match tokio::task::spawn_blocking(move || prepare_load(&path, shape)).await
            {
                Ok(Ok(l)) => l,
                Ok(Err(e)) => return fail(format!("load refused: {e:#}")),
                Err(e) => return fail(format!("load failed: {e}")),
            };
            let (pipeline, loaded) = loaded;
            let sha = loaded.info.sha256.clone();
            let path = loaded.info.path.clone();
            let (request, rx) =
                LoadRequest::ask(loaded.file, loaded.bytes, loaded.info, pipeline, None);
            if let Err(reply) = to_rt_now(to_rt, request) {
                return reply;
            }
            match rx.await {
                Ok(Ok(Swapped {
                    first_seq: seq,
                    old,
                })) => {
                    // The old decoder is freed here, not on the real-time thread.
                    drop(old);
                    let m = format!("loaded {path} (sha256 {sha}); it decodes from seq {seq}");
                    tracing::info!("{m}");
                    Reply {
                        ok: true,
                        message: m,
                        status: None,
                    }
                }
                Ok(Err(e)) => fail(format!("load refused: {e}")),
                Err(_) => fail(RT_GONE),
            }
        }
    }
}

/// Hands an operator's request to the real-time thread and turns its
/// answer (what it did, or why it refused) into the reply, logging it as
/// `what`.
async fn operator_reply<T: std::fmt::Display>(
    to_rt: &ToLoop,
    what: &str,
    request: impl FnOnce(oneshot::Sender<Result<T, Refused>>) -> ControlRequest,
) -> Reply {
    let (reply, rx) = oneshot::channel();
    if let Err(reply) = to_rt_now(to_rt, request(reply)) {
        return reply;
    }
    match rx.await {
        Ok(Ok(done)) => {
            let m = done.to_string();
            tracing::info!("{what}: {m}");
            Reply {
                ok: true,
                message: m,
                status: None,
            }
        }
        Ok(Err(refused)) => {
            let m = refused.to_string();
            tracing::warn!("{what}: {m}");
            fail(m)
        }
        Err(_) => fail(RT_GONE),
    }
}

fn prepare_load(path: &Path, shape: StreamShape) -> Result<(DecodePipeline, LoadedModel)> {
    let loaded = read_model(path)?;
    let pipeline = loaded
        .file
        .pipeline()
        .with_context(|| format!("model {} cannot be run", path.display()))?;
    check_swap_against(
        &pipeline,
        shape.n_channels,
        shape.bin_width,
        shape.n_outputs,
        shape.input,
    )
    .with_context(|| format!("model {}", path.display()))?;
    Ok((pipeline, loaded))
}

/// The client side, for `decoderd ctl`.
pub fn request(socket: &Path, request: &Request) -> Result<Reply> {
    use std::io::{BufRead, Write};
    let mut stream = std::os::unix::net::UnixStream::connect(socket).with_context(|| {
        format!(
            "cannot reach decoderd at {}; is it running, and is this its control.socket?",
            socket.display()
        )
    })?;
    stream.set_read_timeout(Some(std::time::Duration::from_secs(10)))?;
    let mut text = serde_json::to_string(request)?;
    text.push('\n');
    stream.write_all(text.as_bytes())?;
    let mut line = String::new();
    std::io::BufReader::new(stream)
        .read_line(&mut line)
        .context("no reply from decoderd")?;
    serde_json::from_str(&line).with_context(|| format!("unreadable reply from decoderd: {line:?}"))
}
