//! Loop latency of the real `decoderd` binary on loopback: a paced front
//! end sends bins of N channels at R Hz, an actuator sink collects the
//! velocity packets, and the daemon's own histograms give recv→send. The
//! loopback floor is measured in the same run: the same packets through a
//! relay thread that only receives and forwards. Also reported: missed
//! slots, decode-path heap allocations after warm-up (from the daemon's
//! counting allocator), and the daemon's peak RSS.
//!
//! `cargo bench -p daemon --bench loop_latency` (defaults: 1 kHz, 1024
//! channels, 100 000 bins, recording on, normal scheduling). Environment: BENCH_BINS, BENCH_CHANNELS, BENCH_RATE_HZ,
//! BENCH_RECORD (0 = off), BENCH_FIFO (priority, 0 = off).

use std::net::{SocketAddr, UdpSocket};
use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use daemon::control::{Request, request};
use daemon::status::Status;
use daemon::sys::monotonic_ns;
use decoder_core::kalman::train::{KalmanFitOptions, SteadyStateOptions, fit_kalman};
use decoder_core::model_file::{DecoderModel, ModelFile, Provenance};
use decoder_core::packet::{self, BinHeader, VelocityPacket};
use decoder_core::simulate::{SimOptions, simulate};

fn env(name: &str, default: u64) -> u64 {
    std::env::var(name)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

fn percentile(sorted: &[u64], q: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let i = ((sorted.len() - 1) as f64 * q).round() as usize;
    sorted[i] as f64 / 1000.0
}

struct Pcts {
    p50: f64,
    p99: f64,
    max: f64,
}

fn pcts(mut v: Vec<u64>) -> Pcts {
    v.sort_unstable();
    Pcts {
        p50: percentile(&v, 0.5),
        p99: percentile(&v, 0.99),
        max: v.last().map_or(f64::NAN, |&m| m as f64 / 1000.0),
    }
}

/// Sends `n` bins at `rate_hz`, pacing by sleeping to 150 µs before each
/// due time and spinning the rest, so the bins leave on the clock.
fn paced_send(socket: &UdpSocket, target: SocketAddr, bins: &[Vec<u8>], n: usize, rate_hz: u64) {
    let period = Duration::from_nanos(1_000_000_000 / rate_hz);
    // Wake on time from the sleep, then spin only the last few µs, so the
    // sender leaves most of its core to the daemon and the sink.
    daemon::sys::tighten_timer_slack();
    let mut buf = bins[0].clone();
    let t0 = Instant::now() + Duration::from_millis(5);
    for k in 0..n {
        let due = t0 + period * k as u32;
        if let Some(w) = due.checked_duration_since(Instant::now()) {
            if w > Duration::from_micros(30) {
                std::thread::sleep(w - Duration::from_micros(30));
            }
        }
        while Instant::now() < due {
            std::hint::spin_loop();
        }
        buf.copy_from_slice(&bins[k % bins.len()]);
        buf[8..16].copy_from_slice(&(k as u64).to_le_bytes());
        buf[16..24].copy_from_slice(&monotonic_ns().to_le_bytes());
        let _ = socket.send_to(&buf, target);
    }
}

/// Receives velocity packets and notes, per seq, sink time − origin time.
fn sink_thread(
    socket: UdpSocket,
    n: usize,
    stop: Arc<AtomicBool>,
) -> std::thread::JoinHandle<(Vec<u64>, u64, u64, u64)> {
    std::thread::spawn(move || {
        socket
            .set_read_timeout(Some(Duration::from_millis(20)))
            .unwrap();
        let mut round_trip = vec![0u64; n];
        let mut answered = vec![false; n];
        let mut missing = 0u64;
        let mut packets = 0u64;
        let mut buf = [0u8; 1024];
        while !stop.load(Ordering::Relaxed) {
            let Ok(len) = socket.recv(&mut buf) else {
                continue;
            };
            let now = monotonic_ns();
            packets += 1;
            if let Ok(p) = VelocityPacket::parse(&buf[..len]) {
                if let Some(a) = answered.get_mut(p.seq as usize) {
                    *a = true;
                }
                if p.flags & packet::FLAG_BIN_MISSING != 0 {
                    if (p.seq as usize) < n {
                        missing += 1;
                    }
                } else if (p.seq as usize) < n && p.origin_ns != 0 {
                    round_trip[p.seq as usize] = now - p.origin_ns;
                }
            }
        }
        let unanswered = answered.iter().filter(|a| !**a).count() as u64;
        (round_trip, missing, packets, unanswered)
    })
}

/// The loopback floor: the same traffic through a thread that receives a
/// bin and sends a velocity-sized packet, with no decoding.
fn loopback_floor(bins: &[Vec<u8>], n: usize, rate_hz: u64, dims: usize) -> Pcts {
    let relay = UdpSocket::bind("127.0.0.1:0").unwrap();
    let relay_addr = relay.local_addr().unwrap();
    let sink = UdpSocket::bind("127.0.0.1:0").unwrap();
    let sink_addr = sink.local_addr().unwrap();
    let stop = Arc::new(AtomicBool::new(false));
    let relay_thread = {
        let stop = stop.clone();
        std::thread::spawn(move || {
            relay
                .set_read_timeout(Some(Duration::from_millis(20)))
                .unwrap();
            let mut buf = vec![0u8; 65536];
            let mut out = vec![0u8; packet::velocity_len(dims)];
            while !stop.load(Ordering::Relaxed) {
                if let Ok(len) = relay.recv(&mut buf) {
                    if len >= 24 {
                        // seq and origin_ns, echoed as the daemon would.
                        out[0..4].copy_from_slice(&packet::VELOCITY_MAGIC);
                        out[4..6].copy_from_slice(&1u16.to_le_bytes());
                        out[7] = dims as u8;
                        out[8..24].copy_from_slice(&buf[8..24]);
                        let _ = relay.send_to(&out, sink_addr);
                    }
                }
            }
        })
    };
    let sink = sink_thread(sink, n, stop.clone());
    let sender = UdpSocket::bind("127.0.0.1:0").unwrap();
    paced_send(&sender, relay_addr, bins, n, rate_hz);
    std::thread::sleep(Duration::from_millis(100));
    stop.store(true, Ordering::Relaxed);
    let (rt, _, _, _) = sink.join().unwrap();
    relay_thread.join().unwrap();
    pcts(rt.into_iter().filter(|&v| v > 0).collect())
}

fn status(socket: &Path) -> Status {
    *request(socket, &Request::Status).unwrap().status.unwrap()
}

fn rss_kb(child: &Child, field: &str) -> Option<u64> {
    let text = std::fs::read_to_string(format!("/proc/{}/status", child.id())).ok()?;
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
    let bin_ms = 1000.0 / rate_hz as f64;
    eprintln!("building a {channels}-channel {bin_ms} ms steady-state Kalman model ...");
    let (session, _) = simulate(&SimOptions {
        minutes: 1.0,
        n_channels: channels,
        bin_ms,
        ..SimOptions::default()
    })
    .unwrap();
    let (k, _) = fit_kalman(
        &session,
        &KalmanFitOptions {
            steady_state: Some(SteadyStateOptions {
                tolerance: 1e-10,
                max_iterations: 10_000,
            }),
            ..KalmanFitOptions::default()
        },
    )
    .unwrap();
    let dims = k.outputs.len();
    let model = ModelFile {
        bin_ms,
        decoder: DecoderModel::Kalman(k),
        provenance: Provenance::untracked(),
    };
    let work = tempfile::tempdir().unwrap();
    let model_path = work.path().join("bench.model");
    std::fs::write(&model_path, model.to_bytes()).unwrap();
    let bin_us = packet::bin_us_of(bin_ms);
    let bins: Vec<Vec<u8>> = (0..session.n_bins.min(5000))
        .map(|t| {
            let mut out = Vec::new();
            packet::encode_bin(
                &BinHeader {
                    channels: channels as u16,
                    seq: 0,
                    origin_ns: 0,
                    bin_us,
                    flags: 0,
                },
                session.bin_counts(t),
                &mut out,
            );
            out
        })
        .collect();
    drop(session);

    eprintln!("loopback floor: {n} bins through a plain relay ...");
    let floor = loopback_floor(&bins, n, rate_hz, dims);

    // The decode thread blocks in ppoll, so SCHED_FIFO cannot starve the
    // machine; BENCH_FIFO=50 measures with it (it needs root or
    // CAP_SYS_NICE; on a virtual machine it may not help, see BENCHMARKS.md).
    let fifo = env("BENCH_FIFO", 0);
    let record = env("BENCH_RECORD", 1) != 0;
    eprintln!(
        "decoderd: {n} bins at {rate_hz} Hz × {channels} channels, recording {record}, SCHED_FIFO priority {fifo} (0 = off) ..."
    );
    let socket = work.path().join("ctl.sock");
    let config = work.path().join("daemon.toml");
    std::fs::write(
        &config,
        format!(
            "[control]\nsocket = {:?}\n[recording]\nenabled = {}\ndir = {:?}\n[monitor]\nsummary_interval_s = 3600.0\n[realtime]\nfifo_priority = {}\n",
            socket.display().to_string(),
            record,
            work.path().join("rec").display().to_string(),
            fifo
        ),
    )
    .unwrap();
    let sink = UdpSocket::bind("127.0.0.1:0").unwrap();
    let sink_addr = sink.local_addr().unwrap();
    let mut child = Command::new(env!("CARGO_BIN_EXE_decoderd"))
        .args(["run", "--arm", "--listen", "127.0.0.1:0", "--actuator"])
        .arg(sink_addr.to_string())
        .arg("--config")
        .arg(&config)
        .arg("--model")
        .arg(&model_path)
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let up = Instant::now();
    let first = loop {
        if let Ok(r) = request(&socket, &Request::Status) {
            if let Some(s) = r.status {
                break *s;
            }
        }
        assert!(
            up.elapsed() < Duration::from_secs(30),
            "decoderd did not start"
        );
        std::thread::sleep(Duration::from_millis(20));
    };
    let listen: SocketAddr = first.listen.parse().unwrap();
    let stop = Arc::new(AtomicBool::new(false));
    let sink = sink_thread(sink, n, stop.clone());
    let sender = UdpSocket::bind("127.0.0.1:0").unwrap();
    // Warm-up: 1000 bins, then the allocation baseline.
    let warm = 1000.min(n / 10).max(1);
    let warm_status = Arc::new(Mutex::new(None));
    std::thread::scope(|scope| {
        let ws = warm_status.clone();
        let socket = socket.clone();
        scope.spawn(move || {
            std::thread::sleep(Duration::from_secs_f64(
                (warm as f64 + 5.0) / rate_hz as f64 + 0.01,
            ));
            *ws.lock().unwrap() = Some(status(&socket));
        });
        paced_send(&sender, listen, &bins, n, rate_hz);
    });
    std::thread::sleep(Duration::from_millis(50));
    let end = status(&socket);
    let peak_kb = rss_kb(&child, "VmHWM:");
    let rss_now_kb = rss_kb(&child, "VmRSS:");
    // SAFETY: signalling our own child by pid.
    unsafe { libc::kill(child.id() as i32, libc::SIGTERM) };
    let exit = child.wait().unwrap();
    stop.store(true, Ordering::Relaxed);
    let (rt, sink_missing, packets, unanswered) = sink.join().unwrap();
    let warm_status = warm_status.lock().unwrap().take().unwrap();
    let rt = pcts(rt.into_iter().filter(|&v| v > 0).collect());
    let l = &end.latency.recv_to_send_us;
    let allocs = end
        .decode_path_allocations
        .zip(warm_status.decode_path_allocations)
        .map(|(e, w)| e - w);
    let bins_after_warm = end.counters.slots_answered - warm_status.counters.slots_answered;
    let report = serde_json::json!({
        "bins": n, "channels": channels, "rate_hz": rate_hz, "recording": record, "fifo_priority": fifo,
        "daemon_recv_to_send_us": {"p50": l.p50, "p90": l.p90, "p99": l.p99, "p999": l.p999, "max": l.max},
        "round_trip_us": {"p50": rt.p50, "p99": rt.p99, "max": rt.max},
        "loopback_floor_round_trip_us": {"p50": floor.p50, "p99": floor.p99, "max": floor.max},
        "added_over_floor_us": {"p50": rt.p50 - floor.p50, "p99": rt.p99 - floor.p99},
        "slots_answered": end.counters.slots_answered,
        "bins_decoded": end.counters.bins_decoded,
        "slots_without_a_packet": unanswered,
        "bins_coasted_in_stream": sink_missing,
        "coasted_slot_answer_after_deadline_us": {"p50": end.latency.deadline_overrun_us.p50, "p99": end.latency.deadline_overrun_us.p99, "max": end.latency.deadline_overrun_us.max},
        "coasted_slots_incl_after_stream": end.counters.bins_missing,
        "late": end.counters.bins_late,
        "sink_packets": packets,
        "decode_path_allocations_after_warmup": allocs,
        "bins_after_warmup": bins_after_warm,
        "rss_mb": rss_now_kb.map(|k| k as f64 / 1024.0),
        "peak_rss_mb": peak_kb.map(|k| k as f64 / 1024.0),
        "realtime_warnings": end.realtime_warnings,
        "records_lost": end.recording.as_ref().map(|r| r.records_lost),
        "clean_exit": exit.success(),
    });
    println!("{}", serde_json::to_string_pretty(&report).unwrap());
    println!();
    println!(
        "loop latency, {n} bins at {rate_hz} Hz × {channels} channels (medians of this run; machines are noisy)"
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
        "  slots without a packet {unanswered} of {n}   bins coasted {sink_missing} (arrived after their deadline: {})",
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
