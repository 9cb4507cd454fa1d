//! `replay-tool demo`: the whole job on synthetic data, in one command:
//! simulate a calibration block and a later block from the same simulated
//! array, train a Kalman decoder, cross-validate it against the Wiener
//! baseline with a report, replay the later block offline, and then run it
//! live: start `decoderd` on loopback with the new model, stream the later
//! block at the bin rate as a front end would, collect the commands in an
//! actuator sink, and check them against the offline replay of the
//! daemon's own recording.

use std::net::UdpSocket;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use daemon_rig::{ActuatorSink, BinFault, Launch, paced_send};
use decoder_core::wire::packet;

use anyhow::{Context, Result};
use decoder_core::Block;
use decoder_core::fit::config::TrainConfig;
use decoder_core::fit::evaluate::{DecoderSpec, cross_validate};

use super::train::SideBySide;
use decoder_core::formats::log_replay::replay_log;
use decoder_core::formats::session_log::LogReader;
use decoder_core::sim::reaching::{SimOptions, simulate};

use super::{evaluate, replay, train};
use crate::CheckFailed;
use crate::output::write_atomic;
use crate::progress;
use daemon::status::plural as count;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Directory for everything the demo writes.
    #[arg(long, default_value = "demo-output")]
    pub out: PathBuf,
    /// Channels of the simulated array.
    #[arg(long, default_value_t = 96)]
    pub channels: usize,
    /// Minutes of calibration block.
    #[arg(long, default_value_t = 10.0)]
    pub minutes: f64,
    /// Seconds of the later block to stream live through decoderd (0 skips
    /// the live step).
    #[arg(long, default_value_t = 20.0)]
    pub live_seconds: f64,
    /// The decoderd binary (default: the one beside replay-tool; without
    /// one the daemon runs in this process).
    #[arg(long)]
    pub decoderd: Option<PathBuf>,
}

pub fn run(args: &Args) -> Result<()> {
    let started = Instant::now();
    let out = &args.out;
    std::fs::create_dir_all(out).with_context(|| format!("cannot create {}", out.display()))?;
    let calibration = out.join("calibration");
    let later = out.join("later-block");
    let sim = SimOptions {
        n_channels: args.channels,
        minutes: args.minutes,
        ..SimOptions::default()
    };
    let (cal, _) = simulate(&SimOptions {
        seed: 1,
        ..sim.clone()
    })?;
    cal.write(&calibration)?;
    let (blk, _) = simulate(&SimOptions {
        seed: 2,
        minutes: 2.0,
        ..sim
    })?;
    blk.write(&later)?;
    println!(
        "1. simulated a {}-min calibration block ({} channels, {} trials) -> {}",
        args.minutes,
        cal.n_channels,
        cal.trials.as_ref().map_or(0, Vec::len),
        calibration.display()
    );
    println!(
        "   and a 2-min later block from the same simulated array -> {}",
        later.display()
    );

    let cfg = TrainConfig::default();
    let kalman = DecoderSpec::Kalman(cfg.kalman.clone());
    let model = train::train_with_progress(&cal, &kalman, Some(cfg.folds))?.model;
    let model_path = out.join("kalman.model");
    write_atomic(&model_path, &model.to_bytes())?;
    println!("2. trained a Kalman decoder -> {}", model_path.display());
    print!("   ");
    train::print_cv_line(&model);

    let specs = [kalman, DecoderSpec::Wiener(cfg.wiener.clone())];
    let pb = progress::bar((cfg.folds * specs.len()) as u64, "evaluate");
    let eval = cross_validate(&cal, &specs, cfg.folds, &SideBySide, |_, _| pb.inc(1))?;
    pb.finish_and_clear();
    let report = out.join("report");
    evaluate::write_report(&report, &eval, cal.bin_width.ms())?;
    println!("3. cross-validated Kalman against the Wiener baseline:");
    for d in &eval.decoders {
        let parts: Vec<String> = d
            .outputs
            .iter()
            .zip(&d.mean)
            .map(|(o, s)| format!("{o} CC {:.3} R² {:.3}", s.cc, s.r2))
            .collect();
        println!("   {:<7} {}", d.decoder, parts.join(", "));
    }
    let mean_cc = |name: &str| {
        eval.decoders
            .iter()
            .find(|d| d.decoder == name)
            .map(|d| d.mean.iter().map(|s| s.cc).sum::<f64>() / d.mean.len().max(1) as f64)
    };
    if let (Some(k), Some(w)) = (mean_cc("kalman"), mean_cc("wiener")) {
        if w > k {
            println!(
                "   the Wiener baseline scores higher here (mean CC {w:.3} against {k:.3}): it averages the last {} bins of counts, which smooths an open-loop reconstruction; the Kalman decoder's state model is what carries a cursor smoothly from bin to bin in closed loop, so compare them there too (replay-tool closed-loop) before choosing",
                cfg.wiener.taps
            );
        } else {
            println!(
                "   the Kalman decoder beats the Wiener baseline (mean CC {k:.3} against {w:.3}): its state model adds to what the counts alone give"
            );
        }
    }
    println!(
        "   report (scores.csv, evaluation.json, held-out-velocity.svg/.png) -> {}",
        report.display()
    );

    let estimates = out.join("later-block-estimates.npy");
    let summary = replay::replay(&replay::Args {
        session: later.clone(),
        model: Some(model_path.clone()),
        out: estimates.clone(),
        no_steady_state: false,
        compare: None,
        click_out: None,
        config: None,
    })?;
    let parts: Vec<String> = summary
        .cc
        .iter()
        .map(|(n, c)| format!("{n} CC {c:.3}"))
        .collect();
    println!(
        "4. replayed the later block through the decode pipeline: {} bins at {:.0} bins/s, {} -> {}",
        summary.n_bins,
        summary.bins_per_second,
        parts.join(", "),
        estimates.display()
    );
    if args.live_seconds > 0.0 {
        live_step(args, &model_path, &blk)?;
    }
    println!("done in {:.1} s", started.elapsed().as_secs_f64());
    Ok(())
}

fn live_step(args: &Args, model_path: &Path, block: &Block) -> Result<()> {
    let exe = super::find_decoderd(args.decoderd.as_deref())?;
    let work = args.out.join("live");
    let n_bins =
        ((args.live_seconds * 1000.0 / block.bin_width.ms()) as usize).clamp(1, block.n_bins);
    let sink = ActuatorSink::on_loopback()?;
    let daemon = Launch::new(model_path, &work, sink.addr)
        .binary(exe.as_deref())
        .arm(true)
        .start()?;
    let how = if daemon.is_process() {
        "decoderd"
    } else {
        "decoderd in-process (no decoderd binary beside replay-tool; `cargo build --release` builds it)"
    };
    println!(
        "5. started {how} (armed for this bench run) on {} -> actuator sink {}; streaming {n_bins} bins ({:.0} s) of the later block at the bin rate ...",
        daemon.listen,
        sink.addr,
        n_bins as f64 * block.bin_width.ms() / 1000.0
    );
    println!("   {}", crate::NOT_NEXT_TO_A_PERSON);
    let bin_us = block.bin_width.us();
    let datagrams: Vec<Vec<u8>> = (0..n_bins)
        .map(|t| packet::bin_datagram(block.bin_counts(t), bin_us))
        .collect();
    let front_end = UdpSocket::bind("127.0.0.1:0")?;
    paced_send(
        &front_end,
        daemon.listen,
        &datagrams,
        n_bins,
        1000.0 / block.bin_width.ms(),
        |_| BinFault::None,
    );
    // The last bin is answered one deadline after it is due.
    let _ = sink.wait_for_seq(
        n_bins as u64 - 1,
        Duration::from_secs(1) + Duration::from_secs_f64(4.0 * block.bin_width.ms() / 1000.0),
    );
    let status = daemon.status()?;
    let stopped = daemon.stop()?;
    let rec = daemon_rig::actuator::per_seq(&sink.finish(), 0, n_bins);
    let c = &status.counters;
    let l = &status.latency;
    let answered: Vec<_> = rec.packets.iter().flatten().collect();
    let by_state = |s: u8| answered.iter().filter(|p| p.state == s).count() as u64;
    let coasted_in_stream = answered
        .iter()
        .filter(|p| p.flags & packet::FLAG_BIN_MISSING != 0)
        .count() as u64;
    println!(
        "   the actuator sink got {} for the {} sent: {} armed, {} coasting, {} halted; then {} after the stream ended (answered without a bin)",
        count(answered.len() as u64, "velocity packet", "velocity packets"),
        count(n_bins as u64, "bin", "bins"),
        by_state(1),
        by_state(2),
        by_state(3),
        count(rec.extra, "heartbeat slot", "heartbeat slots")
    );
    println!(
        "   latency recv->send: p50 {:.1} µs, p99 {:.1} µs, max {:.1} µs; front end's end of bin -> send: p50 {:.1} µs, p99 {:.1} µs",
        l.recv_to_send_us.p50,
        l.recv_to_send_us.p99,
        l.recv_to_send_us.max,
        l.origin_to_send_us.p50,
        l.origin_to_send_us.p99
    );
    println!(
        "   dropouts during the stream: {} (bin missing), {} late, {} duplicate, {} rejected",
        count(coasted_in_stream, "slot coasted", "slots coasted"),
        c.bins_late,
        c.bins_duplicate,
        c.rejected
    );
    let log = stopped
        .session_log
        .context("decoderd wrote no session log")?;
    let mut reader = LogReader::open(&log)?;
    let (mut same, mut recorded) = (0u64, 0u64);
    replay_log(&mut reader, None, |slot| {
        if let Some(r) = slot.recorded {
            recorded += 1;
            same += u64::from(r == slot.replayed);
        }
    })?;
    println!(
        "   offline replay of the recording reproduced {same} of {recorded} sent packets byte for byte"
    );
    println!("   recording -> {}", log.display());
    println!(
        "   (check it bit for bit: replay-tool verify {})",
        log.display()
    );
    if same != recorded {
        return Err(CheckFailed(format!(
            "{} of {recorded} replayed packets differ from the live ones",
            recorded - same
        ))
        .into());
    }
    Ok(())
}
