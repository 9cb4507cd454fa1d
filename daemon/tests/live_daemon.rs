//! The real daemon on ephemeral loopback ports, spoken to in the bytes of
//! PROTOCOL.md: normal stream, gaps, malformed datagrams, duplicates and
//! reordering, a flood, hot-swap under load, operator commands, SIGTERM,
//! and the offline replay of what it recorded.

mod support;

use std::time::{Duration, Instant};

use daemon::control::Request;
use decoder_core::formats::log_replay::replay_log;
use decoder_core::formats::session_log::{LogEnd, LogReader, LogRecord};
use decoder_core::wire::packet::{self, FLAG_MODEL_CHANGED, VelocityPacket};
use support::{BIN, Daemon, PATIENCE, TEST_TIMING, assert_slots_accounted, fixture, missing, seqs};

#[test]
fn normal_stream_is_decoded_bin_by_bin() {
    let d = Daemon::start(true, TEST_TIMING);
    d.stream(0..10, 0);
    d.wait_for_seq(9);
    let warm = d
        .status()
        .decode_path_allocations
        .expect("decoderd counts allocations");
    d.stream(10..50, 10);
    let p = d.wait_for_seq(49);
    let p: Vec<_> = p.into_iter().take(50).collect();
    let s = d.status();
    assert_slots_accounted(&p, 0..50, &[], &s);
    assert!(
        p.iter()
            .filter(|p| !missing(p))
            .all(|p| p.recv_ns > 0 && p.sent_ns >= p.recv_ns)
    );
    assert_eq!(s.latency.recv_to_send_us.count, s.counters.bins_decoded);
    assert!(s.latency.origin_to_send_us.count > 0);
    // No heap allocation on the decode path after warm-up.
    assert_eq!(
        s.decode_path_allocations,
        Some(warm),
        "allocations during 40 bins"
    );
}

#[test]
fn gap_of_three_coasts_exactly_those_seqs() {
    let d = Daemon::start(true, TEST_TIMING);
    d.stream((0..20).chain(23..40), 0);
    let p = d.wait_for_seq(39);
    let p: Vec<_> = p.into_iter().take(40).collect();
    // The withheld seqs coast; which other slots a loaded host made coast
    // is its scheduler's call (the slot engine's tests pin the exact rule).
    assert_slots_accounted(&p, 0..40, &[20, 21, 22], &d.status());
}

#[test]
fn gap_of_thirty_halts_and_commands_zero_after() {
    let d = Daemon::start(true, TEST_TIMING);
    d.stream((0..20).chain(50..70), 0);
    let p = d.wait_for_seq(69);
    let p: Vec<_> = p.into_iter().take(70).collect();
    assert_eq!(seqs(&p), (0..70).collect::<Vec<_>>());
    // The withheld seqs 20..50 are missing; a loaded host may also have
    // made the bins just before them late, so the run of misses starts at
    // 20 or earlier (the scheduler's call). Five slots of that run coast,
    // then the supervisor halts for good.
    assert!(p[20..50].iter().all(missing));
    let run_start = (0..20)
        .rev()
        .take_while(|&i| missing(&p[i]))
        .last()
        .unwrap_or(20);
    for pk in &p[run_start..] {
        let want = if pk.seq < run_start as u64 + 5 { 2 } else { 3 };
        assert_eq!(pk.state, want, "seq {} (misses from {run_start})", pk.seq);
    }
    // The controlled stop ends inside the gap; after it, zero, whether or
    // not the bins after the gap came in time.
    for pk in &p[50..] {
        assert!(
            pk.command.iter().all(|&c| c == 0.0),
            "seq {}: {:?}",
            pk.seq,
            pk.command
        );
    }
    assert_eq!(d.status().state, "halted");
}

#[test]
fn malformed_datagrams_are_rejected_counted_and_the_loop_lives() {
    let d = Daemon::start(true, TEST_TIMING);
    let good = d.bin_bytes(0);
    let mut kinds: Vec<Vec<u8>> = Vec::new();
    kinds.push(Vec::new()); // empty
    kinds.push(good[..20].to_vec()); // shorter than the header
    let mut m = good.clone();
    m[0..4].copy_from_slice(b"XBIN");
    kinds.push(m); // bad magic
    let mut m = good.clone();
    m[4] = 9;
    kinds.push(m); // bad version
    let mut m = good.clone();
    m[6..8].copy_from_slice(&0u16.to_le_bytes());
    kinds.push(m); // zero channels
    kinds.push(good[..good.len() - 2].to_vec()); // length mismatch
    let mut m = good[..good.len() - 2].to_vec();
    m[6..8].copy_from_slice(&15u16.to_le_bytes());
    kinds.push(m); // wrong channel count for the model
    let mut m = good.clone();
    m[24..28].copy_from_slice(&10_000u32.to_le_bytes());
    kinds.push(m); // wrong bin width
    let mut m = good.clone();
    m[4..6].copy_from_slice(&2u16.to_le_bytes());
    m[28..32].copy_from_slice(&5u32.to_le_bytes());
    kinds.push(m); // version 2 of an unknown kind
    let n = (good.len() - 32) / 2;
    let features = |value: f32| {
        let body: Vec<u8> = (0..n).flat_map(|_| value.to_le_bytes()).collect();
        packet::bin_datagram_v2(packet::BinKind::Features, n as u16, &body, 20_000)
    };
    kinds.push(features(f32::INFINITY)); // a feature that is not finite
    kinds.push(features(0.25)); // features, for a model that decodes counts
    let t0 = Instant::now();
    for seq in 0..30u64 {
        if let Some(wait) = (t0 + BIN * seq as u32).checked_duration_since(Instant::now()) {
            std::thread::sleep(wait);
        }
        d.send_bin(seq);
        d.send_raw(&kinds[seq as usize % kinds.len()]);
    }
    let p = d.wait_for_seq(29);
    let s = d.status();
    assert_slots_accounted(&p, 0..30, &[], &s);
    assert_eq!(s.counters.rejected, 30);
    for (name, want) in [
        ("too_short", 6),
        ("bad_magic", 3),
        ("bad_version", 3),
        ("channels_out_of_range", 3),
        ("length_mismatch", 3),
        ("channel_mismatch", 3),
        ("bin_width_mismatch", 3),
        ("bad_kind", 2),
        ("non_finite_feature", 2),
        ("kind_mismatch", 2),
    ] {
        assert_eq!(s.rejected[name], want, "{name}: {:?}", s.rejected);
    }
}

/// Version 2 bin packets of kind 0 (PROTOCOL.md §1) carry the same counts
/// as version 1: a stream of both, alternating, is decoded slot for slot
/// as the version 1 stream is, and nothing is rejected.
#[test]
fn version_2_count_packets_decode_as_version_1() {
    let run = |v2: bool| {
        let d = Daemon::start(true, TEST_TIMING);
        let t0 = Instant::now();
        for seq in 0..12u64 {
            if let Some(wait) = (t0 + BIN * seq as u32).checked_duration_since(Instant::now()) {
                std::thread::sleep(wait);
            }
            let mut bytes = d.bin_bytes(seq);
            if v2 && seq % 2 == 0 {
                bytes[4..6].copy_from_slice(&2u16.to_le_bytes());
                bytes[28..32].copy_from_slice(&0u32.to_le_bytes());
            }
            d.send_raw(&bytes);
        }
        let p = d.wait_for_seq(11);
        let s = d.status();
        assert_slots_accounted(&p, 0..12, &[], &s);
        assert_eq!(s.counters.rejected, 0, "{:?}", s.rejected);
        // What was decoded (not what the host made coast) must agree.
        p.iter()
            .filter(|p| !missing(p) && p.seq < 12)
            .map(|p| (p.seq, p.estimate.clone()))
            .collect::<Vec<_>>()
    };
    let (v1, mixed) = (run(false), run(true));
    for (seq, e) in &mixed {
        if let Some((_, want)) = v1.iter().find(|(s, _)| s == seq) {
            assert_eq!(e, want, "seq {seq}");
        }
    }
    assert!(mixed.iter().any(|(s, _)| s % 2 == 0));
}

#[test]
fn duplicates_are_dropped_and_reordered_bins_decoded_in_order() {
    let d = Daemon::start(true, TEST_TIMING);
    d.stream(0..10, 0);
    std::thread::sleep(BIN / 2);
    d.send_bin(11);
    d.send_bin(10);
    d.send_bin(11);
    d.send_bin(9);
    std::thread::sleep(BIN);
    d.stream(12..20, 12);
    let p = d.wait_for_seq(19);
    let s = d.status();
    assert_slots_accounted(&p, 0..20, &[], &s);
    // Seqs 9 and 11 came twice each while their first copy was decoded or
    // waiting. When a loaded host made one of those slots coast, the copy
    // counts as late instead; the slot engine's tests pin that case.
    if p[..20].iter().all(|p| !missing(p)) {
        assert_eq!(s.counters.bins_duplicate, 2);
    } else {
        assert!(
            s.counters.bins_duplicate + s.counters.bins_late >= 2,
            "{:?}",
            s.counters
        );
    }
}

fn cpu_ticks(pid: u32) -> u64 {
    let stat = std::fs::read_to_string(format!("/proc/{pid}/stat")).unwrap();
    let after = &stat[stat.rfind(')').unwrap() + 2..];
    let f: Vec<&str> = after.split_whitespace().collect();
    // utime and stime are fields 14 and 15 of stat, 12 and 13 after the name.
    f[11].parse::<u64>().unwrap() + f[12].parse::<u64>().unwrap()
}

#[test]
fn flood_at_100x_the_bin_rate_leaves_every_slot_answered() {
    let d = Daemon::start(true, TEST_TIMING);
    let junk = {
        let mut m = d.bin_bytes(0);
        m[0] = b'J';
        m
    };
    let flooder = d.sender.try_clone().unwrap();
    let target = d.listen;
    let stop = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
    let ticks_before = cpu_ticks(d.pid());
    let wall = Instant::now();
    let flood = {
        let stop = stop.clone();
        let dup = d.bin_bytes(0);
        std::thread::spawn(move || {
            // 100 datagrams per 20 ms bin: junk and stale duplicates.
            let mut sent = 0u64;
            let t0 = Instant::now();
            while !stop.load(std::sync::atomic::Ordering::Relaxed) {
                let due = t0 + Duration::from_micros(200) * sent as u32;
                if let Some(w) = due.checked_duration_since(Instant::now()) {
                    std::thread::sleep(w);
                }
                let bytes = if sent % 2 == 0 { &junk } else { &dup };
                let _ = flooder.send_to(bytes, target);
                sent += 1;
            }
            sent
        })
    };
    d.stream(0..100, 0);
    stop.store(true, std::sync::atomic::Ordering::Relaxed);
    let flooded = flood.join().unwrap();
    let p = d.wait_for_seq(99);
    let used = cpu_ticks(d.pid()) - ticks_before;
    let elapsed = wall.elapsed().as_secs_f64();
    // SAFETY: sysconf with a valid name.
    let hz = unsafe { libc::sysconf(libc::_SC_CLK_TCK) } as f64;
    let cpu_fraction = used as f64 / hz / elapsed;
    eprintln!("decoderd used {cpu_fraction:.3} of a core during the flood");
    let first: Vec<_> = p.iter().take(100).collect();
    let got: Vec<u64> = first.iter().map(|p| p.seq).collect();
    assert_eq!(
        got,
        (0..100).collect::<Vec<_>>(),
        "each slot answered once, in order"
    );
    let s = d.status();
    assert!(flooded > 5000, "flood sent {flooded}");
    let c = &s.counters;
    assert_eq!(
        c.datagrams,
        c.bins_decoded
            + c.rejected
            + c.bins_duplicate
            + c.bins_late
            + c.bins_stray
            + c.bins_flushed,
        "every datagram accounted for: {c:?}"
    );
    // The copies are of seq 0: duplicates while it is within the window,
    // late (from this stream's past) after; never a new stream.
    assert!(
        c.rejected > 1000 && c.bins_duplicate + c.bins_late > 1000,
        "{c:?}"
    );
    assert_eq!(c.new_streams, 0);
    // Bounded: the loop sleeps between datagrams rather than spinning a
    // core (this is a debug build; a release daemon uses far less).
    assert!(
        cpu_fraction < 0.9,
        "decoderd used {cpu_fraction:.2} of a core under the flood"
    );
}

#[test]
fn hot_swap_under_load_misses_no_slot_and_flags_one_bin() {
    let f = fixture();
    let d = Daemon::start(true, TEST_TIMING);
    std::thread::scope(|scope| {
        scope.spawn(|| d.stream(0..100, 0));
        d.wait_for_seq(40);
        let r = d.ctl(Request::Load {
            path: f.other_model.clone(),
        });
        assert!(r.ok, "{}", r.message);
        let r = d.ctl(Request::Load {
            path: f.wrong_model.clone(),
        });
        assert!(!r.ok);
        assert!(r.message.contains("12 channels"), "{}", r.message);
    });
    let p = d.wait_for_seq(99);
    assert_slots_accounted(&p, 0..100, &[], &d.status());
    let flagged: Vec<u64> = p
        .iter()
        .filter(|p| p.flags & FLAG_MODEL_CHANGED != 0)
        .map(|p| p.seq)
        .collect();
    assert_eq!(flagged.len(), 1, "{flagged:?}");
    let s = d.status();
    assert_eq!(s.counters.model_changes, 1);
    assert!(s.model.path.ends_with("b.model"));
}

#[test]
fn a_model_of_another_kind_swapped_in_while_armed_is_flagged() {
    let f = fixture();
    let d = Daemon::start(true, TEST_TIMING);
    std::thread::scope(|scope| {
        scope.spawn(|| d.stream(0..40, 0));
        d.wait_for_seq(10);
        let r = d.ctl(Request::Load {
            path: f.wiener_model.clone(),
        });
        assert!(r.ok, "{}", r.message);
    });
    d.wait_for_seq(39);
    let s = d.status();
    assert_eq!(s.model.kind, "wiener");
    assert_eq!(s.model_warnings.len(), 1, "{:?}", s.model_warnings);
    assert!(s.model_warnings[0].contains("over a kalman model"));
    assert!(s.table().contains("MODEL WARNING"), "{}", s.table());
    // Why it is in its state, and when the last bin came.
    assert!(d.ctl(Request::Halt).ok);
    let s = d.status();
    let change = s.last_change.clone().expect("a state change");
    assert_eq!(
        (change.to.as_str(), change.reason.as_str()),
        ("halted", "operator halt")
    );
    assert!(s.table().contains("(operator halt, from "), "{}", s.table());
    assert!(s.last_bin_age_s.is_some());
}

#[test]
fn loading_a_device_or_a_damaged_file_is_refused_and_the_daemon_keeps_its_model() {
    let d = Daemon::start(true, TEST_TIMING);
    std::thread::scope(|scope| {
        scope.spawn(|| d.stream(0..30, 0));
        d.wait_for_seq(5);
        let r = d.ctl(Request::Load {
            path: "/dev/zero".into(),
        });
        assert!(
            !r.ok && r.message.contains("not a regular file"),
            "{}",
            r.message
        );
        let damaged = d.path().join("damaged.model");
        let mut bytes = std::fs::read(&fixture().model).unwrap();
        bytes.extend_from_slice(b"appended");
        std::fs::write(&damaged, bytes).unwrap();
        let r = d.ctl(Request::Load { path: damaged });
        assert!(
            !r.ok && r.message.contains("after the model"),
            "{}",
            r.message
        );
    });
    let p = d.wait_for_seq(29);
    assert_eq!(seqs(&p[..30]), (0..30).collect::<Vec<_>>());
    let s = d.status();
    assert_eq!(s.counters.model_changes, 0);
    assert!(s.model.path.ends_with("a.model"));
}

#[test]
fn operator_commands_drive_the_supervisor() {
    let d = Daemon::start(false, TEST_TIMING);
    let r = d.ctl(Request::Arm);
    assert!(!r.ok && r.message.contains("no bins"), "{}", r.message);
    std::thread::scope(|scope| {
        scope.spawn(|| d.stream(0..60, 0));
        d.wait_for_seq(10);
        let r = d.ctl(Request::Arm);
        assert!(r.ok, "{}", r.message);
        d.wait_for_seq(30);
        let r = d.ctl(Request::Halt);
        assert!(r.ok, "{}", r.message);
    });
    let p = d.wait_for_seq(59);
    assert_eq!(p[0].state, 0);
    assert!(p[..5].iter().all(|p| p.command.iter().all(|&c| c == 0.0)));
    assert!(p.iter().any(|p| p.state == 1));
    assert_eq!(p[59].state, 3);
    let s = d.status();
    assert_eq!(s.counters.transitions, 2);
}

#[test]
fn sigterm_stops_cleanly_and_the_log_replays_bit_for_bit() {
    let mut d = Daemon::start(true, TEST_TIMING);
    d.stream((0..30).chain(33..60), 0);
    d.wait_for_seq(67); // heartbeat slots after the sender stops
    let ended = d.stop();
    let (log, received) = (ended.session_log, ended.packets);

    let mut reader = LogReader::open(&log).unwrap();
    let mut sent = Vec::new();
    let mut end_json = String::new();
    while let Some(r) = reader.next_record() {
        match r {
            LogRecord::Sent { packet, .. } => sent.push(packet),
            LogRecord::End { json, .. } => end_json = json,
            _ => {}
        }
    }
    assert_eq!(reader.end(), Some(&LogEnd::Clean));
    // Every packet the actuator got is in the log, byte for byte.
    assert_eq!(sent.len(), received.len());
    for (bytes, got) in sent.iter().zip(&received) {
        assert_eq!(&VelocityPacket::parse(bytes).unwrap(), got);
    }
    let end: serde_json::Value = serde_json::from_str(&end_json).unwrap();
    let rec = &end["recording"];
    assert_eq!(rec["records_lost"], 0);

    // The offline replay of the log reproduces every packet bit for bit.
    let mut reader = LogReader::open(&log).unwrap();
    let mut n = 0;
    let summary = replay_log(&mut reader, None, |slot| {
        assert_eq!(Some(slot.replayed), slot.recorded, "slot {n}");
        n += 1;
    })
    .unwrap();
    assert_eq!(summary.slots as usize, received.len());
    assert!(received.iter().filter(|p| missing(p)).count() >= 3 + 4);
}

#[test]
fn a_torn_tail_is_detected_and_the_log_reads_up_to_it() {
    let mut d = Daemon::start(true, TEST_TIMING);
    d.stream(0..20, 0);
    d.wait_for_seq(19);
    let log = d.stop().session_log;
    let bytes = std::fs::read(&log).unwrap();
    let torn = d.path().join("torn.vdlog");
    std::fs::write(&torn, &bytes[..bytes.len() - 5]).unwrap();
    let mut reader = LogReader::open(&torn).unwrap();
    let mut datagrams = 0;
    while let Some(r) = reader.next_record() {
        if matches!(r, LogRecord::Datagram { .. }) {
            datagrams += 1;
        }
    }
    assert!(
        matches!(reader.end(), Some(LogEnd::TornTail { .. })),
        "{:?}",
        reader.end()
    );
    assert_eq!(datagrams, 20);
}

#[test]
fn ctl_status_json_is_the_status_object() {
    let d = Daemon::start(false, TEST_TIMING);
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_decoderd"))
        .arg("ctl")
        .arg("--socket")
        .arg(&d.socket)
        .args(["status", "--json"])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let s: daemon::status::Status = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(s.listen, d.listen);
    assert_eq!(s.state, "disarmed");
}

/// Garbage, oversized requests and hundreds of idle connections at once
/// leave every slot answered, and the socket serves again once the idle
/// ones time out.
#[test]
fn a_flood_of_control_connections_leaves_every_slot_answered() {
    use std::io::{Read, Write};
    use std::os::unix::net::UnixStream;
    let d = Daemon::start(true, TEST_TIMING);
    std::thread::scope(|scope| {
        scope.spawn(|| d.stream(0..150, 0));
        d.wait_for_seq(5);
        let mut idle = Vec::new();
        for _ in 0..300 {
            if let Ok(c) = UnixStream::connect(&d.socket) {
                idle.push(c);
            }
        }
        for _ in 0..50 {
            if let Ok(mut c) = UnixStream::connect(&d.socket) {
                let _ = c.write_all(b"\x00\xffnot json at all\n");
            }
        }
        // A request line longer than the limit is cut off and refused.
        if let Ok(mut c) = UnixStream::connect(&d.socket) {
            let _ = c.write_all(&vec![b'x'; 200_000]);
            let mut reply = String::new();
            let _ = c.read_to_string(&mut reply);
            assert!(reply.is_empty() || reply.contains("bad request"), "{reply}");
        }
        assert!(idle.len() >= 100, "only {} connections opened", idle.len());
        d.wait_for_seq(149);
        drop(idle);
    });
    let p = d.wait_for_seq(149);
    // Every slot answered under the flood; whether each bin also beat its
    // deadline on this host is what `replay-tool bench` measures.
    let s = d.wait_for_status("the socket serving again", |s| {
        s.counters.bins_decoded + s.counters.bins_missing >= 150
    });
    assert_slots_accounted(&p, 0..150, &[], &s);
}

#[test]
fn a_regular_file_at_the_socket_path_is_never_deleted() {
    let dir = tempfile::tempdir().unwrap();
    let precious = dir.path().join("notes.txt");
    std::fs::write(&precious, "a user's file").unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_decoderd"))
        .arg("run")
        .arg("--model")
        .arg(&fixture().model)
        .arg("--listen")
        .arg("127.0.0.1:0")
        .args(["--task-listen", "127.0.0.1:0"])
        .arg("--socket")
        .arg(&precious)
        .arg("--record")
        .arg(dir.path().join("rec"))
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("is not a socket"), "{err}");
    assert_eq!(std::fs::read_to_string(&precious).unwrap(), "a user's file");
}

/// A seeded flood of near-valid datagrams (reordered, duplicated, far
/// jumps, wrong widths and channel counts, truncated, bit-flipped) at the
/// real daemon: it stays up, accounts for every datagram, and every packet
/// it sends is finite and within the speed limit. `VDEC_FUZZ_LIVE` sets
/// the count (default 3000; BENCHMARKS.md has a run of 10⁶).
#[test]
fn a_seeded_flood_of_damaged_datagrams_at_the_daemon_is_all_accounted_for() {
    use rand::{RngExt, SeedableRng};
    let n: u64 = std::env::var("VDEC_FUZZ_LIVE")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(3000);
    let d = Daemon::start(true, TEST_TIMING);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(0x11FE);
    let mut seq = 0u64;
    let started = Instant::now();
    let per_bin = (n / 10_000).max(20);
    for i in 0..n {
        seq = match rng.random_range(0..100) {
            0 => seq.wrapping_add(rng.random_range(100..10_000)),
            1..=4 => seq.wrapping_sub(rng.random_range(1..10)),
            5..=9 => seq,
            _ => seq.wrapping_add(1),
        };
        let mut b = d.bin_bytes(seq);
        match rng.random_range(0..50) {
            0 => b[24..28].copy_from_slice(&10_000u32.to_le_bytes()),
            1 => b.truncate(rng.random_range(0..b.len())),
            2 => {
                let at = rng.random_range(0..b.len());
                b[at] ^= 1 << rng.random_range(0..8);
            }
            3 => b[6..8].copy_from_slice(&3u16.to_le_bytes()),
            _ => {}
        }
        d.send_raw(&b);
        // At least 20 datagrams a bin (more in a long run, which is bounded
        // to about 10 000 bins, 200 s), so seqs move on as a stream does.
        if i % per_bin == per_bin - 1 {
            std::thread::sleep(BIN);
        }
    }
    // Everything sent has been read once the count stops moving; in a long
    // run the kernel may drop datagrams of a burst before the daemon reads
    // them (a full socket buffer), which the daemon cannot count.
    let mut last = u64::MAX;
    let s = loop {
        std::thread::sleep(Duration::from_millis(200));
        let s = d.status();
        if s.counters.datagrams == last {
            break s;
        }
        last = s.counters.datagrams;
    };
    let c = &s.counters;
    let dropped_by_kernel = n - c.datagrams;
    if n <= 3000 {
        assert_eq!(dropped_by_kernel, 0, "{c:?}");
    }
    let pending = c.datagrams
        - (c.bins_decoded
            + c.rejected
            + c.bins_duplicate
            + c.bins_late
            + c.bins_stray
            + c.bins_flushed);
    assert!(pending <= 64, "{pending} datagrams unaccounted: {c:?}");
    for p in d.packets() {
        assert!(
            p.command.iter().chain(&p.estimate).all(|v| v.is_finite()),
            "{p:?}"
        );
        let speed = p.command.iter().map(|v| v * v).sum::<f64>().sqrt();
        assert!(speed <= 50.0 + 1e-9, "{p:?}");
    }
    eprintln!(
        "{n} datagrams sent in {:.1} s, {} read ({dropped_by_kernel} dropped by the kernel's socket buffer): {} decoded, {} rejected, {} late, {} duplicate, {} stray, {} new streams",
        started.elapsed().as_secs_f64(),
        c.datagrams,
        c.bins_decoded,
        c.rejected,
        c.bins_late,
        c.bins_duplicate,
        c.bins_stray,
        c.new_streams
    );
}

/// The recording's destination fills up while the daemon runs (a file-size
/// limit stands in for a full disk): every slot is still answered, status
/// raises the alarm and counts the lost records, and what was written
/// replays bit for bit.
#[test]
fn a_full_recording_destination_leaves_decoding_running_and_what_was_written_verifies() {
    use std::os::unix::process::CommandExt;
    let f = fixture();
    let dir = tempfile::tempdir().unwrap();
    let socket = dir.path().join("ctl.sock");
    let sink = daemon_rig::ActuatorSink::on_loopback().unwrap();
    let config = dir.path().join("daemon.toml");
    std::fs::write(&config, TEST_TIMING).unwrap();
    let mut cmd = std::process::Command::new(env!("CARGO_BIN_EXE_decoderd"));
    cmd.arg("run")
        .arg("--config")
        .arg(&config)
        .arg("--model")
        .arg(&f.model)
        .args([
            "--listen",
            "127.0.0.1:0",
            "--task-listen",
            "127.0.0.1:0",
            "--arm",
            "--actuator",
        ])
        .arg(sink.addr.to_string())
        .arg("--socket")
        .arg(&socket)
        .arg("--record")
        .arg(dir.path().join("rec"))
        .stderr(std::process::Stdio::null());
    // SAFETY: only setrlimit between fork and exec.
    unsafe {
        cmd.pre_exec(|| {
            let limit = libc::rlimit {
                rlim_cur: 48 * 1024,
                rlim_max: 48 * 1024,
            };
            if libc::setrlimit(libc::RLIMIT_FSIZE, &limit) == 0 {
                Ok(())
            } else {
                Err(std::io::Error::last_os_error())
            }
        });
    }
    let mut child = cmd.spawn().unwrap();
    let status = |socket: &std::path::Path| {
        daemon::control::request(socket, &Request::Status)
            .ok()
            .and_then(|r| r.status)
    };
    let deadline = Instant::now() + PATIENCE;
    let (listen, task_listen) = loop {
        if let Some(s) = status(&socket) {
            break (s.listen, s.task.listen.unwrap());
        }
        assert!(Instant::now() < deadline, "decoderd did not come up");
        std::thread::sleep(Duration::from_millis(10));
    };
    let sender = std::net::UdpSocket::bind("127.0.0.1:0").unwrap();
    let d = Daemon {
        daemon: None,
        dir,
        listen,
        task_listen,
        socket: socket.clone(),
        sender,
        sink: None,
    };
    d.stream(0..400, 0);
    sink.wait_for_seq(399, PATIENCE).unwrap();
    let s = status(&socket).unwrap();
    let rec = s.recording.clone().unwrap();
    assert!(rec.alarm.is_some(), "no alarm: {rec:?}");
    assert!(rec.records_lost > 0, "{rec:?}");
    assert_eq!(
        s.counters.slots_answered,
        s.counters.bins_decoded + s.counters.bins_missing
    );
    // SAFETY: signalling our own child.
    unsafe { libc::kill(child.id() as i32, libc::SIGTERM) };
    assert!(child.wait().unwrap().success());
    let packets: Vec<VelocityPacket> = sink.finish().into_iter().map(|a| a.packet).collect();
    assert_eq!(
        seqs(&packets[..400]),
        (0..400).collect::<Vec<_>>(),
        "a slot was skipped"
    );
    // What was written replays: every recorded slot reproduced.
    let log = std::fs::read_dir(d.path().join("rec"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.extension().is_some_and(|e| e == "vdlog"))
        .unwrap();
    assert!(std::fs::metadata(&log).unwrap().len() <= 48 * 1024);
    let mut reader = LogReader::open(&log).unwrap();
    let mut checked = 0;
    replay_log(&mut reader, None, |slot| {
        if let Some(r) = slot.recorded {
            assert_eq!(r, slot.replayed, "slot {checked}");
            checked += 1;
        }
    })
    .unwrap();
    assert!(checked > 20, "only {checked} slots were recorded");
}

#[test]
fn the_control_socket_is_private_to_its_user() {
    use std::os::unix::fs::PermissionsExt;
    let d = Daemon::start(false, TEST_TIMING);
    let mode = std::fs::metadata(&d.socket).unwrap().permissions().mode();
    assert_eq!(mode & 0o777, 0o600, "mode {mode:o}");
}

/// The integrator's example front end (standard-library Python) streams a
/// session directory that `replay-tool simulate` format describes, and the
/// daemon decodes every bin of it.
#[test]
fn the_python_example_sender_drives_the_daemon() {
    let f = fixture();
    let python = std::env::var("PYTHON").unwrap_or_else(|_| "python3".into());
    if std::process::Command::new(&python)
        .arg("--version")
        .output()
        .is_err()
    {
        panic!("{python} not found; the example sender needs Python 3.11+ (set PYTHON)");
    }
    let d = Daemon::start(true, TEST_TIMING);
    let (session, _) =
        decoder_core::sim::reaching::simulate(&decoder_core::sim::reaching::SimOptions {
            minutes: 0.05,
            n_channels: f.n_channels,
            seed: 9,
            ..Default::default()
        })
        .unwrap();
    let block = d.path().join("block");
    session.write(&block).unwrap();
    let script = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../examples/send_bins.py");
    let out = std::process::Command::new(&python)
        .arg(&script)
        .arg(&block)
        .arg("--daemon")
        .arg(d.listen.to_string())
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let n = session.n_bins as u64;
    let p = d.wait_for_seq(n - 1);
    let s = d.status();
    assert_slots_accounted(&p, 0..n, &[], &s);
    assert_eq!(s.counters.rejected, 0);
    assert!(s.latency.origin_to_send_us.count >= s.counters.bins_decoded);
}

#[test]
fn task_packets_are_recorded_and_counted_and_a_flood_of_them_delays_no_bin() {
    use decoder_core::wire::task_packet::{
        Phase, TASK_FLAG_CLOSED_LOOP, TASK_FLAG_TARGET_VALID, TaskState, encode_task,
    };
    let mut d = Daemon::start(true, TEST_TIMING);
    let before = d.status();
    assert_eq!(before.task.received, 0);
    assert!(
        before.table().contains("no task packets yet"),
        "{}",
        before.table()
    );
    let task = d.sender.try_clone().unwrap();
    let to = d.task_listen;
    // 20 task packets per 20 ms bin (1 kHz), one in five malformed, while
    // the bins stream: the bins are served first, the task packets after.
    let flood = std::thread::spawn(move || {
        let (mut good, mut short, mut phase) = (0u64, 0u64, 0u64);
        let t0 = Instant::now();
        let mut bytes = Vec::new();
        for i in 0..2000u64 {
            let due = t0 + Duration::from_millis(1) * i as u32;
            if let Some(w) = due.checked_duration_since(Instant::now()) {
                std::thread::sleep(w);
            }
            let mut s = TaskState::new(2);
            s.phase = Phase::Reach;
            s.trial = (i / 100) as u32;
            s.bin_seq = i / 20;
            s.flags = TASK_FLAG_CLOSED_LOOP | TASK_FLAG_TARGET_VALID;
            if s.trial % 2 == 1 {
                // The task cues a click during odd trials.
                s.flags |= decoder_core::wire::task_packet::TASK_FLAG_CLICK_CUE;
            }
            s.target_radius = 1.0;
            s.cursor_pos[0] = i as f64;
            encode_task(&s, &mut bytes);
            match i % 5 {
                3 => {
                    bytes.truncate(30);
                    short += 1;
                }
                4 => {
                    bytes[7] = 9;
                    phase += 1;
                }
                _ => good += 1,
            }
            task.send_to(&bytes, to).unwrap();
        }
        (good, short, phase)
    });
    d.stream(0..100, 0);
    let (good, short, phase) = flood.join().unwrap();
    let p = d.wait_for_seq(99);
    // Every slot answered under the task flood, every bin accounted for.
    assert_slots_accounted(&p, 0..100, &[], &d.status());
    let s = d.wait_for_status("every task packet read", |s| {
        s.task.received == good + short + phase
    });
    assert_eq!(s.task.accepted, good);
    assert_eq!(s.task.rejected.get("too_short"), Some(&short));
    assert_eq!(s.task.rejected.get("unknown_phase"), Some(&phase));
    assert_eq!(s.task.last_phase.as_deref(), Some("reach"));
    assert_eq!(s.task.last_trial, Some(19));
    assert_eq!(s.task.closed_loop, Some(true));
    assert!(s.task.last_age_s.unwrap() < 60.0);
    assert!(s.table().contains("trial 19 reach"), "{}", s.table());
    let ended = d.stop();
    // The click cues come out of the log with the rows: a row is cued when
    // the task state it was counted under cued a click.
    let lb = decoder_core::formats::log_block::read_log_block(&ended.session_log).unwrap();
    let click = lb.block.click.as_ref().expect("the log has click cues");
    for (row, task) in lb.task.iter().enumerate() {
        assert_eq!(
            click[row],
            task.is_some_and(|t| t.trial % 2 == 1),
            "row {row}"
        );
    }
    assert!(click.iter().any(|c| *c) && click.iter().any(|c| !*c));
    let dir = tempfile::tempdir().unwrap();
    decoder_core::formats::log_block::export_log(&ended.session_log, dir.path()).unwrap();
    assert_eq!(
        decoder_core::Block::read(dir.path())
            .unwrap()
            .click
            .as_ref(),
        Some(click)
    );
    // Every task datagram is in the log as read, malformed ones too, and
    // the bins still replay bit for bit beside them.
    let mut reader = LogReader::open(&ended.session_log).unwrap();
    let mut tasks = 0u64;
    while let Some(r) = reader.next_record() {
        if let LogRecord::Task { .. } = r {
            tasks += 1;
        }
    }
    assert_eq!(tasks, good + short + phase);
    let mut reader = LogReader::open(&ended.session_log).unwrap();
    replay_log(&mut reader, None, |slot| {
        assert_eq!(Some(slot.replayed), slot.recorded)
    })
    .unwrap();
}

/// Sends bin `seq` after the task packet drawn after bin `seq − 1`, as a
/// task computer in closed loop would.
fn closed_loop_bin(d: &Daemon, seq: u64, closed_loop: bool) {
    use decoder_core::wire::task_packet::{
        Phase, TASK_FLAG_CLOSED_LOOP, TASK_FLAG_TARGET_VALID, TaskState, encode_task,
    };
    if seq > 0 {
        let mut t = TaskState::new(2);
        t.phase = Phase::Reach;
        t.bin_seq = seq - 1;
        t.trial = (seq / 100) as u32;
        t.flags = TASK_FLAG_TARGET_VALID
            | if closed_loop {
                TASK_FLAG_CLOSED_LOOP
            } else {
                0
            };
        t.target_radius = 1.0;
        let angle = (seq / 100) as f64;
        t.target_pos[..2].copy_from_slice(&[10.0 * angle.cos(), 10.0 * angle.sin()]);
        t.cursor_pos[..2].copy_from_slice(&[(seq % 100) as f64 * 0.05, 0.0]);
        let mut bytes = Vec::new();
        encode_task(&t, &mut bytes);
        d.send_task(&bytes);
    }
    d.send_bin(seq);
}

fn stream_closed_loop(d: &Daemon, seqs: std::ops::Range<u64>, closed_loop: bool) {
    let t0 = Instant::now();
    let first = seqs.start;
    for seq in seqs {
        let due = t0 + BIN * (seq - first) as u32;
        if let Some(w) = due.checked_duration_since(Instant::now()) {
            std::thread::sleep(w);
        }
        closed_loop_bin(d, seq, closed_loop);
    }
}

#[test]
fn adaptation_updates_only_while_armed_in_closed_loop_and_the_session_verifies() {
    let mut d = Daemon::start(
        true,
        &format!(
            "{TEST_TIMING}[adaptation]\nbatch_s = 1.0\nhalf_life_s = 5.0\nmin_usable_fraction = 0.6\n"
        ),
    );
    assert!(d.status().table().contains("adaptation         off"));
    let r = d.ctl(Request::Adapt { on: true });
    assert!(r.ok, "{}", r.message);
    // Armed, closed loop, a target: every batch of 50 bins is an update,
    // which goes in 25 slots (land_after_s, half of batch_s) after its
    // batch's last slot: the third at slot 174. (The fourth batch has 25
    // usable bins, fewer than the 30 that min_usable_fraction asks.)
    stream_closed_loop(&d, 0..175, true);
    let s = d.wait_for_status("three updates", |s| s.adaptation.worker.updates >= 3);
    assert!(
        s.model.path.starts_with("adaptation update"),
        "{}",
        s.model.path
    );
    assert_eq!(s.adaptation.worker.not_applied, 0);
    let done = s.adaptation.worker.updates;
    // Task says the cursor is not following the decoder: nothing usable.
    stream_closed_loop(&d, 175..275, false);
    let s = d.wait_for_status("a batch skipped", |s| {
        s.adaptation.worker.skipped_too_few_bins >= 1
    });
    assert_eq!(s.adaptation.worker.updates, done);
    // Disarmed: never an update.
    assert!(d.ctl(Request::Disarm).ok);
    stream_closed_loop(&d, 275..435, true);
    d.wait_for_seq(434);
    let s = d.wait_for_status("the disarmed batches skipped", |s| {
        s.adaptation.worker.skipped_too_few_bins >= 3
    });
    assert_eq!(s.adaptation.worker.updates, done, "{:?}", s.adaptation);
    assert!(d.ctl(Request::Adapt { on: false }).ok);
    let ended = d.stop();
    // Every update is a model record; the adaptive session replays bit
    // for bit.
    let mut reader = LogReader::open(&ended.session_log).unwrap();
    let mut n = 0;
    let summary = replay_log(&mut reader, None, |slot| {
        assert_eq!(Some(slot.replayed), slot.recorded, "slot {n}");
        n += 1;
    })
    .unwrap();
    assert_eq!(summary.model_loads, 1 + done);
    assert_eq!(summary.slots as usize, ended.packets.len());
}

#[test]
fn a_model_that_cannot_adapt_refuses_adaptation_with_the_reason() {
    let f = fixture();
    let d = Daemon::start(true, TEST_TIMING);
    let r = d.ctl(Request::Load {
        path: f.wiener_model.clone(),
    });
    assert!(r.ok, "{}", r.message);
    let r = d.ctl(Request::Adapt { on: true });
    assert!(!r.ok);
    assert!(
        r.message.contains("wiener") && r.message.contains("Kalman"),
        "{}",
        r.message
    );
    let s = d.status();
    assert!(!s.adaptation.on);
    assert!(
        s.table().contains("adaptation         not available"),
        "{}",
        s.table()
    );
}
