//! `decoderd`: the program between the spike front end and the actuator.
//!
//! [`run`] loads the model, binds the sockets, opens the session log and
//! starts three kinds of work: the real-time loop on its own thread
//! ([`rt_loop`]), the recorder's writer thread ([`recorder`]), and a
//! single-threaded tokio runtime for the control socket, the periodic
//! summary line and signals ([`control`]). The decode logic itself is
//! `decoder_core::engine::slot_engine`, shared with offline replay.

pub mod adaptation;
pub mod alloc_count;
pub mod config;
pub mod control;
pub mod model_identity;
pub mod recorder;
pub mod requests;
pub mod rt_loop;
pub mod status;
pub mod sys;
pub mod watch;

use std::net::{SocketAddr, UdpSocket};
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant, SystemTime};

use anyhow::{Context, Result};
use clap::{Parser, Subcommand};
use crossbeam_channel::Receiver;
use decoder_core::engine::slot_engine::{EngineEvent, SlotEngine};
use decoder_core::formats::session_log::{self, LogHeader, RecordKind};
use decoder_core::wire::packet;

use crate::config::{Config, LogFormat, Overrides, RawConfig};
use crate::control::{Reply, Request, StreamShape};
use crate::recorder::Recorder;
use crate::requests::ControlRequest;
use crate::rt_loop::{RtLoop, StaticInfo, TimedEvent};
use crate::status::{Monitor, Status};

pub const VERSION: &str = env!("CARGO_PKG_VERSION");

#[derive(Debug, Parser)]
#[command(
    name = "decoderd",
    version,
    about = "Real-time closed-loop velocity decoder: UDP bins in, velocity commands out"
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the decoder (starts disarmed unless --arm).
    Run(RunArgs),
    /// Talk to a running decoderd over its control socket.
    Ctl(CtlArgs),
}

#[derive(Debug, clap::Args)]
pub struct RunArgs {
    /// Configuration file (config/daemon.toml documents every key).
    #[arg(long)]
    pub config: Option<PathBuf>,
    /// Model file from `replay-tool train` (overrides model.path).
    #[arg(long)]
    pub model: Option<PathBuf>,
    /// Address to receive bin packets on (overrides network.listen).
    #[arg(long)]
    pub listen: Option<String>,
    /// Address to receive task packets on (overrides network.task_listen).
    #[arg(long)]
    pub task_listen: Option<String>,
    /// Address of the actuator client (overrides network.actuator).
    #[arg(long)]
    pub actuator: Option<String>,
    /// Directory for the session log (overrides recording.dir; turns recording on).
    #[arg(long)]
    pub record: Option<PathBuf>,
    /// Control socket path (overrides control.socket).
    #[arg(long)]
    pub socket: Option<PathBuf>,
    /// Arm at start. For bench use only: the command follows the decoder
    /// from the first bin without an operator's arm.
    #[arg(long)]
    pub arm: bool,
}

impl RunArgs {
    /// The `decoderd run …` arguments that say the same as these settings,
    /// for a launcher that starts the daemon as a process.
    pub fn to_command_line(&self) -> Vec<std::ffi::OsString> {
        let mut a: Vec<std::ffi::OsString> = vec!["run".into()];
        let mut flag = |name: &str, value: Option<std::ffi::OsString>| {
            if let Some(v) = value {
                a.push(name.into());
                a.push(v);
            }
        };
        flag("--config", self.config.clone().map(Into::into));
        flag("--model", self.model.clone().map(Into::into));
        flag("--listen", self.listen.clone().map(Into::into));
        flag("--task-listen", self.task_listen.clone().map(Into::into));
        flag("--actuator", self.actuator.clone().map(Into::into));
        flag("--record", self.record.clone().map(Into::into));
        flag("--socket", self.socket.clone().map(Into::into));
        if self.arm {
            a.push("--arm".into());
        }
        a
    }
}

#[derive(Debug, clap::Args)]
pub struct CtlArgs {
    /// Control socket of the running daemon.
    #[arg(long, default_value_os_t = config::default_socket())]
    pub socket: PathBuf,
    #[command(subcommand)]
    pub action: CtlAction,
}

#[derive(Debug, Subcommand)]
pub enum CtlAction {
    /// Show state, counters, latency, channel health and recording.
    Status {
        /// Print the status document as JSON (PROTOCOL.md §11) instead of a table.
        #[arg(long)]
        json: bool,
    },
    /// Arm: the command follows the decoder (needs a live stream).
    Arm,
    /// Disarm: command zero.
    Disarm,
    /// Halt: command zero until an operator arms again.
    Halt,
    /// Swap in another model at the next bin boundary.
    Load {
        /// Model file from `replay-tool train`.
        model: PathBuf,
    },
    /// A live view for the operator, redrawn four times a second: state,
    /// rates, latency, dropouts, command, channels, task and adaptation.
    /// `h` halts; `q` leaves the view.
    Watch,
    /// Turn online adaptation on or off (config section `[adaptation]`).
    Adapt {
        #[arg(value_enum)]
        switch: Switch,
    },
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, clap::ValueEnum)]
pub enum Switch {
    On,
    Off,
}

pub fn main_with(cli: Cli) -> ExitCode {
    match cli.command {
        Command::Run(args) => match prepare(&args) {
            Ok(config) => {
                init_logging(config.log_format, &config.log_level);
                let shutdown = Arc::new(AtomicBool::new(false));
                match run(config, shutdown) {
                    Ok(_) => ExitCode::SUCCESS,
                    Err(e) => {
                        eprintln!("decoderd: {e:#}");
                        ExitCode::from(2)
                    }
                }
            }
            Err(e) => {
                eprintln!("decoderd: {e:#}");
                ExitCode::from(2)
            }
        },
        Command::Ctl(args) => match ctl(&args) {
            Ok(true) => ExitCode::SUCCESS,
            Ok(false) => ExitCode::from(1),
            Err(e) => {
                eprintln!("decoderd ctl: {e:#}");
                ExitCode::from(2)
            }
        },
    }
}

/// Reads and validates the configuration with the flags applied.
pub fn prepare(args: &RunArgs) -> Result<Config> {
    let (raw, origin) = match &args.config {
        Some(p) => (RawConfig::from_file(p)?, p.display().to_string()),
        None => (RawConfig::default(), "defaults".to_string()),
    };
    let overrides = Overrides {
        model: args.model.clone(),
        listen: args.listen.clone(),
        task_listen: args.task_listen.clone(),
        actuator: args.actuator.clone(),
        record: args.record.clone(),
        socket: args.socket.clone(),
        arm: args.arm,
    };
    Ok(Config::resolve(raw, &overrides, &origin)?)
}

pub fn init_logging(format: LogFormat, level: &str) {
    let filter = tracing_subscriber::EnvFilter::try_from_default_env()
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(level));
    // Colour codes only for a person at a terminal, never in a log file.
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .with_writer(std::io::stderr);
    let _ = match format {
        LogFormat::Human => builder.try_init(),
        LogFormat::Json => builder.json().try_init(),
    };
}

/// `decoderd ctl`: prints the reply; Ok(false) when the daemon refused.
pub fn ctl(args: &CtlArgs) -> Result<bool> {
    let request = match &args.action {
        CtlAction::Watch => {
            watch::run(&args.socket)?;
            return Ok(true);
        }
        CtlAction::Status { .. } => Request::Status,
        CtlAction::Arm => Request::Arm,
        CtlAction::Disarm => Request::Disarm,
        CtlAction::Halt => Request::Halt,
        CtlAction::Adapt { switch } => Request::Adapt {
            on: *switch == Switch::On,
        },
        CtlAction::Load { model } => Request::Load {
            // The daemon runs elsewhere: send an absolute path.
            path: std::path::absolute(model)
                .with_context(|| format!("cannot resolve {}", model.display()))?,
        },
    };
    let reply: Reply = control::request(&args.socket, &request)?;
    let json = matches!(args.action, CtlAction::Status { json: true });
    match (&reply.status, json) {
        (Some(s), true) => println!("{}", serde_json::to_string_pretty(s)?),
        (Some(s), false) => print!("{}", s.table()),
        (None, _) if reply.ok => println!("{}", reply.message),
        (None, _) => eprintln!("decoderd: {}", reply.message),
    }
    Ok(reply.ok)
}

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

    let (control_tx, control_rx) = crossbeam_channel::bounded::<ControlRequest>(64);
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

async fn summary_lines(to_rt: crossbeam_channel::Sender<ControlRequest>, every: Duration) {
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

/// Logs engine events; routine ones (rejects, late and duplicate bins) at
/// most five per second per kind, with a count of the rest.
fn log_events(events: Receiver<TimedEvent>) {
    let mut window_start = Instant::now();
    let mut shown = [0u32; 3];
    let mut suppressed = [0u64; 3];
    while let Ok((_, event)) = events.recv() {
        if window_start.elapsed() >= Duration::from_secs(1) {
            let total: u64 = suppressed.iter().sum();
            if total > 0 {
                tracing::warn!(
                    rejected = suppressed[0],
                    late = suppressed[1],
                    duplicate_or_stray = suppressed[2],
                    "{total} more routine events in the last second not logged (see ctl status counters)"
                );
            }
            window_start = Instant::now();
            shown = [0; 3];
            suppressed = [0; 3];
        }
        let routine = match event {
            EngineEvent::Rejected(_) => Some(0),
            EngineEvent::Late { .. } => Some(1),
            EngineEvent::Duplicate { .. } | EngineEvent::Stray { .. } => Some(2),
            _ => None,
        };
        if let Some(k) = routine {
            if shown[k] >= 5 {
                suppressed[k] += 1;
                continue;
            }
            shown[k] += 1;
        }
        match event {
            EngineEvent::Rejected(r) => tracing::warn!(reason = r.name(), "datagram rejected: {r}"),
            EngineEvent::Late { seq } => tracing::warn!(
                seq,
                "bin arrived after its deadline; dropped (its slot was coasted)"
            ),
            EngineEvent::Duplicate { seq } => tracing::warn!(seq, "duplicate bin dropped"),
            EngineEvent::Stray { seq } => tracing::warn!(
                seq,
                "bin far outside the expected seq dropped as a stray (a second in sequence would start a new stream)"
            ),
            EngineEvent::StreamStarted { seq, .. } => {
                tracing::info!(seq, "stream started: bin clock anchored")
            }
            EngineEvent::NewStream { expected_seq, seq } => tracing::warn!(
                expected_seq,
                seq,
                "seq jumped outside the reorder window: new stream, decoder reset, supervisor halted"
            ),
            EngineEvent::Transition(t) => {
                let reason = t.reason;
                if matches!(
                    t.to,
                    decoder_core::engine::supervisor::SupervisorState::Halted
                ) {
                    tracing::warn!(
                        seq = t.seq,
                        "{} -> {} ({reason})",
                        t.from.name(),
                        t.to.name()
                    );
                } else {
                    tracing::info!(
                        seq = t.seq,
                        "{} -> {} ({reason})",
                        t.from.name(),
                        t.to.name()
                    );
                }
            }
            EngineEvent::ModelChanged { seq } => {
                tracing::info!(seq, "model swapped in at this bin")
            }
        }
    }
}
