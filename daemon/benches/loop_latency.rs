//! Loop latency of the real `decoderd` binary on loopback: a paced front
//! end sends bins of N channels at R Hz, an actuator sink collects the
//! velocity packets, and the daemon's own histograms give recv→send. The
//! loopback floor is measured in the same run: the same packets through a
//! relay thread that only receives and forwards. Also reported: slots
//! without a packet, coasted bins, decode-path heap allocations after
//! warm-up (from the daemon's counting allocator), and the daemon's RSS.
//!
//! `cargo bench -p daemon --bench loop_latency` (defaults: 1 kHz, 1024
//! channels, 100 000 bins, recording on, normal scheduling). Environment:
//! BENCH_BINS, BENCH_CHANNELS, BENCH_RATE_HZ, BENCH_RECORD (0 = off),
//! BENCH_FIFO (SCHED_FIFO priority for the decode thread, 0 = off).

use std::net::UdpSocket;
use std::path::Path;
use std::time::Duration;

use daemon::status::Percentiles;
use daemon_rig::{ActuatorSink, BinFault, Launch, loopback_floor, paced_send};
use decoder_core::fit::kalman::{KalmanFitOptions, SteadyStateOptions};
use decoder_core::sim::model::simulated_kalman;
use decoder_core::sim::reaching::SimOptions;
use decoder_core::wire::packet::{self, FLAG_BIN_MISSING};

fn env(name: &str, default: u64) -> u64 {
    std::env::var(name)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

/// Percentiles of the nonzero samples (0 marks a bin with no sample).
fn pcts(v: &[u64]) -> Percentiles {
    let v: Vec<u64> = v.iter().copied().filter(|&x| x > 0).collect();
    Percentiles::of_samples_ns(&v)
}

fn rss_kb(pid: u32, field: &str) -> Option<u64> {
    let text = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    text.lines()
        .find(|l| l.starts_with(field))?
        .split_whitespace()
        .nth(1)?
        .parse()
        .ok()
}

fn main() {
    let n = env("BENCH_BINS", 100_000) as usize;
    let channels = env("BENCH_CHANNELS", 1024) as usize;
    let rate_hz = env("BENCH_RATE_HZ", 1000);
    let fifo = env("BENCH_FIFO", 0);
    let record = env("BENCH_RECORD", 1) != 0;
    let bin_width = decoder_core::BinWidth::from_ns(1_000_000_000 / rate_hz)
        .expect("BENCH_RATE_HZ must give a bin of whole microseconds");
    eprintln!("building a {channels}-channel {bin_width} steady-state Kalman model ...");
    let (model, session) = simulated_kalman(
        &SimOptions {
            minutes: 1.0,
            n_channels: channels,
            bin_width,
            ..SimOptions::default()
        },
        &KalmanFitOptions {
            steady_state: Some(SteadyStateOptions {
                tolerance: 1e-10,
                max_iterations: 10_000,
            }),
            ..KalmanFitOptions::default()
        },
    )
    .unwrap();
    let dims = model.decoder.outputs().len();
    let work = tempfile::tempdir().unwrap();
    let model_path = work.path().join("bench.model");
    std::fs::write(&model_path, model.to_bytes()).unwrap();
    let bin_us = bin_width.us();
    let bins: Vec<Vec<u8>> = (0..session.n_bins.min(5000))
        .map(|t| packet::bin_datagram(session.bin_counts(t), bin_us))
        .collect();
    drop(session);

    eprintln!("loopback floor: {n} bins through a plain relay ...");
    let floor = pcts(&loopback_floor(&bins, n, rate_hz as f64, dims).unwrap());

    // The decode thread blocks in ppoll, so SCHED_FIFO cannot starve the
    // machine; BENCH_FIFO=50 measures with it (it needs root or
    // CAP_SYS_NICE; on a virtual machine it may not help, see BENCHMARKS.md).
    eprintln!(
        "decoderd: {n} bins at {rate_hz} Hz × {channels} channels, recording {record}, SCHED_FIFO priority {fifo} (0 = off) ..."
    );
    let sink = ActuatorSink::on_loopback().unwrap();
    let daemon = Launch::new(&model_path, work.path(), sink.addr)
        .binary(Some(Path::new(env!("CARGO_BIN_EXE_decoderd"))))
        .extra_toml(&format!(
            "[recording]\nenabled = {record}\n[monitor]\nsummary_interval_s = 3600.0\n[realtime]\nfifo_priority = {fifo}\n"
        ))
        .record(record)
        .arm(true)
        .start()
        .unwrap();
    let listen = daemon.listen;
    let pid = daemon.pid().unwrap();
    let sender = UdpSocket::bind("127.0.0.1:0").unwrap();
    // Warm-up: 1000 bins, then the allocation baseline.
    let warm = 1000.min(n / 10).max(1) as u64;
    let patience = Duration::from_secs_f64(n as f64 / rate_hz as f64 + 30.0);
    let warm_status = std::thread::scope(|scope| {
        let baseline = scope.spawn(|| {
            daemon
                .wait_for_status("the warm-up bins answered", patience, |s| {
                    s.counters.slots_answered >= warm
                })
                .unwrap()
        });
        paced_send(&sender, listen, &bins, n, rate_hz as f64, |_| {
            BinFault::None
        });
        baseline.join().unwrap()
    });
    let end = daemon
        .wait_for_status("every bin answered", patience, |s| {
            s.counters.slots_answered >= n as u64
        })
        .unwrap();
    let peak_kb = rss_kb(pid, "VmHWM:");
    let rss_now_kb = rss_kb(pid, "VmRSS:");
    daemon.stop().unwrap();
    let rec = sink.finish_per_seq(0, n);
    let unanswered = rec.packets.iter().filter(|p| p.is_none()).count();
    let coasted = rec
        .packets
        .iter()
        .flatten()
        .filter(|p| p.flags & FLAG_BIN_MISSING != 0)
        .count();
    let round_trips: Vec<u64> = rec
        .packets
        .iter()
        .zip(&rec.received_ns)
        .map(|(p, &r)| match p {
            Some(p) if p.flags & FLAG_BIN_MISSING == 0 && r >= p.origin_ns => r - p.origin_ns,
            _ => 0,
        })
        .collect();
    let rt = pcts(&round_trips);
    let l = &end.latency.recv_to_send_us;
    let allocs = end
        .decode_path_allocations
        .zip(warm_status.decode_path_allocations)
        .map(|(e, w)| e - w);
    let bins_after_warm = end.counters.slots_answered - warm_status.counters.slots_answered;
    let d = &end.latency.deadline_overrun_us;
    let report = serde_json::json!({
        "bins": n, "channels": channels, "rate_hz": rate_hz, "recording": record, "fifo_priority": fifo,
        "daemon_recv_to_send_us": {"p50": l.p50, "p90": l.p90, "p99": l.p99, "p999": l.p999, "max": l.max},
        "round_trip_us": {"p50": rt.p50, "p99": rt.p99, "max": rt.max},
        "loopback_floor_round_trip_us": {"p50": floor.p50, "p99": floor.p99, "max": floor.max},
        "added_over_floor_us": {"p50": rt.p50 - floor.p50, "p99": rt.p99 - floor.p99},
        "slots_answered": end.counters.slots_answered,
        "slots_without_a_packet": unanswered,
        "bins_decoded": end.counters.bins_decoded,
        "bins_coasted_in_stream": coasted,
        "late": end.counters.bins_late,
        "coasted_slot_answer_after_deadline_us": {"p50": d.p50, "p99": d.p99, "max": d.max},
        "decode_path_allocations_after_warmup": allocs,
        "bins_after_warmup": bins_after_warm,
        "rss_mb": rss_now_kb.map(|k| k as f64 / 1024.0),
        "peak_rss_mb": peak_kb.map(|k| k as f64 / 1024.0),
        "realtime_warnings": end.realtime_warnings,
        "records_lost": end.recording.as_ref().map(|r| r.records_lost),
    });
    println!("{}", serde_json::to_string_pretty(&report).unwrap());
    println!();
    println!(
        "loop latency, {n} bins at {rate_hz} Hz × {channels} channels (one run; machines are noisy)"
    );
    println!(
        "  decoderd recv→send       p50 {:7.1} µs   p99 {:7.1} µs   max {:8.1} µs",
        l.p50, l.p99, l.max
    );
    println!(
        "  front end→actuator       p50 {:7.1} µs   p99 {:7.1} µs   max {:8.1} µs",
        rt.p50, rt.p99, rt.max
    );
    println!(
        "  loopback floor (relay)   p50 {:7.1} µs   p99 {:7.1} µs   max {:8.1} µs",
        floor.p50, floor.p99, floor.max
    );
    println!(
        "  added over the floor     p50 {:7.1} µs   p99 {:7.1} µs",
        rt.p50 - floor.p50,
        rt.p99 - floor.p99
    );
    println!(
        "  slots without a packet {unanswered} of {n}   bins coasted {coasted} (arrived after their deadline: {})",
        end.counters.bins_late
    );
    println!("  decode-path heap allocations after warm-up {allocs:?} over {bins_after_warm} bins");
    println!(
        "  RSS {:.1} MB (peak {:.1} MB, during model load)",
        rss_now_kb.map_or(f64::NAN, |k| k as f64 / 1024.0),
        peak_kb.map_or(f64::NAN, |k| k as f64 / 1024.0)
    );
    for w in &end.realtime_warnings {
        println!("  warning: {w}");
    }
}
