//! `replay-tool closed-loop`: a simulated participant drives the real
//! daemon, spawned on loopback or already running. Each bin the user
//! intends a velocity toward the target from where the cursor is; their
//! channels fire accordingly; the bin goes to `decoderd` over UDP as a
//! front end would send it; the velocity packet that comes back moves the
//! cursor, and the task computer's side of the simulation tells the daemon
//! what the screen now shows with a task packet (PROTOCOL.md §6). So the
//! session is recorded as a real one would be, and its session log is the
//! closed-loop block `train --refit --session LOG` retrains from. This is
//! how a user compares decoders in closed loop without a participant.

use std::net::{SocketAddr, UdpSocket};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use anyhow::{Context, Result, bail};
use daemon_rig::Launch;
use decoder_core::ModelFile;
use decoder_core::formats::log_block::{LogBlock, read_log_block};
use decoder_core::sim::reaching::population;
use decoder_core::sim::user::{
    CenterOut, Selection, SimulatedUser, TaskOptions, TaskSummary, TrialResult,
};
use decoder_core::wire::packet::{self, BinHeader, VelocityPacket};
use decoder_core::wire::task_packet::{
    Phase, TASK_FLAG_CLICK_CUE, TASK_FLAG_CLOSED_LOOP, TASK_FLAG_SELECT_BY_CLICK,
    TASK_FLAG_TARGET_VALID, TaskState, encode_task,
};

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
    /// With --daemon: its task socket (network.task_listen), where the
    /// simulated task sends cursor, target and phase.
    #[arg(long, requires = "daemon", default_value = "127.0.0.1:27402")]
    pub task_listen: String,
    /// Number of center-out trials (with --minutes, the most).
    #[arg(long, default_value_t = 16)]
    pub trials: usize,
    /// Stop at the end of the trial in progress once this many minutes of
    /// bins have passed (simulated time, whatever --time-scale is).
    #[arg(long)]
    pub minutes: Option<f64>,
    /// With a changing world (--drift-gain, --silent, --noisy …): the
    /// session starts this many minutes into it, so a later part of one
    /// simulated day runs on its own.
    #[arg(long, default_value_t = 0.0)]
    pub world_from_min: f64,
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
    /// Turn on online adaptation in the spawned daemon (`ctl adapt on`;
    /// its `[adaptation]` settings come from --config, else the defaults).
    /// For a running daemon use `decoderd ctl adapt on` instead.
    #[arg(long, conflicts_with = "daemon")]
    pub adapt: bool,
    /// Exit 1 when the success rate is below this fraction (0..1).
    #[arg(long)]
    pub min_success: Option<f64>,
    /// Folder for closed-loop.json and the spawned daemon's files (its
    /// session log is the closed-loop block).
    #[arg(long, default_value = "closed-loop-report")]
    pub report: PathBuf,
    /// How a target is selected: by dwelling in it (the default), or by a
    /// click the model's click decoder makes while the cursor is inside
    /// (a click outside fails the trial). The simulated user attempts a
    /// click with the array's click channels once inside the target.
    #[arg(long, value_enum, default_value = "dwell")]
    pub select: SelectArg,
    /// The user's world may change as the session goes on.
    #[command(flatten)]
    pub world: super::world::WorldArgs,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, clap::ValueEnum)]
pub enum SelectArg {
    Dwell,
    Click,
}

/// `replay-tool closed-loop`.
pub fn run_verb(args: &Args) -> Result<()> {
    super::check_time_scale(args.time_scale, true)?;
    if let Some(m) = args.minutes {
        if !(m.is_finite() && m > 0.0) {
            bail!("--minutes {m}: must be a positive number of minutes");
        }
    }
    if !(args.world_from_min.is_finite() && args.world_from_min >= 0.0) {
        bail!(
            "--world-from-min {}: must be 0 or more minutes",
            args.world_from_min
        );
    }
    if let Some(m) = args.min_success {
        if !(0.0..=1.0).contains(&m) {
            bail!("--min-success {m}: must be a fraction between 0 and 1");
        }
    }
    std::fs::create_dir_all(&args.report)
        .with_context(|| format!("cannot create {}", args.report.display()))?;
    let exe = super::find_decoderd(args.decoderd.as_deref())?;
    let running = match (&args.daemon, &args.actuator) {
        (Some(d), Some(a)) => Some(RunningAddrs {
            listen: super::socket_addr("--daemon", d)?,
            actuator: super::socket_addr("--actuator", a)?,
            task_listen: super::socket_addr("--task-listen", &args.task_listen)?,
        }),
        _ => None,
    };
    let drift = args.world.drift()?;
    if drift.is_none() && args.world_from_min > 0.0 {
        bail!(
            "--world-from-min {}: the world does not change without --drift-gain, --silent, --noisy, --overdispersion or --pd-change-deg",
            args.world_from_min
        );
    }
    let setup = ClosedLoopSetup {
        decoderd: exe.as_deref(),
        config: args.config.as_deref(),
        running,
        extra_toml: String::new(),
        adapt: args.adapt,
        model: &args.model,
        work: &args.report.join("daemon"),
        task: TaskOptions {
            seed: args.task_seed,
            n_trials: args.trials.max(1),
            select: match args.select {
                SelectArg::Dwell => Selection::Dwell,
                SelectArg::Click => Selection::Click,
            },
            ..Default::default()
        },
        array_seed: args.array_seed,
        time_scale: args.time_scale,
        drift,
        minutes: args.minutes,
        world_from_min: args.world_from_min,
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
    /// The spawned daemon's session log (bins, task packets, what it
    /// sent): the closed-loop block. `None` for a running daemon, whose
    /// recording is its own.
    pub session_log: Option<PathBuf>,
    /// That log read as a block (as `export` writes it).
    pub block: Option<LogBlock>,
    pub bins: usize,
    /// Slots answered without the bin's counts (late or lost bins).
    pub coasted: usize,
    /// With --adapt: what adaptation did.
    pub adaptation: Option<daemon::status::AdaptStatus>,
}

/// A running daemon's addresses.
#[derive(Clone, Copy, Debug)]
pub struct RunningAddrs {
    /// Its bin socket.
    pub listen: SocketAddr,
    /// Where it sends velocity packets (this process receives there).
    pub actuator: SocketAddr,
    /// Its task socket.
    pub task_listen: SocketAddr,
}

pub struct ClosedLoopSetup<'a> {
    pub decoderd: Option<&'a Path>,
    pub config: Option<&'a Path>,
    /// A running daemon instead of a spawned one.
    pub running: Option<RunningAddrs>,
    /// Extra daemon configuration for a spawned daemon without --config.
    pub extra_toml: String,
    /// Turn adaptation on in the spawned daemon before the first bin.
    pub adapt: bool,
    pub model: &'a Path,
    pub work: &'a Path,
    pub task: TaskOptions,
    /// The simulated array the user's channels come from (the one the
    /// decoder was trained on: `replay-tool simulate --array-seed`).
    pub array_seed: u64,
    /// Time between bins in bin widths: 1 = the bin rate; 0 = as fast as
    /// the loop turns round.
    pub time_scale: f64,
    /// A world that changes as the session goes on (`None`: stationary).
    pub drift: Option<decoder_core::sim::drift::DriftOptions>,
    /// Stop after the trial in progress once this much simulated time
    /// has passed, minutes.
    pub minutes: Option<f64>,
    /// Where in the changing world's day the session starts, minutes.
    pub world_from_min: f64,
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
    if task_options.select == Selection::Click && model.click.is_none() {
        bail!(
            "--select click needs a model with a click decoder; {} has none (train it with --click on a block with click cues, such as simulate --click writes)",
            setup.model.display()
        );
    }
    let mut user = SimulatedUser::new(population(setup.array_seed, n), &task_options);
    if task_options.select == Selection::Click {
        // The click channels `simulate --click` modulates for this array.
        let c = decoder_core::sim::reaching::ClickSim::default();
        user = user.with_clicks(
            decoder_core::sim::reaching::click_channels(setup.array_seed, n, c.share),
            c.gain,
        );
    }
    if let Some(d) = &setup.drift {
        user = user.with_drift(d)?.starting_at_minute(setup.world_from_min);
    }
    let last_bin = setup
        .minutes
        .map(|m| (m * 60_000.0 / model.bin_width.ms()).ceil() as u64);
    let mut task = CenterOut::new(task_options.clone());

    let (sink, daemon, listen, task_listen) = match setup.running {
        Some(r) => {
            let sink = UdpSocket::bind(r.actuator)
                .with_context(|| format!("cannot bind --actuator {}", r.actuator))?;
            (sink, None, r.listen, r.task_listen)
        }
        None => {
            let sink = UdpSocket::bind("127.0.0.1:0")?;
            let daemon = Launch::new(setup.model, setup.work, sink.local_addr()?)
                .binary(setup.decoderd)
                .config(setup.config)
                .extra_toml(&setup.extra_toml)
                .arm(true)
                .start()?;
            if setup.adapt {
                let reply = daemon.ctl(&daemon::control::Request::Adapt { on: true })?;
                if !reply.ok {
                    bail!("--adapt: {}", reply.message);
                }
            }
            let (listen, task_listen) = (daemon.listen, daemon.task_listen);
            (sink, Some(daemon), listen, task_listen)
        }
    };
    sink.set_read_timeout(Some(Duration::from_millis(50)))?;
    let front_end = UdpSocket::bind("127.0.0.1:0")?;
    let bin_us = model.bin_width.us();
    let period = Duration::from_secs_f64(model.bin_width.ms() / 1000.0);
    let mut counts = vec![0u16; n];
    let mut datagram = Vec::with_capacity(packet::BIN_HEADER_LEN + 4 * n);
    // A model of features gets the user's counts made simulated spike band
    // power, as `simulate --features` makes them (the array's offsets and
    // gains, noise seeded by the task).
    let mut features = (model.input == packet::BinKind::Features).then(|| {
        (
            decoder_core::sim::features::FeatureMaker::new(setup.array_seed, task_options.seed, n),
            vec![0f32; n],
        )
    });
    let mut reply = [0u8; 1024];
    let mut task_bytes = Vec::with_capacity(128);
    let mut coasted = 0;
    // Adapting as fast as the loop turns round, the simulated world waits
    // for the daemon before each bin: until it has read every task packet
    // sent and no batch is being refitted. Then each bin's task state and
    // each update's landing slot are the same every run, so a session with
    // the same seeds repeats. (The daemon itself never waits: a paced
    // session, like a rig, does not do this.)
    let lockstep = daemon
        .as_ref()
        .filter(|_| setup.adapt && setup.time_scale == 0.0);
    let mut task_packets_sent = 0u64;
    let t0 = Instant::now();
    let mut seq = 0u64;
    while !task.done() {
        if let Some(d) = lockstep {
            settle(d, task_packets_sent, setup.work)?;
        }
        if setup.time_scale > 0.0 {
            let due = t0 + period.mul_f64(seq as f64 * setup.time_scale);
            if let Some(w) = due.checked_duration_since(Instant::now()) {
                std::thread::sleep(w);
            }
        }
        let intended = task.intended_velocity();
        let attempting = task.attempting_click();
        user.bin_counts_attempting(intended, attempting, &mut counts);
        match features.as_mut() {
            None => packet::encode_bin(
                &BinHeader {
                    channels: n as u16,
                    seq,
                    origin_ns: daemon::sys::monotonic_ns(),
                    bin_us,
                    flags: 0,
                    kind: packet::BinKind::Counts,
                },
                &counts,
                &mut datagram,
            ),
            Some((maker, f)) => {
                maker.features(&counts, f);
                datagram = packet::features_datagram(f, bin_us);
                datagram[8..16].copy_from_slice(&seq.to_le_bytes());
                datagram[16..24].copy_from_slice(&daemon::sys::monotonic_ns().to_le_bytes());
            }
        }
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
        let command = [answer.command[0], answer.command[1]];
        let trial = task.trial() as u32;
        let target = task.target();
        let ended = task.advance_with(command, answer.flags & packet::FLAG_CLICK != 0);
        // What the screen shows now, having applied bin `seq`'s command:
        // the outcome of a trial that just ended, then the next trial.
        let mut shown = |phase: Phase, trial: u32, cursor: [f64; 2], target: [f64; 2]| {
            let mut state = TaskState::new(2);
            state.phase = phase;
            state.bin_seq = seq;
            state.origin_ns = daemon::sys::monotonic_ns();
            state.trial = trial;
            state.flags = TASK_FLAG_CLOSED_LOOP | TASK_FLAG_TARGET_VALID;
            if task_options.select == Selection::Click {
                state.flags |= TASK_FLAG_SELECT_BY_CLICK;
            }
            if attempting {
                state.flags |= TASK_FLAG_CLICK_CUE;
            }
            state.target_radius = task_options.window;
            state.cursor_pos[..2].copy_from_slice(&cursor);
            state.cursor_vel[..2].copy_from_slice(&command);
            state.target_pos[..2].copy_from_slice(&target);
            encode_task(&state, &mut task_bytes);
            task_packets_sent += 1;
            front_end.send_to(&task_bytes, task_listen)
        };
        if let Some(result) = &ended {
            let outcome = if result.success {
                Phase::Success
            } else {
                Phase::Failure
            };
            shown(outcome, trial, task.cursor(), target)?;
        }
        if !task.done() {
            let phase = if task.inside() {
                Phase::Hold
            } else {
                Phase::Reach
            };
            shown(phase, task.trial() as u32, task.cursor(), task.target())?;
        }
        seq += 1;
        if ended.is_some() && last_bin.is_some_and(|last| seq >= last) {
            break;
        }
    }
    let adaptation = match &daemon {
        Some(d) if setup.adapt => Some(d.status()?.adaptation),
        _ => None,
    };
    let session_log = match daemon {
        Some(d) => d.stop()?.session_log,
        None => None,
    };
    let block = match &session_log {
        Some(log) => Some(read_log_block(log)?),
        None => None,
    };
    Ok(ClosedLoopRun {
        summary: task.summary(),
        trials: task.results().to_vec(),
        session_log,
        block,
        bins: seq as usize,
        coasted,
        adaptation,
    })
}

/// Waits until the daemon has read `task_packets` task packets and its
/// adaptation worker holds no batch (a status round trip each try; the
/// daemon serves it after the sockets it polls).
fn settle(daemon: &daemon_rig::RunningDaemon, task_packets: u64, work: &Path) -> Result<()> {
    let asked = Instant::now();
    loop {
        let s = daemon.status()?;
        let a = &s.adaptation;
        if s.task.received >= task_packets && a.batches_sent <= a.worker.batches_finished {
            return Ok(());
        }
        if asked.elapsed() > Duration::from_secs(30) {
            bail!(
                "the daemon read {} of {task_packets} task packets and finished {} of {} adaptation batches within 30 s; see {}",
                s.task.received,
                a.worker.batches_finished,
                a.batches_sent,
                work.display()
            );
        }
        std::thread::sleep(Duration::from_micros(100));
    }
}

/// Runs the closed loop and writes its report; returns the summary.
pub fn report(setup: &ClosedLoopSetup<'_>, report: &Path) -> Result<TaskSummary> {
    let run = run(setup)?;
    let session_log = run
        .session_log
        .as_ref()
        .map(|p| std::path::absolute(p).unwrap_or(p.clone()));
    let json = serde_json::json!({
        "model": setup.model.display().to_string(),
        "select": setup.task.select,
        "summary": run.summary,
        "trials": run.trials,
        "slots_coasted": run.coasted,
        "bins": run.bins,
        "session_log": session_log,
        "valid_rows": run.block.as_ref().map(|b| b.block.n_valid()),
        "adaptation": run.adaptation,
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
        "   selecting by {}: achieved bitrate {:.2} bits/s, Fitts throughput {}",
        match setup.task.select {
            Selection::Dwell => "dwell",
            Selection::Click => "click",
        },
        s.bitrate_bps,
        s.fitts_throughput_bps
            .map_or("-".into(), |t| format!("{t:.2} bits/s")),
    );
    if let Some(a) = &run.adaptation {
        println!("   adaptation: {}", a.line());
    }
    match &session_log {
        Some(log) => println!(
            "   session log (bins, task packets, commands) -> {}\n   retrain from it: replay-tool train --session {} --refit --decoder kalman --out refit.model",
            log.display(),
            log.display()
        ),
        None => println!(
            "   the running daemon recorded the session (bins and task packets) in its own recording directory; `train --refit --session LOG` retrains from that log"
        ),
    }
    Ok(run.summary.clone())
}
