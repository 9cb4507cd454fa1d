//! The one way anything outside the daemon brings a `decoderd` up: tests,
//! the latency benchmark and `replay-tool` all launch through [`Launch`].
//! The daemon runs as its own process when a binary is named (as on a rig),
//! or, when none is at hand, as the same daemon code on threads of the
//! caller. Either way it listens on an ephemeral loopback port, keeps its
//! control socket, log and recording under one work directory, and the
//! caller learns its bound address as a typed value.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::Arc;
use std::sync::atomic::AtomicBool;
use std::time::{Duration, Instant};

use anyhow::{Context, Result, bail};
use daemon::DaemonHandle;
use daemon::control::{Reply, Request, request};
use daemon::status::Status;

/// What to launch. Build with [`Launch::new`] and the setters, then
/// [`Launch::start`].
#[derive(Clone, Debug)]
pub struct Launch {
    decoderd: Option<PathBuf>,
    config: Option<PathBuf>,
    extra_toml: String,
    model: PathBuf,
    work: PathBuf,
    actuator: SocketAddr,
    arm: bool,
    record: bool,
}

impl Launch {
    /// `model` decoded, packets to `actuator`, files under `work`;
    /// in-process, disarmed, recording on, every other key at its default.
    pub fn new(model: &Path, work: &Path, actuator: SocketAddr) -> Launch {
        Launch {
            decoderd: None,
            config: None,
            extra_toml: String::new(),
            model: model.to_path_buf(),
            work: work.to_path_buf(),
            actuator,
            arm: false,
            record: true,
        }
    }

    /// Run this `decoderd` binary as a child process (None: in-process).
    pub fn binary(mut self, exe: Option<&Path>) -> Launch {
        self.decoderd = exe.map(Path::to_path_buf);
        self
    }

    /// The user's daemon configuration (its listen address, control
    /// socket and recording directory are replaced by the launch's).
    pub fn config(mut self, config: Option<&Path>) -> Launch {
        self.config = config.map(Path::to_path_buf);
        self
    }

    /// TOML written into the configuration when no user file is given.
    pub fn extra_toml(mut self, toml: &str) -> Launch {
        self.extra_toml = toml.to_string();
        self
    }

    /// Arm at start (loopback actuator only, as the daemon enforces).
    pub fn arm(mut self, arm: bool) -> Launch {
        self.arm = arm;
        self
    }

    /// Record a session log under `work/recordings` (default on).
    pub fn record(mut self, record: bool) -> Launch {
        self.record = record;
        self
    }

    /// Starts the daemon and returns once its control socket answers.
    pub fn start(&self) -> Result<RunningDaemon> {
        std::fs::create_dir_all(&self.work)
            .with_context(|| format!("cannot create {}", self.work.display()))?;
        let socket = self.work.join("decoderd.sock");
        let log_file = self.work.join("decoderd.log");
        let recordings = self.work.join("recordings");
        let config = match &self.config {
            Some(c) => c.clone(),
            None => {
                let c = self.work.join("daemon.toml");
                let text = format!(
                    "# written by the launcher; every key not below at its default\n{}",
                    self.extra_toml
                );
                std::fs::write(&c, text)
                    .with_context(|| format!("cannot write {}", c.display()))?;
                c
            }
        };
        let args = daemon::RunArgs {
            config: Some(config),
            model: Some(self.model.clone()),
            listen: Some("127.0.0.1:0".into()),
            task_listen: Some("127.0.0.1:0".into()),
            actuator: Some(self.actuator.to_string()),
            record: self.record.then(|| recordings.clone()),
            socket: Some(socket.clone()),
            arm: self.arm,
        };
        let running = match &self.decoderd {
            None => {
                let config = daemon::prepare(&args)?;
                let shutdown = Arc::new(AtomicBool::new(false));
                let handle = daemon::start(config, shutdown)
                    .context("decoderd (in-process) failed at start")?;
                Running::InProcess(Some(handle))
            }
            Some(exe) => {
                let log = std::fs::File::create(&log_file)
                    .with_context(|| format!("cannot create {}", log_file.display()))?;
                let mut cmd = Command::new(exe);
                cmd.args(args.to_command_line())
                    .stdin(Stdio::null())
                    .stdout(Stdio::null())
                    .stderr(log);
                let child = cmd.spawn().with_context(|| {
                    format!(
                        "cannot start {}; build it with `cargo build --release` or pass --decoderd PATH",
                        exe.display()
                    )
                })?;
                Running::Process(child)
            }
        };
        let (running, status) = wait_until_answering(running, &socket, &log_file)?;
        Ok(RunningDaemon {
            running,
            // Typed in status, for a child process and in-process alike.
            listen: status.listen,
            task_listen: status
                .task
                .listen
                .context("the daemon's status names no task socket")?,
            socket,
            log_file,
            recordings,
        })
    }
}

enum Running {
    Process(Child),
    InProcess(Option<DaemonHandle>),
}

/// A launched daemon; dropped, it is stopped (killed, for a process).
pub struct RunningDaemon {
    running: Running,
    /// Where to send bin packets.
    pub listen: SocketAddr,
    /// Where to send task packets.
    pub task_listen: SocketAddr,
    /// The control socket.
    pub socket: PathBuf,
    /// The daemon's log (a process's stderr).
    pub log_file: PathBuf,
    /// Where its session logs go.
    pub recordings: PathBuf,
}

/// How a daemon ended.
#[derive(Debug)]
pub struct Stopped {
    /// The session log it wrote, when recording was on.
    pub session_log: Option<PathBuf>,
    /// The final status (in-process only; a process prints its own).
    pub status: Option<Status>,
}

/// Polls the control socket until the daemon answers with its status.
fn wait_until_answering(
    mut running: Running,
    socket: &Path,
    log_file: &Path,
) -> Result<(Running, Status)> {
    let started = Instant::now();
    loop {
        if let Ok(Reply {
            status: Some(s), ..
        }) = request(socket, &Request::Status)
        {
            return Ok((running, *s));
        }
        if let Running::Process(child) = &mut running {
            if let Some(exit) = child.try_wait()? {
                let log = std::fs::read_to_string(log_file).unwrap_or_default();
                bail!("decoderd exited at start ({exit}): {}", log.trim());
            }
        }
        if started.elapsed() > Duration::from_secs(20) {
            // Not left running behind the error.
            match &mut running {
                Running::Process(child) => {
                    let _ = child.kill();
                    let _ = child.wait();
                }
                Running::InProcess(handle) => {
                    if let Some(h) = handle.take() {
                        let _ = h.stop();
                    }
                }
            }
            bail!(
                "decoderd did not answer on {} within 20 s; see {}",
                socket.display(),
                log_file.display()
            );
        }
        std::thread::sleep(Duration::from_millis(10));
    }
}

impl RunningDaemon {
    /// Whether the daemon runs as its own process.
    pub fn is_process(&self) -> bool {
        matches!(self.running, Running::Process(_))
    }

    /// The process id, for a daemon in its own process.
    pub fn pid(&self) -> Option<u32> {
        match &self.running {
            Running::Process(c) => Some(c.id()),
            Running::InProcess(_) => None,
        }
    }

    /// One control request.
    pub fn ctl(&self, r: &Request) -> Result<Reply> {
        request(&self.socket, r)
    }

    pub fn status(&self) -> Result<Status> {
        let r = self.ctl(&Request::Status)?;
        r.status.map(|s| *s).context("decoderd sent no status")
    }

    /// Polls status until `done` holds for it, or fails after `timeout`.
    pub fn wait_for_status(
        &self,
        what: &str,
        timeout: Duration,
        done: impl Fn(&Status) -> bool,
    ) -> Result<Status> {
        let deadline = Instant::now() + timeout;
        loop {
            let s = self.status()?;
            if done(&s) {
                return Ok(s);
            }
            if Instant::now() > deadline {
                bail!(
                    "status never showed {what} within {:.1} s",
                    timeout.as_secs_f64()
                );
            }
            std::thread::sleep(Duration::from_millis(5));
        }
    }

    /// The daemon's log so far (a process's stderr).
    pub fn log_text(&self) -> String {
        std::fs::read_to_string(&self.log_file).unwrap_or_default()
    }

    /// SIGTERM (or the shutdown flag in-process), then waits for a clean
    /// exit; fails when it did not exit cleanly.
    pub fn stop(mut self) -> Result<Stopped> {
        let status = match &mut self.running {
            Running::Process(child) => {
                // SAFETY: signalling our own child by its pid.
                unsafe { libc::kill(child.id() as i32, libc::SIGTERM) };
                let started = Instant::now();
                loop {
                    if let Some(exit) = child.try_wait()? {
                        if !exit.success() {
                            bail!(
                                "decoderd exited with {exit}; see {}",
                                self.log_file.display()
                            );
                        }
                        break None;
                    }
                    if started.elapsed() > Duration::from_secs(10) {
                        let _ = child.kill();
                        bail!("decoderd did not stop within 10 s of SIGTERM");
                    }
                    std::thread::sleep(Duration::from_millis(5));
                }
            }
            Running::InProcess(handle) => match handle.take() {
                Some(h) => Some(h.stop().context("decoderd (in-process)")?),
                None => None,
            },
        };
        Ok(Stopped {
            session_log: newest_log(&self.recordings),
            status,
        })
    }
}

/// The newest `.vdlog` in `dir`.
fn newest_log(dir: &Path) -> Option<PathBuf> {
    let mut logs: Vec<PathBuf> = std::fs::read_dir(dir)
        .ok()?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.extension().is_some_and(|e| e == "vdlog"))
        .collect();
    logs.sort();
    logs.pop()
}

impl Drop for RunningDaemon {
    fn drop(&mut self) {
        match &mut self.running {
            Running::Process(child) => {
                if let Ok(None) = child.try_wait() {
                    let _ = child.kill();
                    let _ = child.wait();
                }
            }
            Running::InProcess(handle) => {
                if let Some(h) = handle.take() {
                    let _ = h.stop();
                }
            }
        }
    }
}
