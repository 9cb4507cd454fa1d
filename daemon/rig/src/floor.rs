//! The loopback floor: what the same traffic costs through this machine's
//! UDP stack and scheduler with no decoding at all. A relay thread receives
//! each bin and sends a velocity-sized packet on; the round trip it gives
//! is the floor under any daemon figure measured the same way.

use std::net::UdpSocket;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Duration;

use decoder_core::wire::packet;

use crate::actuator::ActuatorSink;
use crate::front_end::{BinFault, paced_send};

/// Sends `n` of `bins` at `rate_hz` through the relay; returns per-bin
/// round trips in ns (0 where none came back).
pub fn loopback_floor(
    bins: &[Vec<u8>],
    n: usize,
    rate_hz: f64,
    dims: usize,
) -> std::io::Result<Vec<u64>> {
    let relay = UdpSocket::bind("127.0.0.1:0")?;
    let relay_addr = relay.local_addr()?;
    let sink = ActuatorSink::on_loopback()?;
    let sink_addr = sink.addr;
    relay.set_read_timeout(Some(Duration::from_millis(20)))?;
    let stop = Arc::new(AtomicBool::new(false));
    let flag = stop.clone();
    let relay_thread = std::thread::spawn(move || {
        let mut buf = vec![0u8; 65536];
        let mut out = vec![0u8; packet::velocity_len(dims)];
        out[0..4].copy_from_slice(&packet::VELOCITY_MAGIC);
        out[4..6].copy_from_slice(&packet::VELOCITY_VERSION.to_le_bytes());
        out[7] = dims as u8;
        loop {
            match relay.recv(&mut buf) {
                Ok(len) if len >= 24 => {
                    // seq and origin_ns, echoed as the daemon would.
                    out[8..24].copy_from_slice(&buf[8..24]);
                    let _ = relay.send_to(&out, sink_addr);
                }
                Ok(_) => {}
                // Stopped, and every bin sent so far has been relayed.
                Err(_) if flag.load(Ordering::Relaxed) => break,
                Err(_) => {}
            }
        }
    });
    let sender = UdpSocket::bind("127.0.0.1:0")?;
    paced_send(&sender, relay_addr, bins, n, rate_hz, |_| BinFault::None);
    stop.store(true, Ordering::Relaxed);
    let _ = relay_thread.join();
    let rec = sink.finish_per_seq(0, n);
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
