//! The offline companion of `decoderd`: simulate blocks, train and evaluate
//! decoders, replay and verify sessions through the daemon's own decode
//! pipeline, drive a daemon on loopback (stream, bench, closed loop), and
//! inspect model files. The verbs and exit codes are PROTOCOL.md §5.
//!
//! Every verb returns `anyhow::Result`; the error is printed once, here, with
//! its context chain on one line. A [`CheckFailed`] anywhere in the chain
//! means "the run worked but the thing checked did not pass" (exit 1);
//! anything else is a user error (exit 2).

pub mod bench_meter;
pub mod cmd;
pub mod nwb_export;
pub mod output;
pub mod plot;
pub mod progress;

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand};

/// A check that ran and did not pass.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct CheckFailed(pub String);

#[derive(Debug, Parser)]
#[command(
    name = "replay-tool",
    version,
    about = "Simulate, train, evaluate and replay velocity decoders offline"
)]
pub struct Cli {
    /// More log output (repeat for more).
    #[arg(short, long, global = true, action = clap::ArgAction::Count)]
    pub verbose: u8,
    #[command(subcommand)]
    pub command: Command,
}

/// The line every verb that drives a live daemon carries in its help.
pub const NOT_NEXT_TO_A_PERSON: &str =
    "Never run this against a daemon that drives an actuator attached to a person.";

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Write a synthetic center-out reaching block as a session directory.
    Simulate(cmd::simulate::Args),
    /// Train a decoder from a calibration block and write a model file.
    Train(cmd::train::Args),
    /// Cross-validate decoders on a block and print (or write) the scores.
    Evaluate(cmd::evaluate::Args),
    /// Decode every bin of a block or a session log through the daemon's
    /// decode pipeline and write the estimates.
    Replay(cmd::replay::Args),
    /// Write a session log as a session directory: counts, the task's
    /// kinematics, trials, valid rows, and the estimates and commands sent.
    Export(cmd::export::Args),
    /// Write a Neurodata Without Borders 2.x file (units, position,
    /// trials) as a session directory.
    Import(cmd::import::Args),
    /// Check a session log bit for bit against a replay through the
    /// daemon's slot engine; exit 1 at the first difference.
    Verify(cmd::verify::Args),
    /// Stream a block to a running daemon as its front end would and check
    /// its velocity packets against offline decoding. Never run this
    /// against a daemon that drives an actuator attached to a person.
    Stream(cmd::stream::Args),
    /// Measure the whole loop's latency and dropouts against a spawned or
    /// running decoderd, with a pass/fail and an HTML report. Never run
    /// this against a daemon that drives an actuator attached to a person.
    Bench(cmd::bench::Args),
    /// A simulated user drives a spawned or running decoderd in a
    /// center-out task. Never run this against a daemon that drives an
    /// actuator attached to a person.
    ClosedLoop(cmd::closed_loop::Args),
    /// Inspect model files.
    Model {
        #[command(subcommand)]
        command: ModelCommand,
    },
    /// The whole job on a built-in demo: simulate, train, evaluate, then run
    /// decoderd on loopback and stream a held-out block through it.
    Demo(cmd::demo::Args),
}

#[derive(Debug, Subcommand)]
pub enum ModelCommand {
    /// Print a model's parameters and provenance.
    Show {
        /// The model file.
        model: PathBuf,
        /// Print the PROTOCOL.md §4 JSON export instead of a summary.
        #[arg(long)]
        json: bool,
    },
}

pub fn init_logging(verbose: u8) {
    let default = match verbose {
        0 => "warn",
        1 => "info",
        _ => "debug",
    };
    let filter = tracing_subscriber::EnvFilter::try_from_default_env()
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(default));
    let _ = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .with_writer(std::io::stderr)
        .try_init();
}

pub fn run(cli: Cli) -> ExitCode {
    let result = match cli.command {
        Command::Simulate(a) => cmd::simulate::run(&a),
        Command::Train(a) => cmd::train::run(&a),
        Command::Evaluate(a) => cmd::evaluate::run(&a),
        Command::Replay(a) => cmd::replay::run(&a),
        Command::Verify(a) => cmd::verify::run(&a),
        Command::Export(a) => cmd::export::run(&a),
        Command::Import(a) => cmd::import::run(&a),
        Command::Stream(a) => cmd::stream::run(&a),
        Command::ClosedLoop(a) => cmd::closed_loop::run_verb(&a),
        Command::Model {
            command: ModelCommand::Show { model, json },
        } => cmd::model_show::run(&model, json),
        Command::Demo(a) => cmd::demo::run(&a),
        Command::Bench(a) => cmd::bench::run(&a),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(err) => {
            let chain: Vec<String> = err.chain().map(|e| e.to_string()).collect();
            eprintln!("replay-tool: {}", chain.join(": "));
            if err.chain().any(|e| e.is::<CheckFailed>()) {
                ExitCode::from(1)
            } else {
                ExitCode::from(2)
            }
        }
    }
}
