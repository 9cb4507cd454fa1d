//! Start-up and stop: the model loaded and checked, every socket bound,
//! the session log opened and the daemon's threads started — the decode
//! loop ([`crate::rt_loop`]), the recorder, the event logger and the
//! control runtime — before [`start`] returns; and, after the stop, the
//! decode thread joined, the recording flushed and the control socket
//! removed.

use std::net::{SocketAddr, UdpSocket};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant, SystemTime};

use anyhow::{Context, Result};
use decoder_core::engine::slot_engine::SlotEngine;
use decoder_core::formats::session_log::{self, LogHeader, RecordKind};
use decoder_core::wire::packet;

use crate::VERSION;
use crate::config::{self, Config};
use crate::control::{self, StreamShape};
use crate::event_log::log_events;
use crate::recorder::Recorder;
use crate::requests::{ControlRequest, ToLoop};
use crate::rt_loop::{RtLoop, StaticInfo, TimedEvent};
use crate::status::{Monitor, Status};
use crate::{adaptation, sys};

fn bind_udp(addr: SocketAddr, key: &str) -> Result<UdpSocket> {
    UdpSocket::bind(addr).with_context(|| format!("cannot bind {addr} ({key})"))
}

fn log_path(dir: &Path, source: &str) -> Result<PathBuf> {
    std::fs::create_dir_all(dir).with_context(|| {
        format!(
            "{source}: cannot create recording directory {}",
            dir.display()
        )
    })?;
    let stamp = humantime::format_rfc3339_seconds(SystemTime::now())
        .to_string()
        .replace(':', "");
    for n in 0..1000 {
        let name = if n == 0 {
            format!("decoderd-{stamp}.vdlog")
        } else {
            format!("decoderd-{stamp}-{n}.vdlog")
        };
        let p = dir.join(name);
        if !p.exists() {
            return Ok(p);
        }
    }
    anyhow::bail!(
        "too many session logs named for this second in {}",
        dir.display()
    )
}

/// A daemon that [`start`] has brought up: its sockets are bound, its
/// threads run, and the addresses it is reachable on are here as typed
/// values, so a caller never reads them back out of a status text.
pub struct DaemonHandle {
    /// Where bin packets are received (the bound `network.listen`).
    pub listen: SocketAddr,
    /// Where task packets are received (the bound `network.task_listen`).
    pub task_listen: SocketAddr,
    /// Where velocity packets go (`network.actuator`).
    pub actuator: SocketAddr,
    /// The local control socket.
    pub control_socket: PathBuf,
    /// The session log being written, when recording is on.
    pub recording: Option<PathBuf>,
    shutdown: Arc<AtomicBool>,
    control: std::thread::JoinHandle<Result<Status>>,
}

impl DaemonHandle {
    /// Blocks until the daemon stops (the shutdown flag, SIGTERM or
    /// SIGINT) and returns its final status.
    pub fn wait(self) -> Result<Status> {
        self.control
            .join()
            .map_err(|_| anyhow::anyhow!("the control thread panicked"))?
    }

    /// Asks the daemon to stop, then waits for it.
    pub fn stop(self) -> Result<Status> {
        self.shutdown.store(true, Ordering::Relaxed);
        self.wait()
    }
}

/// Runs the daemon until `shutdown` is set or SIGTERM/SIGINT arrives;
/// returns the final status.
pub fn run(config: Config, shutdown: Arc<AtomicBool>) -> Result<Status> {
    start(config, shutdown)?.wait()
}

/// Loads the model, binds the sockets, opens the session log and starts
/// the daemon's threads; returns once every socket is bound, with their
/// addresses. Errors here (a model that cannot run, an address in use, a
/// recording directory that cannot be created) happen before any thread
/// starts.
pub fn start(config: Config, shutdown: Arc<AtomicBool>) -> Result<DaemonHandle> {
    let started = Instant::now();
    let model_path = config.model.clone();
    let mut loaded = control::read_model(&model_path).context(config.sources.model)?;
    let pipeline = loaded
        .file
        .pipeline()
        .with_context(|| format!("model {} cannot be run", model_path.display()))?;
    let settings = config.engine_settings(loaded.file.bin_width);
    if settings.drift.enabled && pipeline.input() == packet::BinKind::Features {
        tracing::warn!(
            "[drift] enabled is ignored: drift handling follows spike counts and model {} decodes continuous features",
            model_path.display()
        );
    }
    let n_channels = pipeline.n_channels();
    let n_outputs = pipeline.n_outputs();
    if n_outputs == 0 || n_outputs > packet::MAX_DIMS {
        anyhow::bail!(
            "model {} outputs {n_outputs} velocities; the velocity packet carries 1 to 8",
            model_path.display()
        );
    }
    let engine = SlotEngine::new(settings.clone(), pipeline);
    let shape = StreamShape {
        n_channels,
        bin_width: engine.bin_width(),
        n_outputs,
        input: engine.pipeline().input(),
    };

    let input = bind_udp(config.listen, "network.listen")?;
    let listen = input.local_addr()?;
    let task_input = bind_udp(config.task_listen, "network.task_listen")?;
    let task_listen = task_input.local_addr()?;
    let out_addr: SocketAddr = if config.actuator.is_ipv4() {
        "127.0.0.1:0".parse()?
    } else {
        "[::1]:0".parse()?
    };
    let out_addr = if config.actuator.ip().is_loopback() {
        out_addr
    } else if config.actuator.is_ipv4() {
        "0.0.0.0:0".parse()?
    } else {
        "[::]:0".parse()?
    };
    let output = bind_udp(out_addr, "network.actuator")?;
    let listener_std =
        control::bind(&config.control_socket).with_context(|| config.sources.control_socket)?;

    let (recorder, batcher) = match &config.record_dir {
        Some(dir) => {
            let path = log_path(dir, config.sources.record_dir)?;
            let header = session_log::encode_header(&LogHeader {
                daemon_version: VERSION.into(),
                opened_ns: sys::monotonic_ns(),
                opened_at: humantime::format_rfc3339_millis(SystemTime::now()).to_string(),
                n_channels,
                bin_width: shape.bin_width,
                outputs: loaded.info.outputs.clone(),
                settings: settings.clone(),
            });
            // Room for a typical loop iteration (a datagram, a few sent
            // packets, an event); a bigger batch grows its buffer once.
            let capacity = 2 * session_log::record_len(8 + packet::BIN_HEADER_LEN + 2 * n_channels)
                + 16 * session_log::record_len(8 + packet::velocity_len(n_outputs))
                + 2048;
            let (rec, mut batcher) =
                Recorder::create(&path, &header, config.record_buffer_bins, capacity)
                    .with_context(|| format!("cannot create session log {}", path.display()))?;
            batcher.record_owned(
                RecordKind::Model,
                sys::monotonic_ns(),
                std::mem::take(&mut loaded.bytes),
            );
            let shown = std::path::absolute(&path).unwrap_or(path.clone());
            tracing::info!("recording the session to {}", shown.display());
            (Some(rec), Some(batcher))
        }
        None => {
            tracing::warn!(
                "recording is off (recording.enabled = false): this session cannot be replayed"
            );
            (None, None)
        }
    };

    tracing::info!(
        listen = %listen,
        task_listen = %task_listen,
        actuator = %config.actuator,
        model = %model_path.display(),
        sha256 = %loaded.info.sha256,
        channels = n_channels,
        bin_ms = loaded.file.bin_width.ms(),
        "decoderd {VERSION} starting"
    );
    if config.arm_at_start {
        tracing::warn!(
            "armed at start (--arm): bench use only; the command follows the decoder from the first bin"
        );
    } else {
        let ctl = config::ctl_command(&config.control_socket);
        tracing::info!("disarmed: the command stays zero until `{ctl} arm`");
    }

    let (control_tx, control_rx) = ToLoop::channel(64)?;
    let (events_tx, events_rx) = crossbeam_channel::bounded::<TimedEvent>(4096);
    let events_thread = std::thread::Builder::new()
        .name("decoderd-events".into())
        .spawn(move || log_events(events_rx))?;

    let info = StaticInfo {
        version: VERSION.into(),
        started,
        listen,
        task_listen,
        actuator: config.actuator,
        armed_at_start: config.arm_at_start,
        model: loaded.info.clone(),
        realtime_warnings: Vec::new(),
        recording: recorder.as_ref().map(|r| (r.path.clone(), r.stats.clone())),
        control_socket: config.control_socket.clone(),
        model_warnings: Vec::new(),
    };
    let mut adapt = adaptation::Collector::start(
        config.adaptation.options.clone(),
        config.adaptation.land_after_s,
        &loaded.file,
        &loaded.info,
        control_tx.clone(),
    )?;
    if config.adaptation.enabled {
        match adapt.set(true) {
            Ok(m) => tracing::warn!("adaptation.enabled = true: {m}"),
            Err(m) => tracing::warn!("adaptation.enabled = true, but {m}"),
        }
    }
    let reduce = crate::reduction::ReducedFormWorker::start(control_tx.clone())?;
    // The model's bytes and parameters are in the pipeline and the log now.
    drop(loaded);
    let realtime = config.realtime.clone();
    let rt_shutdown = shutdown.clone();
    let actuator = config.actuator;
    let rt_thread = std::thread::Builder::new()
        .name("decoderd-rt".into())
        .spawn(move || {
            sys::tighten_timer_slack();
            let warnings = sys::apply_realtime(&realtime);
            for w in &warnings {
                tracing::warn!("{w}");
            }
            let mut info = info;
            info.realtime_warnings = warnings;
            RtLoop {
                input,
                task_input,
                task: Default::default(),
                adapt,
                output,
                actuator,
                engine,
                batcher,
                monitor: Monitor::default(),
                control: control_rx,
                pending_update: None,
                reduce,
                events: events_tx,
                shutdown: rt_shutdown,
                info,
                events_not_logged: 0,
            }
            .run()
        })?;

    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .context("cannot start the control runtime")?;
    let summary_every = config.summary_interval;
    let socket_path = config.control_socket.clone();
    let recording = recorder.as_ref().map(|r| r.path.clone());
    let stop_flag = shutdown.clone();
    let control = std::thread::Builder::new()
        .name("decoderd-control".into())
        .spawn(move || {
            runtime.block_on(async {
                let server = tokio::spawn(control::serve(listener_std, control_tx.clone(), shape));
                let summary = tokio::spawn(summary_lines(control_tx.clone(), summary_every));
                wait_for_stop(&stop_flag).await;
                stop_flag.store(true, Ordering::Relaxed);
                server.abort();
                summary.abort();
            });
            drop(control_tx);
            finish(rt_thread, recorder, &socket_path, events_thread)
        })?;
    Ok(DaemonHandle {
        listen,
        task_listen,
        actuator,
        control_socket: config.control_socket.clone(),
        recording,
        shutdown,
        control,
    })
}

/// After the stop: joins the decode thread, flushes the recording, removes
/// the control socket and logs the final line.
fn finish(
    rt_thread: std::thread::JoinHandle<Status>,
    recorder: Option<Recorder>,
    socket_path: &Path,
    events_thread: std::thread::JoinHandle<()>,
) -> Result<Status> {
    let mut status = rt_thread
        .join()
        .map_err(|_| anyhow::anyhow!("the decode thread panicked"))?;
    status.rss_bytes = sys::rss_bytes();
    if let Some(rec) = recorder {
        rec.join();
    }
    let _ = std::fs::remove_file(socket_path);
    let _ = events_thread.join();
    let recording = status
        .recording
        .as_ref()
        .map(|r| {
            format!(
                "{}: {} records written, {} lost",
                r.path.as_deref().unwrap_or("-"),
                r.records_written,
                r.records_lost
            )
        })
        .unwrap_or_else(|| "off".into());
    tracing::info!("stopped: {}; recording {recording}", status.summary_line());
    Ok(status)
}

async fn wait_for_stop(shutdown: &AtomicBool) {
    use tokio::signal::unix::{SignalKind, signal};
    let mut term = signal(SignalKind::terminate()).ok();
    let mut int = signal(SignalKind::interrupt()).ok();
    let mut poll = tokio::time::interval(Duration::from_millis(50));
    loop {
        tokio::select! {
            _ = async { match term.as_mut() { Some(s) => { s.recv().await; } None => std::future::pending().await } } => {
                tracing::info!("SIGTERM: stopping");
                return;
            }
            _ = async { match int.as_mut() { Some(s) => { s.recv().await; } None => std::future::pending().await } } => {
                tracing::info!("SIGINT: stopping");
                return;
            }
            _ = poll.tick() => {
                if shutdown.load(Ordering::Relaxed) {
                    return;
                }
            }
        }
    }
}

async fn summary_lines(to_rt: ToLoop, every: Duration) {
    let mut tick = tokio::time::interval(every);
    tick.tick().await;
    loop {
        tick.tick().await;
        let (tx, rx) = tokio::sync::oneshot::channel();
        // Never block the runtime on the decode loop: skip a line when busy.
        if let Err(crossbeam_channel::TrySendError::Disconnected(_)) =
            to_rt.try_send(ControlRequest::Status(tx))
        {
            return;
        }
        if let Ok(s) = rx.await {
            if let Some(alarm) = s.recording.as_ref().and_then(|r| r.alarm.as_ref()) {
                tracing::error!("{alarm}");
            }
            tracing::info!("{}", s.summary_line());
        }
    }
}
