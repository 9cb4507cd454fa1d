//! A harness that starts the real `decoderd` binary on ephemeral loopback
//! ports, plays front end (bin packets in the PROTOCOL.md §1 bytes) and actuator
//! (collects PROTOCOL.md §2 packets), and talks to the control socket.

#![allow(dead_code)]

use std::net::{SocketAddr, UdpSocket};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Stdio};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex, OnceLock};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use daemon::control::{Reply, Request, request};
use daemon::status::Status;
use decoder_core::decoders::DecoderModel;
use decoder_core::fit::kalman::{KalmanFitOptions, fit_kalman};
use decoder_core::formats::model_file::{ModelFile, Provenance};
use decoder_core::formats::packet::{self, BinHeader, VelocityPacket};
use decoder_core::sim::reaching::{SimOptions, simulate};

pub const BIN_MS: f64 = 20.0;
pub const BIN: Duration = Duration::from_millis(20);

pub struct Fixture {
    pub dir: PathBuf,
    pub model: PathBuf,
    pub other_model: PathBuf,
    pub wrong_model: PathBuf,
    pub counts: Vec<Vec<u16>>,
    pub n_channels: usize,
}

fn train(n_channels: usize, seed: u64) -> (ModelFile, decoder_core::Block) {
    let (session, _) = simulate(&SimOptions {
        minutes: 1.0,
        n_channels,
        seed,
        ..SimOptions::default()
    })
    .unwrap();
    let (k, _) = fit_kalman(&session, &KalmanFitOptions::default()).unwrap();
    (
        ModelFile {
            bin_ms: session.bin_ms,
            decoder: DecoderModel::Kalman(k),
            provenance: Provenance::untracked(),
        },
        session,
    )
}

/// Models and bins shared by every test in one binary.
pub fn fixture() -> &'static Fixture {
    static F: OnceLock<Fixture> = OnceLock::new();
    F.get_or_init(|| {
        let dir = std::env::temp_dir().join(format!("decoderd-test-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let (m, session) = train(16, 1);
        let (m2, _) = train(16, 2);
        let (m3, _) = train(12, 3);
        let model = dir.join("a.model");
        let other_model = dir.join("b.model");
        let wrong_model = dir.join("wrong.model");
        std::fs::write(&model, m.to_bytes()).unwrap();
        std::fs::write(&other_model, m2.to_bytes()).unwrap();
        std::fs::write(&wrong_model, m3.to_bytes()).unwrap();
        let counts = (0..session.n_bins)
            .map(|t| session.bin_counts(t).to_vec())
            .collect();
        Fixture {
            dir,
            model,
            other_model,
            wrong_model,
            counts,
            n_channels: 16,
        }
    })
}

pub struct Daemon {
    pub child: Child,
    pub dir: tempfile::TempDir,
    pub socket: PathBuf,
    pub listen: SocketAddr,
    pub sender: UdpSocket,
    pub packets: Arc<Mutex<Vec<VelocityPacket>>>,
    stop_sink: Arc<AtomicBool>,
    sink: Option<JoinHandle<()>>,
}

/// Extra TOML for the tests: a wide deadline slack so a loaded CI machine's
/// scheduling jitter does not turn a sent bin into a missing one. The rules
/// under test (which seqs coast, halt, ...) do not depend on it.
pub const TEST_TIMING: &str = "[timing]\ndeadline_slack_bins = 1.5\n";

impl Daemon {
    pub fn start(arm: bool, extra_toml: &str) -> Daemon {
        let f = fixture();
        let dir = tempfile::tempdir().unwrap();
        let socket = dir.path().join("ctl.sock");
        let config = dir.path().join("daemon.toml");
        std::fs::write(
            &config,
            format!(
                "[control]\nsocket = {:?}\n[recording]\ndir = {:?}\n[monitor]\nsummary_interval_s = 1.0\n{extra_toml}",
                socket.display().to_string(),
                dir.path().join("rec").display().to_string(),
            ),
        )
        .unwrap();
        let actuator = UdpSocket::bind("127.0.0.1:0").unwrap();
        actuator
            .set_read_timeout(Some(Duration::from_millis(50)))
            .unwrap();
        let actuator_addr = actuator.local_addr().unwrap();
        let log = std::fs::File::create(dir.path().join("decoderd.log")).unwrap();
        let mut cmd = Command::new(env!("CARGO_BIN_EXE_decoderd"));
        cmd.arg("run")
            .arg("--config")
            .arg(&config)
            .arg("--model")
            .arg(&f.model)
            .arg("--listen")
            .arg("127.0.0.1:0")
            .arg("--actuator")
            .arg(actuator_addr.to_string())
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(log);
        if arm {
            cmd.arg("--arm");
        }
        let child = cmd.spawn().unwrap();
        let packets = Arc::new(Mutex::new(Vec::new()));
        let stop_sink = Arc::new(AtomicBool::new(false));
        let sink = {
            let packets = packets.clone();
            let stop = stop_sink.clone();
            std::thread::spawn(move || {
                let mut buf = [0u8; 1024];
                while !stop.load(Ordering::Relaxed) {
                    if let Ok(n) = actuator.recv(&mut buf) {
                        let p =
                            VelocityPacket::parse(&buf[..n]).expect("daemon sent a valid packet");
                        packets.lock().unwrap().push(p);
                    }
                }
            })
        };
        let deadline = Instant::now() + Duration::from_secs(20);
        let status = loop {
            if let Ok(r) = request(&socket, &Request::Status) {
                if let Some(s) = r.status {
                    break s;
                }
            }
            assert!(
                Instant::now() < deadline,
                "decoderd did not come up: {}",
                std::fs::read_to_string(dir.path().join("decoderd.log")).unwrap_or_default()
            );
            std::thread::sleep(Duration::from_millis(20));
        };
        Daemon {
            child,
            socket,
            listen: status.listen.parse().unwrap(),
            sender: UdpSocket::bind("127.0.0.1:0").unwrap(),
            packets,
            stop_sink,
            sink: Some(sink),
            dir,
        }
    }

    pub fn ctl(&self, r: Request) -> Reply {
        request(&self.socket, &r).unwrap()
    }

    pub fn status(&self) -> Status {
        *self.ctl(Request::Status).status.unwrap()
    }

    pub fn send_raw(&self, bytes: &[u8]) {
        self.sender.send_to(bytes, self.listen).unwrap();
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
    /// (`slot_of(seq)` says in which period each goes).
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

    /// Waits until a packet for `seq` has come (or panics after 10 s).
    pub fn wait_for_seq(&self, seq: u64) -> Vec<VelocityPacket> {
        let deadline = Instant::now() + Duration::from_secs(10);
        loop {
            {
                let p = self.packets.lock().unwrap();
                if p.iter().any(|p| p.seq >= seq) {
                    return p.clone();
                }
            }
            assert!(Instant::now() < deadline, "no packet for seq {seq}");
            std::thread::sleep(Duration::from_millis(5));
        }
    }

    pub fn packets(&self) -> Vec<VelocityPacket> {
        self.packets.lock().unwrap().clone()
    }

    pub fn log_text(&self) -> String {
        std::fs::read_to_string(self.dir.path().join("decoderd.log")).unwrap_or_default()
    }

    /// SIGTERM, wait for exit; returns the exit status and the session log.
    pub fn stop(&mut self) -> (ExitStatus, PathBuf, Vec<VelocityPacket>) {
        // SAFETY: sending a signal to our own child process by pid.
        unsafe { libc::kill(self.child.id() as i32, libc::SIGTERM) };
        let deadline = Instant::now() + Duration::from_secs(10);
        let status = loop {
            if let Some(s) = self.child.try_wait().unwrap() {
                break s;
            }
            if Instant::now() > deadline {
                let _ = self.child.kill();
                panic!("decoderd did not stop on SIGTERM: {}", self.log_text());
            }
            std::thread::sleep(Duration::from_millis(10));
        };
        // Let the last packets land in the sink.
        std::thread::sleep(Duration::from_millis(100));
        self.stop_sink.store(true, Ordering::Relaxed);
        if let Some(s) = self.sink.take() {
            let _ = s.join();
        }
        let rec = self.dir.path().join("rec");
        let log = std::fs::read_dir(&rec)
            .unwrap()
            .map(|e| e.unwrap().path())
            .find(|p| p.extension().is_some_and(|e| e == "vdlog"))
            .expect("a session log");
        let packets = self.packets();
        (status, log, packets)
    }

    pub fn path(&self) -> &Path {
        self.dir.path()
    }
}

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
        self.stop_sink.store(true, Ordering::Relaxed);
    }
}

/// Seqs of the packets, in arrival order.
pub fn seqs(p: &[VelocityPacket]) -> Vec<u64> {
    p.iter().map(|p| p.seq).collect()
}
