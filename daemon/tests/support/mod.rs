//! The daemon's tests drive the real `decoderd` binary through the rig's
//! one launcher and actuator sink (`daemon-rig`); this file only holds what
//! these tests share: the models and bins, and short names for the rig's
//! calls with a test's panics instead of errors.

#![allow(dead_code)]

use std::net::{SocketAddr, UdpSocket};
use std::path::{Path, PathBuf};
use std::sync::OnceLock;
use std::time::{Duration, Instant};

use daemon::control::{Reply, Request};
use daemon::status::Status;
use daemon_rig::{ActuatorSink, Launch, RunningDaemon};
use decoder_core::sim::model::small_kalman;
use decoder_core::wire::packet::{self, BinHeader, VelocityPacket};

pub const BIN_MS: f64 = 20.0;
pub const BIN: Duration = Duration::from_millis(20);
/// How long a test waits for an event before it fails.
pub const PATIENCE: Duration = Duration::from_secs(10);

pub struct Fixture {
    pub dir: PathBuf,
    pub model: PathBuf,
    pub other_model: PathBuf,
    pub wrong_model: PathBuf,
    /// A Wiener model for the same 16 channels.
    pub wiener_model: PathBuf,
    pub counts: Vec<Vec<u16>>,
    pub n_channels: usize,
}

/// Models and bins shared by every test in one binary.
pub fn fixture() -> &'static Fixture {
    static F: OnceLock<Fixture> = OnceLock::new();
    F.get_or_init(|| {
        let dir = std::env::temp_dir().join(format!("decoderd-test-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let (m, session) = small_kalman(16, 1, 1.0);
        let (m2, _) = small_kalman(16, 2, 1.0);
        let (m3, _) = small_kalman(12, 3, 1.0);
        let model = dir.join("a.model");
        let other_model = dir.join("b.model");
        let wrong_model = dir.join("wrong.model");
        std::fs::write(&model, m.to_bytes()).unwrap();
        std::fs::write(&other_model, m2.to_bytes()).unwrap();
        std::fs::write(&wrong_model, m3.to_bytes()).unwrap();
        let wiener_model = dir.join("w.model");
        let w = decoder_core::fit::wiener::fit_wiener(&session, &Default::default()).unwrap();
        let wm = decoder_core::ModelFile {
            decoder: decoder_core::DecoderModel::Wiener(w),
            ..m.clone()
        };
        std::fs::write(&wiener_model, wm.to_bytes()).unwrap();
        let counts = (0..session.n_bins)
            .map(|t| session.bin_counts(t).to_vec())
            .collect();
        Fixture {
            dir,
            model,
            other_model,
            wrong_model,
            wiener_model,
            counts,
            n_channels: 16,
        }
    })
}

/// Extra TOML for the tests: a wide deadline slack so a loaded CI machine's
/// scheduling jitter does not turn a sent bin into a missing one. The rules
/// under test (which seqs coast, halt, ...) do not depend on it.
pub const TEST_TIMING: &str = "[timing]\ndeadline_slack_bins = 1.5\n";

pub struct Daemon {
    pub daemon: Option<RunningDaemon>,
    pub dir: tempfile::TempDir,
    pub listen: SocketAddr,
    pub task_listen: SocketAddr,
    pub socket: PathBuf,
    pub sender: UdpSocket,
    pub sink: Option<ActuatorSink>,
}

/// How a test's daemon ended.
pub struct Ended {
    pub session_log: PathBuf,
    pub packets: Vec<VelocityPacket>,
}

impl Daemon {
    pub fn start(arm: bool, extra_toml: &str) -> Daemon {
        let f = fixture();
        let dir = tempfile::tempdir().unwrap();
        let sink = ActuatorSink::on_loopback().unwrap();
        let daemon = Launch::new(&f.model, dir.path(), sink.addr)
            .binary(Some(Path::new(env!("CARGO_BIN_EXE_decoderd"))))
            .extra_toml(&format!(
                "[monitor]\nsummary_interval_s = 1.0\n{extra_toml}"
            ))
            .arm(arm)
            .start()
            .unwrap();
        Daemon {
            listen: daemon.listen,
            task_listen: daemon.task_listen,
            socket: daemon.socket.clone(),
            daemon: Some(daemon),
            sender: UdpSocket::bind("127.0.0.1:0").unwrap(),
            sink: Some(sink),
            dir,
        }
    }

    fn running(&self) -> &RunningDaemon {
        self.daemon.as_ref().expect("the daemon is running")
    }

    pub fn pid(&self) -> u32 {
        self.running().pid().unwrap()
    }

    pub fn ctl(&self, r: Request) -> Reply {
        self.running().ctl(&r).unwrap()
    }

    pub fn status(&self) -> Status {
        self.running().status().unwrap()
    }

    /// Waits until status shows `what`.
    pub fn wait_for_status(&self, what: &str, done: impl Fn(&Status) -> bool) -> Status {
        self.running()
            .wait_for_status(what, PATIENCE, done)
            .unwrap_or_else(|e| panic!("{e}: {}", self.log_text()))
    }

    pub fn send_raw(&self, bytes: &[u8]) {
        self.sender.send_to(bytes, self.listen).unwrap();
    }

    /// Sends one datagram to the task socket.
    pub fn send_task(&self, bytes: &[u8]) {
        self.sender.send_to(bytes, self.task_listen).unwrap();
    }

    pub fn bin_bytes(&self, seq: u64) -> Vec<u8> {
        let f = fixture();
        let counts = &f.counts[seq as usize % f.counts.len()];
        let mut out = Vec::new();
        packet::encode_bin(
            &BinHeader {
                channels: f.n_channels as u16,
                seq,
                origin_ns: daemon::sys::monotonic_ns(),
                bin_us: (BIN_MS * 1000.0) as u32,
                flags: 0,
                kind: packet::BinKind::Counts,
            },
            counts,
            &mut out,
        );
        out
    }

    pub fn send_bin(&self, seq: u64) {
        self.send_raw(&self.bin_bytes(seq));
    }

    /// Sends `seqs` paced at the bin rate, one per bin period from now
    /// (`seq - first_seq` says in which period each goes).
    pub fn stream(&self, seqs: impl IntoIterator<Item = u64>, first_seq: u64) {
        let t0 = Instant::now();
        for seq in seqs {
            let due = t0 + BIN * (seq - first_seq) as u32;
            if let Some(wait) = due.checked_duration_since(Instant::now()) {
                std::thread::sleep(wait);
            }
            self.send_bin(seq);
        }
    }

    /// Waits until a packet for `seq` (or a later one) has come; returns
    /// every packet so far.
    pub fn wait_for_seq(&self, seq: u64) -> Vec<VelocityPacket> {
        self.sink
            .as_ref()
            .unwrap()
            .wait_for_seq(seq, PATIENCE)
            .unwrap_or_else(|e| panic!("{e}: {}", self.log_text()))
    }

    pub fn packets(&self) -> Vec<VelocityPacket> {
        self.sink.as_ref().unwrap().packets()
    }

    pub fn log_text(&self) -> String {
        std::fs::read_to_string(self.dir.path().join("decoderd.log")).unwrap_or_default()
    }

    /// SIGTERM and a clean exit (a test failure otherwise); returns the
    /// session log and every packet the actuator got.
    pub fn stop(&mut self) -> Ended {
        let log = self.log_text();
        let stopped = self
            .daemon
            .take()
            .unwrap()
            .stop()
            .unwrap_or_else(|e| panic!("{e:#}: {log}"));
        let packets = self
            .sink
            .take()
            .unwrap()
            .finish()
            .into_iter()
            .map(|a| a.packet)
            .collect();
        Ended {
            session_log: stopped.session_log.expect("a session log"),
            packets,
        }
    }

    pub fn path(&self) -> &Path {
        self.dir.path()
    }
}

/// Seqs of the packets, in arrival order.
pub fn seqs(p: &[VelocityPacket]) -> Vec<u64> {
    p.iter().map(|p| p.seq).collect()
}

/// Whether the daemon answered this slot with a predict-only step.
pub fn missing(p: &VelocityPacket) -> bool {
    p.flags & packet::FLAG_BIN_MISSING != 0
}

/// What a live test controls about a stream, checked without asking what
/// the host's scheduler decided: every slot in `slots` answered once and in
/// order; every seq in `withheld` (never sent) answered as missing; and
/// every bin that was sent accounted for — decoded in its slot, or, when a
/// loaded host held the sender or the daemon past the slot's deadline,
/// answered as missing and counted late when it came. Whether a sent bin
/// beat its deadline is the scheduler's call, so no test asserts it; the
/// slot engine's own tests pin that rule with time as data, and
/// `replay-tool bench` measures it.
pub fn assert_slots_accounted(
    packets: &[VelocityPacket],
    slots: std::ops::Range<u64>,
    withheld: &[u64],
    status: &Status,
) {
    let n = (slots.end - slots.start) as usize;
    assert!(
        packets.len() >= n,
        "{} packets for {n} slots",
        packets.len()
    );
    let answered = &packets[..n];
    assert_eq!(seqs(answered), slots.clone().collect::<Vec<_>>());
    for p in answered {
        if withheld.contains(&p.seq) {
            assert!(missing(p), "seq {} was never sent but was decoded", p.seq);
        } else {
            // A decoded slot is armed; a coasted one says so.
            assert_eq!(p.state, if missing(p) { 2 } else { 1 }, "seq {}", p.seq);
        }
    }
    let sent_but_coasted = answered
        .iter()
        .filter(|p| missing(p) && !withheld.contains(&p.seq))
        .count() as u64;
    let sent = (n - withheld.len()) as u64;
    let c = &status.counters;
    assert_eq!(
        c.bins_decoded + sent_but_coasted,
        sent,
        "every sent bin decoded or answered late: {c:?}"
    );
    assert!(
        c.bins_late >= sent_but_coasted,
        "a coasted slot's bin is counted late when it comes: {c:?}"
    );
}
