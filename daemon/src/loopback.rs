//! Drivers for measuring a running daemon from outside, as a rig would see
//! it: a paced front end, an actuator sink that times every packet, and a
//! plain relay that carries the same traffic without decoding (the
//! loopback floor). The benchmark and `replay-tool bench` both use them,
//! so their figures mean the same thing.

use std::net::{SocketAddr, UdpSocket};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use decoder_core::formats::packet::{self, VelocityPacket};

use crate::sys::{monotonic_ns, tighten_timer_slack};

/// What the front end does to one bin.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum BinFault {
    /// Sent as is.
    None,
    /// Not sent at all.
    Drop,
    /// Sent with its magic broken, so the daemon must reject it.
    Malformed,
    /// Held back and sent together with the next bins (a burst).
    Hold,
}

/// Sends `n` bins at `rate_hz`: bin k is a copy of `bins[k % len]` with seq
/// k and origin_ns stamped just before sending. Sleeps to 30 µs before each
/// due time and spins the rest (with a 1 ns timer slack), so bins leave on
/// the clock without the sender holding a whole core. Returns the send time
/// of each bin (0 for a dropped one).
pub fn paced_send(
    socket: &UdpSocket,
    target: SocketAddr,
    bins: &[Vec<u8>],
    n: usize,
    rate_hz: f64,
    fault: impl Fn(usize) -> BinFault,
) -> Vec<u64> {
    paced_send_from(socket, target, bins, n, rate_hz, 0, fault)
}

/// [`paced_send`] with bin k carrying seq `first_seq + k`.
pub fn paced_send_from(
    socket: &UdpSocket,
    target: SocketAddr,
    bins: &[Vec<u8>],
    n: usize,
    rate_hz: f64,
    first_seq: u64,
    fault: impl Fn(usize) -> BinFault,
) -> Vec<u64> {
    tighten_timer_slack();
    let period = Duration::from_secs_f64(1.0 / rate_hz);
    let mut buf = bins[0].clone();
    let mut held: Vec<Vec<u8>> = Vec::new();
    let mut sent_at = vec![0u64; n];
    let t0 = Instant::now() + Duration::from_millis(5);
    for (k, sent) in sent_at.iter_mut().enumerate() {
        let due = t0 + period.mul_f64(k as f64);
        if let Some(w) = due.checked_duration_since(Instant::now()) {
            if w > Duration::from_micros(30) {
                std::thread::sleep(w - Duration::from_micros(30));
            }
        }
        while Instant::now() < due {
            std::hint::spin_loop();
        }
        let src = &bins[k % bins.len()];
        if buf.len() != src.len() {
            buf.resize(src.len(), 0);
        }
        buf.copy_from_slice(src);
        buf[8..16].copy_from_slice(&(first_seq + k as u64).to_le_bytes());
        let f = fault(k);
        if f == BinFault::Drop {
            continue;
        }
        if f == BinFault::Malformed {
            buf[0] = b'X';
        }
        let now = monotonic_ns();
        buf[16..24].copy_from_slice(&now.to_le_bytes());
        if f == BinFault::Hold {
            held.push(buf.clone());
            continue;
        }
        for h in held.drain(..) {
            let _ = socket.send_to(&h, target);
        }
        let _ = socket.send_to(&buf, target);
        *sent = now;
    }
    for h in held.drain(..) {
        let _ = socket.send_to(&h, target);
    }
    sent_at
}

/// Per-seq observations of the actuator side.
#[derive(Clone, Debug, Default)]
pub struct SinkRecord {
    /// When the sink read the packet for seq k (0: none came).
    pub received_ns: Vec<u64>,
    /// The packet's own fields for seq k, when it came.
    pub packets: Vec<Option<VelocityPacket>>,
    /// Packets for seqs beyond the stream (heartbeats after it).
    pub extra: u64,
    /// Packets for a seq that had already come.
    pub repeated: u64,
}

/// Collects velocity packets for seqs `0..n` until stopped.
pub struct Sink {
    stop: Arc<AtomicBool>,
    thread: Option<JoinHandle<SinkRecord>>,
    pub addr: SocketAddr,
}

impl Sink {
    pub fn start(socket: UdpSocket, n: usize) -> std::io::Result<Sink> {
        Self::start_at(socket, 0, n)
    }

    /// Collects seqs `first_seq .. first_seq + n`, indexed from 0.
    pub fn start_at(socket: UdpSocket, first_seq: u64, n: usize) -> std::io::Result<Sink> {
        socket.set_read_timeout(Some(Duration::from_millis(20)))?;
        let addr = socket.local_addr()?;
        let stop = Arc::new(AtomicBool::new(false));
        let flag = stop.clone();
        let thread = std::thread::spawn(move || {
            let mut rec = SinkRecord {
                received_ns: vec![0; n],
                packets: vec![None; n],
                ..SinkRecord::default()
            };
            let mut buf = [0u8; 1024];
            while !flag.load(Ordering::Relaxed) {
                let Ok(len) = socket.recv(&mut buf) else {
                    continue;
                };
                let now = monotonic_ns();
                let Ok(p) = VelocityPacket::parse(&buf[..len]) else {
                    continue;
                };
                let Some(k) = p.seq.checked_sub(first_seq).map(|k| k as usize) else {
                    rec.extra += 1;
                    continue;
                };
                if k >= n {
                    rec.extra += 1;
                } else if rec.packets[k].is_some() {
                    rec.repeated += 1;
                } else {
                    rec.received_ns[k] = now;
                    rec.packets[k] = Some(p);
                }
            }
            rec
        });
        Ok(Sink {
            stop,
            thread: Some(thread),
            addr,
        })
    }

    pub fn finish(mut self) -> SinkRecord {
        self.stop.store(true, Ordering::Relaxed);
        self.thread
            .take()
            .and_then(|t| t.join().ok())
            .unwrap_or_default()
    }
}

/// The loopback floor: the same bins through a thread that only receives
/// each and sends a velocity-sized packet on; returns per-bin round trips
/// in ns (0 where none came back).
pub fn loopback_floor(
    bins: &[Vec<u8>],
    n: usize,
    rate_hz: f64,
    dims: usize,
) -> std::io::Result<Vec<u64>> {
    let relay = UdpSocket::bind("127.0.0.1:0")?;
    let relay_addr = relay.local_addr()?;
    let sink = Sink::start(UdpSocket::bind("127.0.0.1:0")?, n)?;
    let sink_addr = sink.addr;
    relay.set_read_timeout(Some(Duration::from_millis(20)))?;
    let stop = Arc::new(AtomicBool::new(false));
    let flag = stop.clone();
    let relay_thread = std::thread::spawn(move || {
        let mut buf = vec![0u8; 65536];
        let mut out = vec![0u8; packet::velocity_len(dims)];
        out[0..4].copy_from_slice(&packet::VELOCITY_MAGIC);
        out[4..6].copy_from_slice(&packet::PACKET_VERSION.to_le_bytes());
        out[7] = dims as u8;
        while !flag.load(Ordering::Relaxed) {
            if let Ok(len) = relay.recv(&mut buf) {
                if len >= 24 {
                    // seq and origin_ns, echoed as the daemon would.
                    out[8..24].copy_from_slice(&buf[8..24]);
                    let _ = relay.send_to(&out, sink_addr);
                }
            }
        }
    });
    let sender = UdpSocket::bind("127.0.0.1:0")?;
    paced_send(&sender, relay_addr, bins, n, rate_hz, |_| BinFault::None);
    std::thread::sleep(Duration::from_millis(100));
    stop.store(true, Ordering::Relaxed);
    let rec = sink.finish();
    let _ = relay_thread.join();
    Ok(rec
        .packets
        .iter()
        .zip(&rec.received_ns)
        .map(|(p, &r)| match p {
            Some(p) if p.origin_ns != 0 && r >= p.origin_ns => r - p.origin_ns,
            _ => 0,
        })
        .collect())
}
