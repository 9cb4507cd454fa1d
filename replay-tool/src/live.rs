//! Driving a real `decoderd` from outside, as a rig does: spawn it on
//! loopback (or on threads of this process when no binary is at hand),
//! read its status over the control socket, stop it with SIGTERM. The
//! front end and actuator stand-ins are `daemon::loopback`.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use anyhow::{Context, Result, bail};
use daemon::control::{Reply, Request, request};
use daemon::status::Status;

/// The `decoderd` binary: `explicit`, else the one beside this executable;
/// `None` when there is none (the caller may run the daemon in-process).
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

/// How the daemon runs: its own process (as on a rig), or, when no
/// `decoderd` binary is at hand, the same daemon code on threads of this
/// process.
enum Running {
    Process(Child),
    InProcess {
        shutdown: Arc<AtomicBool>,
        thread: Option<JoinHandle<Result<Status>>>,
    },
}

pub struct SpawnedDaemon {
    running: Running,
    pub socket: PathBuf,
    pub listen: SocketAddr,
    pub log_file: PathBuf,
}

impl SpawnedDaemon {
    /// Starts `decoderd run` (the binary `exe`, or in-process when `None`)
    /// with its files under `work`, listening on an ephemeral loopback port,
    /// and waits until its control socket answers.
    pub fn start(
        exe: Option<&Path>,
        model: &Path,
        work: &Path,
        actuator: SocketAddr,
        arm: bool,
    ) -> Result<SpawnedDaemon> {
        Self::start_with(exe, None, model, work, actuator, arm)
    }

    /// [`SpawnedDaemon::start`] with the user's daemon configuration
    /// (`config`); its control socket and recording go under `work`.
    pub fn start_with(
        exe: Option<&Path>,
        config: Option<&Path>,
        model: &Path,
        work: &Path,
        actuator: SocketAddr,
        arm: bool,
    ) -> Result<SpawnedDaemon> {
        std::fs::create_dir_all(work)
            .with_context(|| format!("cannot create {}", work.display()))?;
        let socket = work.join("decoderd.sock");
        let log_file = work.join("decoderd.log");
        let recordings = work.join("recordings");
        let config = match config {
            Some(c) => c.to_path_buf(),
            None => {
                let c = work.join("daemon.toml");
                std::fs::write(&c, "# written by replay-tool; every key at its default\n")?;
                c
            }
        };
        let Some(exe) = exe else {
            return Self::start_in_process(
                &config, model, socket, recordings, log_file, actuator, arm,
            );
        };
        let log = std::fs::File::create(&log_file)?;
        let mut cmd = Command::new(exe);
        cmd.arg("run")
            .arg("--config")
            .arg(&config)
            .arg("--model")
            .arg(model)
            .arg("--listen")
            .arg("127.0.0.1:0")
            .arg("--actuator")
            .arg(actuator.to_string())
            .arg("--socket")
            .arg(&socket)
            .arg("--record")
            .arg(&recordings)
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(log);
        if arm {
            cmd.arg("--arm");
        }
        let child = cmd.spawn().with_context(|| {
            format!(
                "cannot start {}; build it with `cargo build --release` or pass --decoderd PATH",
                exe.display()
            )
        })?;
        Self::wait_until_up(Running::Process(child), socket, log_file)
    }

    fn start_in_process(
        config: &Path,
        model: &Path,
        socket: PathBuf,
        recordings: PathBuf,
        log_file: PathBuf,
        actuator: SocketAddr,
        arm: bool,
    ) -> Result<SpawnedDaemon> {
        let config = daemon::prepare(&daemon::RunArgs {
            config: Some(config.to_path_buf()),
            model: Some(model.to_path_buf()),
            listen: Some("127.0.0.1:0".into()),
            actuator: Some(actuator.to_string()),
            record: Some(recordings),
            socket: Some(socket.clone()),
            arm,
        })?;
        let shutdown = Arc::new(AtomicBool::new(false));
        let flag = shutdown.clone();
        let thread = std::thread::Builder::new()
            .name("decoderd".into())
            .spawn(move || daemon::run(config, flag))?;
        let running = Running::InProcess {
            shutdown,
            thread: Some(thread),
        };
        Self::wait_until_up(running, socket, log_file)
    }

    fn wait_until_up(
        mut running: Running,
        socket: PathBuf,
        log_file: PathBuf,
    ) -> Result<SpawnedDaemon> {
        let started = Instant::now();
        loop {
            if let Ok(Reply {
                status: Some(s), ..
            }) = request(&socket, &Request::Status)
            {
                return Ok(SpawnedDaemon {
                    listen: s.listen.parse()?,
                    running,
                    socket,
                    log_file,
                });
            }
            match &mut running {
                Running::Process(child) => {
                    if let Some(exit) = child.try_wait()? {
                        bail!(
                            "decoderd exited at start ({exit}): {}",
                            std::fs::read_to_string(&log_file)
                                .unwrap_or_default()
                                .trim()
                        );
                    }
                }
                Running::InProcess { thread, .. } => {
                    if thread.as_ref().is_some_and(|t| t.is_finished()) {
                        let result = thread.take().map(|t| t.join());
                        match result {
                            Some(Ok(Err(e))) => {
                                return Err(e.context("decoderd (in-process) failed at start"));
                            }
                            _ => bail!("decoderd (in-process) stopped at start"),
                        }
                    }
                }
            }
            if started.elapsed() > Duration::from_secs(20) {
                bail!(
                    "decoderd did not answer on {} within 20 s",
                    socket.display()
                );
            }
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    /// Whether the daemon runs as its own process.
    pub fn is_process(&self) -> bool {
        matches!(self.running, Running::Process(_))
    }

    pub fn status(&self) -> Result<Status> {
        let r = request(&self.socket, &Request::Status)?;
        r.status.map(|s| *s).context("decoderd sent no status")
    }

    /// SIGTERM (or the shutdown flag in-process), then waits for a clean
    /// exit.
    pub fn stop(mut self) -> Result<()> {
        match &mut self.running {
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
                        return Ok(());
                    }
                    if started.elapsed() > Duration::from_secs(10) {
                        let _ = child.kill();
                        bail!("decoderd did not stop within 10 s of SIGTERM");
                    }
                    std::thread::sleep(Duration::from_millis(10));
                }
            }
            Running::InProcess { shutdown, thread } => {
                shutdown.store(true, Ordering::Relaxed);
                match thread.take().map(|t| t.join()) {
                    Some(Ok(Ok(_))) | None => Ok(()),
                    Some(Ok(Err(e))) => Err(e.context("decoderd (in-process)")),
                    Some(Err(_)) => bail!("decoderd (in-process) panicked"),
                }
            }
        }
    }
}

impl Drop for SpawnedDaemon {
    fn drop(&mut self) {
        match &mut self.running {
            Running::Process(child) => {
                if let Ok(None) = child.try_wait() {
                    let _ = child.kill();
                    let _ = child.wait();
                }
            }
            Running::InProcess { shutdown, thread } => {
                shutdown.store(true, Ordering::Relaxed);
                if let Some(t) = thread.take() {
                    let _ = t.join();
                }
            }
        }
    }
}
