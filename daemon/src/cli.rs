//! The command line of `decoderd`: `run` (flags over the configuration
//! file) and `ctl` (a client of the control socket), parsed in two steps —
//! raw flags, then the validated configuration — and the exit codes (2 a
//! user error, 1 a refused request).

use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;
use std::sync::atomic::AtomicBool;

use anyhow::{Context, Result};
use clap::{Parser, Subcommand};

use crate::config::{self, Config, LogFormat, Overrides, RawConfig};
use crate::control::{self, Reply, Request};
use crate::start::run;
use crate::watch;

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
    /// Turn drift handling on or off (config section `[drift]`): follow
    /// each channel's baseline, leave dead and noisy channels out, and
    /// (with `correct_bias`) subtract the velocity bias.
    Drift {
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
        CtlAction::Drift { switch } => Request::Drift {
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
