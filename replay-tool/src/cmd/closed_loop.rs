//! `replay-tool bench --closed-loop`: a simulated participant drives the
//! real daemon. Each bin the user intends a velocity toward the target from
//! where the cursor is; their channels fire accordingly; the bin goes to
//! `decoderd` over UDP as a front end would send it; the velocity packet
//! that comes back moves the cursor. This is how a user compares decoders
//! in closed loop without a participant. The block is written as a session
//! directory (counts, cursor position, decoded velocity, targets) for
//! `replay-tool train --refit`.

use std::net::UdpSocket;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use anyhow::{Context, Result, bail};
use decoder_core::formats::block::Trial;
use decoder_core::formats::packet::{self, BinHeader, VelocityPacket};
use decoder_core::linalg::Mat;
use decoder_core::sim::reaching::population;
use decoder_core::sim::user::{CenterOut, SimulatedUser, TaskOptions, TaskSummary, TrialResult};
use decoder_core::{Block, ModelFile};

use crate::live;

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
    pub model: &'a Path,
    pub work: &'a Path,
    pub task: TaskOptions,
    /// The simulated array the user's channels come from (the one the
    /// decoder was trained on: `replay-tool simulate --population`).
    pub population: u64,
    /// 1 = the bin rate; 0 = as fast as the loop turns round.
    pub speed: f64,
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
        bin_ms: model.bin_ms,
        ..setup.task.clone()
    };
    let mut user = SimulatedUser::new(population(setup.population, n), &task_options);
    let mut task = CenterOut::new(task_options.clone());

    let sink = UdpSocket::bind("127.0.0.1:0")?;
    sink.set_read_timeout(Some(Duration::from_millis(50)))?;
    let daemon = live::SpawnedDaemon::start_with(
        setup.decoderd,
        setup.config,
        setup.model,
        setup.work,
        sink.local_addr()?,
        true,
    )?;
    let front_end = UdpSocket::bind("127.0.0.1:0")?;
    let bin_us = packet::bin_us_of(model.bin_ms);
    let period = Duration::from_secs_f64(model.bin_ms / 1000.0);
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
        if setup.speed > 0.0 {
            let due = t0 + period.mul_f64(seq as f64 / setup.speed);
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
        front_end.send_to(&datagram, daemon.listen)?;
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
    daemon.stop()?;
    let t = kinematics.len();
    let rows: Vec<Vec<f64>> = kinematics.iter().map(|k| k.to_vec()).collect();
    let kin = Mat::from_rows(&rows);
    let block = Block {
        bin_ms: model.bin_ms,
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
            "closed-loop center-out block: simulated user (population {}), decoder {}, target window {} cm; pos = cursor, vel = decoded command (cm/s)",
            setup.population,
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

/// Runs the closed-loop bench and writes its report; returns the summary.
pub fn bench(setup: &ClosedLoopSetup<'_>, report: &Path) -> Result<TaskSummary> {
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
    crate::output::write_atomic(
        &report.join("closed_loop.json"),
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
