//! The actuator's stand-in: a thread that reads every velocity packet
//! (PROTOCOL.md §2) the daemon sends, times its arrival and keeps it in
//! arrival order. Tests wait on it for an event (a packet for a seq, or
//! any condition on what has come) instead of sleeping. A short run takes
//! the per-seq view of it at the end; an hours-long bench hands each
//! packet to a meter as it comes ([`ActuatorSink::metered`]) and keeps
//! none, so its memory does not grow with the run.

use std::net::{SocketAddr, UdpSocket};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Condvar, Mutex};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use anyhow::{Result, bail};
use daemon::sys::monotonic_ns;
use decoder_core::wire::packet::VelocityPacket;

/// One packet as the sink read it.
#[derive(Clone, Debug)]
pub struct Arrival {
    /// Monotonic clock (the daemon's `sent_ns` clock) when it was read.
    pub received_ns: u64,
    pub packet: VelocityPacket,
}

#[derive(Default)]
struct Kept {
    /// Every packet in arrival order (none for a metered sink).
    arrivals: Vec<Arrival>,
    /// The newest seq that has come, in both modes.
    newest_seq: Option<u64>,
}

#[derive(Default)]
struct Shared {
    kept: Mutex<Kept>,
    /// Datagrams that were not velocity packets.
    malformed: Mutex<u64>,
    arrived: Condvar,
}

/// Per-seq observations of the actuator side, for seqs
/// `first_seq .. first_seq + n` indexed from 0.
#[derive(Clone, Debug, Default)]
pub struct SinkRecord {
    /// When the sink read the packet for seq k (0: none came).
    pub received_ns: Vec<u64>,
    /// The packet's own fields for seq k, when it came.
    pub packets: Vec<Option<VelocityPacket>>,
    /// Packets for seqs outside the range (heartbeats after the stream).
    pub extra: u64,
    /// Packets for a seq that had already come.
    pub repeated: u64,
}

/// Collects velocity packets until finished.
pub struct ActuatorSink {
    stop: Arc<AtomicBool>,
    shared: Arc<Shared>,
    thread: Option<JoinHandle<()>>,
    /// The address the daemon's `network.actuator` must name.
    pub addr: SocketAddr,
}

/// What the sink does with each packet it reads.
type OnArrival = Box<dyn FnMut(Arrival) + Send>;

impl ActuatorSink {
    /// Reads packets on `socket` from now on and keeps them all.
    pub fn start(socket: UdpSocket) -> std::io::Result<ActuatorSink> {
        Self::spawn(socket, None)
    }

    /// Reads packets on `socket` from now on and hands each to `meter` on
    /// the sink's thread as it is read, keeping none: [`ActuatorSink::arrivals`]
    /// stays empty, [`ActuatorSink::wait_for_seq`] still works.
    pub fn metered(
        socket: UdpSocket,
        meter: impl FnMut(Arrival) + Send + 'static,
    ) -> std::io::Result<ActuatorSink> {
        Self::spawn(socket, Some(Box::new(meter)))
    }

    fn spawn(socket: UdpSocket, mut meter: Option<OnArrival>) -> std::io::Result<ActuatorSink> {
        socket.set_read_timeout(Some(Duration::from_millis(20)))?;
        let addr = socket.local_addr()?;
        let stop = Arc::new(AtomicBool::new(false));
        let shared = Arc::new(Shared::default());
        let (flag, into) = (stop.clone(), shared.clone());
        let thread = std::thread::Builder::new()
            .name("actuator-sink".into())
            .spawn(move || {
                let mut buf = [0u8; 1024];
                loop {
                    let len = match socket.recv(&mut buf) {
                        Ok(len) => len,
                        // Finished and nothing left in the socket's buffer:
                        // every packet sent before the stop has been read.
                        Err(_) if flag.load(Ordering::Relaxed) => break,
                        Err(_) => continue,
                    };
                    let received_ns = monotonic_ns();
                    match VelocityPacket::parse(&buf[..len]) {
                        Ok(packet) => {
                            let seq = packet.seq;
                            let arrival = Arrival {
                                received_ns,
                                packet,
                            };
                            let mut kept = into.kept.lock().unwrap();
                            match meter.as_mut() {
                                Some(meter) => meter(arrival),
                                None => kept.arrivals.push(arrival),
                            }
                            kept.newest_seq = Some(kept.newest_seq.map_or(seq, |n| n.max(seq)));
                            drop(kept);
                            into.arrived.notify_all();
                        }
                        Err(_) => *into.malformed.lock().unwrap() += 1,
                    }
                }
            })?;
        Ok(ActuatorSink {
            stop,
            shared,
            thread: Some(thread),
            addr,
        })
    }

    /// Binds an ephemeral loopback port and reads on it.
    pub fn on_loopback() -> std::io::Result<ActuatorSink> {
        Self::start(UdpSocket::bind("127.0.0.1:0")?)
    }

    /// Every packet so far, in arrival order.
    pub fn arrivals(&self) -> Vec<Arrival> {
        self.shared.kept.lock().unwrap().arrivals.clone()
    }

    /// Every packet so far, in arrival order.
    pub fn packets(&self) -> Vec<VelocityPacket> {
        let kept = self.shared.kept.lock().unwrap();
        kept.arrivals.iter().map(|a| a.packet.clone()).collect()
    }

    /// Datagrams that did not parse as velocity packets.
    pub fn malformed(&self) -> u64 {
        *self.shared.malformed.lock().unwrap()
    }

    /// Blocks until `done` holds for the packets so far, or fails after
    /// `timeout` with `what` in the message.
    pub fn wait_until(
        &self,
        what: &str,
        timeout: Duration,
        done: impl Fn(&[Arrival]) -> bool,
    ) -> Result<Vec<VelocityPacket>> {
        self.wait_kept(what, timeout, |k| done(&k.arrivals))
    }

    /// Blocks until a packet for `seq` or a later one has come; returns the
    /// packets kept so far (none for a metered sink).
    pub fn wait_for_seq(&self, seq: u64, timeout: Duration) -> Result<Vec<VelocityPacket>> {
        self.wait_kept(&format!("packet for seq {seq}"), timeout, |k| {
            k.newest_seq.is_some_and(|n| n >= seq)
        })
    }

    fn wait_kept(
        &self,
        what: &str,
        timeout: Duration,
        done: impl Fn(&Kept) -> bool,
    ) -> Result<Vec<VelocityPacket>> {
        let deadline = Instant::now() + timeout;
        let mut kept = self.shared.kept.lock().unwrap();
        loop {
            if done(&kept) {
                return Ok(kept.arrivals.iter().map(|a| a.packet.clone()).collect());
            }
            let now = Instant::now();
            if now >= deadline {
                bail!(
                    "no {what} within {:.1} s ({})",
                    timeout.as_secs_f64(),
                    kept.newest_seq
                        .map_or("no packet came".to_string(), |n| format!("newest seq {n}"))
                );
            }
            kept = self
                .shared
                .arrived
                .wait_timeout(kept, deadline - now)
                .unwrap()
                .0;
        }
    }

    /// Stops reading once the socket's buffer is empty and returns every
    /// packet in arrival order.
    pub fn finish(mut self) -> Vec<Arrival> {
        self.stop.store(true, Ordering::Relaxed);
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
        std::mem::take(&mut self.shared.kept.lock().unwrap().arrivals)
    }

    /// [`ActuatorSink::finish`], seen per seq for `first_seq .. first_seq + n`.
    pub fn finish_per_seq(self, first_seq: u64, n: usize) -> SinkRecord {
        per_seq(&self.finish(), first_seq, n)
    }
}

/// The per-seq view of arrivals: the first packet for each seq counts.
pub fn per_seq(arrivals: &[Arrival], first_seq: u64, n: usize) -> SinkRecord {
    let mut rec = SinkRecord {
        received_ns: vec![0; n],
        packets: vec![None; n],
        ..SinkRecord::default()
    };
    for a in arrivals {
        match a.packet.seq.checked_sub(first_seq).map(|k| k as usize) {
            Some(k) if k < n => {
                if rec.packets[k].is_some() {
                    rec.repeated += 1;
                } else {
                    rec.received_ns[k] = a.received_ns;
                    rec.packets[k] = Some(a.packet.clone());
                }
            }
            _ => rec.extra += 1,
        }
    }
    rec
}

impl Drop for ActuatorSink {
    fn drop(&mut self) {
        self.stop.store(true, Ordering::Relaxed);
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}
