//! The front end's stand-in: bin packets (PROTOCOL.md §1) sent on the bin
//! clock, each stamped with its seq and send time just before it leaves,
//! with an optional fault schedule (dropped, malformed and held-back bins).

use std::net::{SocketAddr, UdpSocket};
use std::time::{Duration, Instant};

use daemon::sys::{monotonic_ns, tighten_timer_slack};

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
/// the clock without the sender holding a whole core. Keeps nothing per
/// bin, so an hours-long stream costs no more memory than a short one.
pub fn paced_send(
    socket: &UdpSocket,
    target: SocketAddr,
    bins: &[Vec<u8>],
    n: usize,
    rate_hz: f64,
    fault: impl Fn(usize) -> BinFault,
) {
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
) {
    tighten_timer_slack();
    let period = Duration::from_secs_f64(1.0 / rate_hz);
    let mut buf = bins[0].clone();
    let mut held: Vec<Vec<u8>> = Vec::new();
    let t0 = Instant::now() + Duration::from_millis(5);
    for k in 0..n {
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
    }
    for h in held.drain(..) {
        let _ = socket.send_to(&h, target);
    }
}
