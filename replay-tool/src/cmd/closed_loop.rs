//! `replay-tool closed-loop`: a simulated participant drives the real
//! daemon, spawned on loopback or already running. Each bin the user intends a velocity toward the target from
//! where the cursor is; their channels fire accordingly; the bin goes to
//! `decoderd` over UDP as a front end would send it; the velocity packet
//! that comes back moves the cursor. This is how a user compares decoders
//! in closed loop without a participant. The block is written as a session
//! directory (counts, cursor position, decoded velocity, targets) for
//! `replay-tool train --refit`. The cursor and target travel with the
//! bins here; the task packets of PROTOCOL.md §6 are not sent yet.

use std::net::{SocketAddr, UdpSocket};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use anyhow::{Context, Result, bail};
use daemon_rig::Launch;
use decoder_core::formats::block::Trial;
use decoder_core::formats::packet::{self, BinHeader, VelocityPacket};
use decoder_core::linalg::Mat;
use decoder_core::sim::reaching::population;
use decoder_core::sim::user::{CenterOut, SimulatedUser, TaskOptions, TaskSummary, TrialResult};
use decoder_core::{Block, ModelFile};

use crate::CheckFailed;
use crate::output::write_atomic;

#[derive(Debug, clap::Args)]
#[command(after_help = crate::NOT_NEXT_TO_A_PERSON)]
pub struct Args {
    /// Model to run; the user's channels come from the simulated array it
    /// was trained on (--array-seed).
    #[arg(long)]
    pub model: PathBuf,
    /// The daemon configuration the spawned daemon runs.
    #[arg(long, conflicts_with = "daemon")]
    pub config: Option<PathBuf>,
    /// The decoderd binary to spawn (default: the one beside replay-tool;
    /// without one the daemon runs in this process).
    #[arg(long, conflicts_with = "daemon")]
    pub decoderd: Option<PathBuf>,
    /// Drive a running daemon listening here instead of spawning one (it
    /// must be armed, and its network.actuator must be --actuator).
    #[arg(long, requires = "actuator")]
    pub daemon: Option<String>,
    /// With --daemon: where to receive its velocity packets.
    #[arg(long, requires = "daemon")]
    pub actuator: Option<String>,
    /// Number of center-out trials.
    #[arg(long, default_value_t = 16)]
    pub trials: usize,
    /// The simulated array the user's channels come from (as `simulate
    /// --array-seed`; the model must have been trained on it).
    #[arg(long, default_value_t = 1)]
    pub array_seed: u64,
    /// Seed of the target order and of the user's spikes.
    #[arg(long, default_value_t = 1)]
    pub task_seed: u64,
    /// Time between bins as a multiple of the bin width (1 = the bin rate;
    /// 0 = as fast as the loop turns round).
    #[arg(long, default_value_t = 1.0)]
    pub time_scale: f64,
    /// Exit 1 when the success rate is below this fraction (0..1).
    #[arg(long)]
    pub min_success: Option<f64>,
    /// Folder for closed-loop.json, the spawned daemon's files and the
    /// closed-loop block.
    #[arg(long, default_value = "closed-loop-report")]
    pub report: PathBuf,
}

/// `replay-tool closed-loop`.
pub fn run_verb(args: &Args) -> Result<()> {
    super::check_time_scale(args.time_scale, true)?;
    if let Some(m) = args.min_success {
        if !(0.0..=1.0).contains(&m) {
            bail!("--min-success {m}: must be a fraction between 0 and 1");
        }
    }
    std::fs::create_dir_all(&args.report)
        .with_context(|| format!("cannot create {}", args.report.display()))?;
    let exe = super::find_decoderd(args.decoderd.as_deref())?;
    let running = match (&args.daemon, &args.actuator) {
        (Some(d), Some(a)) => Some((
            super::socket_addr("--daemon", d)?,
            super::socket_addr("--actuator", a)?,
        )),
        _ => None,
    };
    let setup = ClosedLoopSetup {
        decoderd: exe.as_deref(),
        config: args.config.as_deref(),
        running,
        model: &args.model,
        work: &args.report.join("daemon"),
        task: TaskOptions {
            seed: args.task_seed,
            n_trials: args.trials.max(1),
            ..Default::default()
        },
        array_seed: args.array_seed,
        time_scale: args.time_scale,
    };
    let summary = report(&setup, &args.report)?;
    if let Some(min) = args.min_success {
        if summary.success_rate < min {
            return Err(CheckFailed(format!(
                "closed-loop success {:.0} % is below the required {:.0} %",
                100.0 * summary.success_rate,
                100.0 * min
            ))
            .into());
        }
    }
    Ok(())
}

pub struct ClosedLoopRun {
    pub summary: TaskSummary,
    pub trials: Vec<TrialResult>,
    /// The block as a session directory would hold it.
    pub block: Block,
    /// Slots answered without the bin's counts (late or lost bins).
    pub coasted: usize,
}

pub struct ClosedLoopSetup<'a> {
    pub decoderd: Option<&'a Path>,
    pub config: Option<&'a Path>,
    /// A running daemon (its bin address, and the actuator address to
    /// receive on) instead of a spawned one.
    pub running: Option<(SocketAddr, SocketAddr)>,
    pub model: &'a Path,
    pub work: &'a Path,
    pub task: TaskOptions,
    /// The simulated array the user's channels come from (the one the
    /// decoder was trained on: `replay-tool simulate --array-seed`).
    pub array_seed: u64,
    /// Time between bins in bin widths: 1 = the bin rate; 0 = as fast as
    /// the loop turns round.
    pub time_scale: f64,
}

pub fn run(setup: &ClosedLoopSetup<'_>) -> Result<ClosedLoopRun> {
    let model = ModelFile::read(setup.model)?;
    if model.decoder.outputs().len() != 2 {
        bail!(
            "the closed-loop task moves a 2-D cursor; model {} outputs {:?}",
            setup.model.display(),
            model.decoder.outputs()
        );
    }
    let n = model.decoder.n_channels();
    let task_options = TaskOptions {
        bin_width: model.bin_width,
        ..setup.task.clone()
    };
    let mut user = SimulatedUser::new(population(setup.array_seed, n), &task_options);
    let mut task = CenterOut::new(task_options.clone());

    let (sink, daemon, listen) = match setup.running {
        Some((listen, actuator)) => {
            let sink = UdpSocket::bind(actuator)
                .with_context(|| format!("cannot bind --actuator {actuator}"))?;
            (sink, None, listen)
        }
        None => {
            let sink = UdpSocket::bind("127.0.0.1:0")?;
            let daemon = Launch::new(setup.model, setup.work, sink.local_addr()?)
                .binary(setup.decoderd)
                .config(setup.config)
                .arm(true)
                .start()?;
            let listen = daemon.listen;
            (sink, Some(daemon), listen)
        }
    };
    sink.set_read_timeout(Some(Duration::from_millis(50)))?;
    let front_end = UdpSocket::bind("127.0.0.1:0")?;
    let bin_us = model.bin_width.us();
    let period = Duration::from_secs_f64(model.bin_width.ms() / 1000.0);
    let mut counts = vec![0u16; n];
    let mut datagram = Vec::with_capacity(packet::BIN_HEADER_LEN + 2 * n);
    let mut reply = [0u8; 1024];
    let mut all_counts: Vec<u16> = Vec::new();
    let mut kinematics: Vec<[f64; 4]> = Vec::new();
    let mut trials = Vec::new();
    let mut trial_start = 0usize;
    let mut coasted = 0;
    let t0 = Instant::now();
    let mut seq = 0u64;
    while !task.done() {
        if setup.time_scale > 0.0 {
            let due = t0 + period.mul_f64(seq as f64 * setup.time_scale);
            if let Some(w) = due.checked_duration_since(Instant::now()) {
                std::thread::sleep(w);
            }
        }
        let intended = task.intended_velocity();
        user.bin_counts(intended, &mut counts);
        packet::encode_bin(
            &BinHeader {
                channels: n as u16,
                seq,
                origin_ns: daemon::sys::monotonic_ns(),
                bin_us,
                flags: 0,
            },
            &counts,
            &mut datagram,
        );
        front_end.send_to(&datagram, listen)?;
        let waited = Instant::now();
        let answer = loop {
            if let Ok(len) = sink.recv(&mut reply) {
                if let Ok(p) = VelocityPacket::parse(&reply[..len]) {
                    if p.seq == seq {
                        break p;
                    }
                }
            }
            if waited.elapsed() > Duration::from_secs(5) {
                bail!(
                    "no velocity packet for bin {seq} within 5 s; see {}",
                    setup.work.display()
                );
            }
        };
        coasted += usize::from(answer.flags & packet::FLAG_BIN_MISSING != 0);
        let cursor = task.cursor();
        let command = [answer.command[0], answer.command[1]];
        all_counts.extend_from_slice(&counts);
        kinematics.push([cursor[0], cursor[1], command[0], command[1]]);
        let target = task.target();
        if task.advance(command).is_some() {
            let end = kinematics.len();
            trials.push(Trial {
                trial: trials.len() as u32,
                start_bin: trial_start,
                end_bin: end,
                target_x: target[0],
                target_y: target[1],
            });
            trial_start = end;
        }
        seq += 1;
    }
    if let Some(d) = daemon {
        d.stop()?;
    }
    let t = kinematics.len();
    let rows: Vec<Vec<f64>> = kinematics.iter().map(|k| k.to_vec()).collect();
    let kin = Mat::from_rows(&rows);
    let block = Block {
        bin_width: model.bin_width,
        n_bins: t,
        n_channels: n,
        counts: all_counts,
        kinematic_names: ["pos_x", "pos_y", "vel_x", "vel_y"]
            .map(String::from)
            .to_vec(),
        kinematics: Some(kin),
        trials: Some(trials),
        channel_labels: None,
        notes: Some(format!(
            "closed-loop center-out block: simulated user (array seed {}), decoder {}, target window {} cm; pos = cursor, vel = decoded command (cm/s)",
            setup.array_seed,
            setup.model.display(),
            task_options.window
        )),
    };
    Ok(ClosedLoopRun {
        summary: task.summary(),
        trials: task.results().to_vec(),
        block,
        coasted,
    })
}

/// Runs the closed loop and writes its report; returns the summary.
pub fn report(setup: &ClosedLoopSetup<'_>, report: &Path) -> Result<TaskSummary> {
    let run = run(setup)?;
    let block_dir: PathBuf = report.join("closed-loop-block");
    run.block
        .write(&block_dir)
        .with_context(|| format!("writing {}", block_dir.display()))?;
    let json = serde_json::json!({
        "model": setup.model.display().to_string(),
        "summary": run.summary,
        "trials": run.trials,
        "slots_coasted": run.coasted,
        "bins": run.block.n_bins,
    });
    write_atomic(
        &report.join("closed-loop.json"),
        serde_json::to_string_pretty(&json)?.as_bytes(),
    )?;
    let s = &run.summary;
    println!(
        "closed loop with {}: {} trials, success {:.0} %, mean time per target {:.2} s (timeouts count), first entry {}, path efficiency {}",
        setup.model.display(),
        s.trials,
        100.0 * s.success_rate,
        s.mean_trial_time_s,
        s.mean_time_to_target_s
            .map_or("-".into(), |t| format!("{t:.2} s")),
        s.mean_path_efficiency
            .map_or("-".into(), |e| format!("{e:.2}")),
    );
    println!(
        "   block (counts, cursor, decoded velocity, targets) for `train --refit` -> {}",
        block_dir.display()
    );
    Ok(run.summary.clone())
}
