//! The bench's measurement, in memory that does not grow with the run.
//!
//! A rig team benches for hours before a participant's session; keeping
//! every velocity packet until the end would cost a gigabyte an hour at
//! 1 kHz. The meter instead takes each packet as the actuator sink reads
//! it, holds a short reorder window (packets of a burst may come out of
//! seq order), and settles each slot in seq order once the window has
//! moved past it: the slot's row is appended to the per-bin table on
//! disk, its latencies go into running histograms (3 significant digits)
//! and into the current time bucket, whose median, p99 and max become one
//! point of the run's envelope when the bucket closes. What it keeps is a
//! window of two seconds of slots, one bucket of samples and one envelope
//! point per bucket; buckets are one second wide until a run passes two
//! hours, then wide enough that a run never has more than 7 200 of them.

use std::collections::VecDeque;
use std::fs::File;
use std::io::{BufWriter, Write as _};
use std::path::{Path, PathBuf};

use daemon::status::Percentiles;
use daemon_rig::BinFault;
use daemon_rig::actuator::Arrival;
use decoder_core::wire::packet::FLAG_BIN_MISSING;
use hdrhistogram::Histogram;

/// The bins the front end spoils on purpose (`--drop-every`,
/// `--malformed-every`, `--burst-every`), as a function of the bin index.
#[derive(Clone, Copy, Debug, Default)]
pub struct FaultSchedule {
    pub drop_every: Option<usize>,
    pub malformed_every: Option<usize>,
    pub burst_every: Option<usize>,
}

impl FaultSchedule {
    pub fn at(&self, k: usize) -> BinFault {
        let hit = |every: Option<usize>| every.is_some_and(|e| e > 0 && k % e == e - 1);
        if hit(self.drop_every) {
            BinFault::Drop
        } else if hit(self.malformed_every) {
            BinFault::Malformed
        } else if self
            .burst_every
            .is_some_and(|e| e > 0 && k % e >= e.saturating_sub(3))
        {
            BinFault::Hold
        } else {
            BinFault::None
        }
    }
}

fn fault_label(f: BinFault) -> &'static str {
    match f {
        BinFault::None => "",
        BinFault::Drop => "drop",
        BinFault::Malformed => "malformed",
        BinFault::Hold => "burst",
    }
}

/// One point of a series' envelope: the samples of one time bucket.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Envelope {
    /// Start of the bucket, seconds into the run.
    pub t_s: f64,
    pub median_us: f64,
    pub p99_us: f64,
    pub max_us: f64,
    pub count: usize,
}

/// A latency series: every sample in a running histogram (ns), and the
/// run over time as one envelope point per bucket.
pub struct Series {
    pub name: &'static str,
    pub histogram: Histogram<u64>,
    pub envelopes: Vec<Envelope>,
    bucket: Vec<f64>,
}

impl Series {
    fn new(name: &'static str) -> Series {
        Series {
            name,
            // 1 ns to an hour, 3 significant digits; larger values are
            // recorded as an hour rather than lost.
            histogram: Histogram::new_with_bounds(1, 3_600_000_000_000, 3)
                .expect("histogram bounds are valid"),
            envelopes: Vec::new(),
            bucket: Vec::new(),
        }
    }

    fn record(&mut self, us: f64) {
        self.histogram
            .saturating_record(((us * 1e3).round() as u64).max(1));
        self.bucket.push(us);
    }

    /// Closes the bucket that started at `t_s` (nothing when it is empty).
    fn close_bucket(&mut self, t_s: f64) {
        if self.bucket.is_empty() {
            return;
        }
        self.bucket.sort_by(f64::total_cmp);
        let v = &self.bucket;
        let at = |q: f64| v[((v.len() - 1) as f64 * q).round() as usize];
        self.envelopes.push(Envelope {
            t_s,
            median_us: at(0.5),
            p99_us: at(0.99),
            max_us: at(1.0),
            count: v.len(),
        });
        self.bucket.clear();
    }

    pub fn percentiles(&self) -> Percentiles {
        Percentiles::of(&self.histogram)
    }
}

/// What the sink read for one slot, without the velocity vectors.
#[derive(Clone, Copy, Debug)]
struct Seen {
    received_ns: u64,
    sent_ns: u64,
    recv_ns: u64,
    origin_ns: u64,
    state: u8,
    flags: u32,
}

/// The run's figures once every slot is settled.
pub struct Measured {
    pub missed_slots: usize,
    pub unexpected_dropouts: usize,
    pub faults_flagged: usize,
    pub faults: usize,
    /// Packets for seqs past the stream (heartbeats after the last bin).
    pub extra: u64,
    /// A second packet for a slot that already had one.
    pub repeated: u64,
    /// A first packet for a slot more than the window behind the newest.
    pub after_window: u64,
    /// Width of one envelope bucket, s.
    pub bucket_s: f64,
    pub recv_to_send: Series,
    pub round_trip: Series,
    pub jitter: Series,
}

/// The most envelope points a run draws, whatever its length.
pub const MAX_BUCKETS: usize = 7200;

/// Settles the bench's slots as their packets come; see the module notes.
pub struct BenchMeter {
    n: usize,
    rate_hz: f64,
    period_ns: f64,
    faults: FaultSchedule,
    bucket_s: f64,
    window_len: usize,
    /// Slots `next .. next + window.len()`, not yet settled.
    window: VecDeque<Option<Seen>>,
    next: usize,
    /// Settled slots held until the jitter reference is known.
    warm: Vec<(usize, Option<Seen>)>,
    warm_len: usize,
    /// The send-time offset taken as zero jitter: the median offset of
    /// the first second's packets.
    reference_ns: Option<f64>,
    bucket: Option<u64>,
    table: Option<(PathBuf, BufWriter<File>)>,
    table_error: Option<String>,
    out: Measured,
}

impl BenchMeter {
    /// A meter for slots 0..n at `rate_hz`, writing the per-bin table to
    /// `table` (CSV) when given.
    pub fn new(
        n: usize,
        rate_hz: f64,
        faults: FaultSchedule,
        table: Option<&Path>,
    ) -> std::io::Result<BenchMeter> {
        let seconds = n as f64 / rate_hz;
        let bucket_s = (seconds / MAX_BUCKETS as f64).ceil().max(1.0);
        let table = match table {
            Some(p) => {
                let mut w = BufWriter::with_capacity(1 << 16, File::create(p)?);
                w.write_all(
                    b"seq,fault,state,flags,recv_to_send_us,round_trip_us,send_jitter_us\n",
                )?;
                Some((p.to_path_buf(), w))
            }
            None => None,
        };
        Ok(BenchMeter {
            n,
            rate_hz,
            period_ns: 1e9 / rate_hz,
            faults,
            bucket_s,
            window_len: ((2.0 * rate_hz).ceil() as usize).max(64),
            window: VecDeque::new(),
            next: 0,
            warm: Vec::new(),
            warm_len: (rate_hz.ceil() as usize).clamp(1, n.max(1)),
            reference_ns: None,
            bucket: None,
            table,
            table_error: None,
            out: Measured {
                missed_slots: 0,
                unexpected_dropouts: 0,
                faults_flagged: 0,
                faults: 0,
                extra: 0,
                repeated: 0,
                after_window: 0,
                bucket_s,
                recv_to_send: Series::new("decoderd recv→send"),
                round_trip: Series::new("front end → actuator"),
                jitter: Series::new("send jitter vs bin clock"),
            },
        })
    }

    /// Takes one packet as the sink read it.
    pub fn arrive(&mut self, a: &Arrival) {
        let Ok(k) = usize::try_from(a.packet.seq) else {
            self.out.extra += 1;
            return;
        };
        if k >= self.n {
            self.out.extra += 1;
            return;
        }
        if k < self.next {
            // Its slot is settled: either it had a packet (a repeat) or
            // it was counted missed, and this one came too late to matter.
            self.out.after_window += 1;
            return;
        }
        let at = k - self.next;
        while self.window.len() <= at {
            self.window.push_back(None);
        }
        let slot = &mut self.window[at];
        if slot.is_some() {
            self.out.repeated += 1;
            return;
        }
        let p = &a.packet;
        *slot = Some(Seen {
            received_ns: a.received_ns,
            sent_ns: p.sent_ns,
            recv_ns: p.recv_ns,
            origin_ns: p.origin_ns,
            state: p.state,
            flags: p.flags,
        });
        while self.window.len() > self.window_len {
            self.settle_front();
        }
    }

    fn settle_front(&mut self) {
        let seen = self.window.pop_front().flatten();
        let k = self.next;
        self.next += 1;
        if self.reference_ns.is_some() {
            self.account(k, seen);
            return;
        }
        self.warm.push((k, seen));
        if self.warm.len() >= self.warm_len {
            self.end_warm_up();
        }
    }

    fn offset_ns(&self, k: usize, s: &Seen) -> f64 {
        s.sent_ns as f64 - k as f64 * self.period_ns
    }

    fn end_warm_up(&mut self) {
        let mut offsets: Vec<f64> = self
            .warm
            .iter()
            .filter_map(|(k, s)| s.as_ref().map(|s| self.offset_ns(*k, s)))
            .collect();
        offsets.sort_by(f64::total_cmp);
        // No packet in the first second: the first one that comes sets it.
        self.reference_ns = offsets.get(offsets.len() / 2).copied();
        for (k, seen) in std::mem::take(&mut self.warm) {
            self.account(k, seen);
        }
    }

    /// Settles slot k: counters, series, envelope bucket, table row.
    fn account(&mut self, k: usize, seen: Option<Seen>) {
        let b = (k as f64 / self.rate_hz / self.bucket_s).floor() as u64;
        if self.bucket != Some(b) {
            self.close_bucket();
            self.bucket = Some(b);
        }
        let f = self.faults.at(k);
        let injected = matches!(f, BinFault::Drop | BinFault::Malformed);
        self.out.faults += usize::from(injected);
        let Some(s) = seen else {
            self.out.missed_slots += 1;
            self.row(format_args!("{k},{},,,,,\n", fault_label(f)));
            return;
        };
        let coasted = s.flags & FLAG_BIN_MISSING != 0;
        if injected {
            self.out.faults_flagged += usize::from(coasted);
        } else if coasted && f == BinFault::None {
            self.out.unexpected_dropouts += 1;
        }
        let offset = self.offset_ns(k, &s);
        let reference = *self.reference_ns.get_or_insert(offset);
        let jitter = (offset - reference).abs() / 1e3;
        self.out.jitter.record(jitter);
        let (mut r2s, mut rt) = (f64::NAN, f64::NAN);
        if !coasted {
            r2s = s.sent_ns.saturating_sub(s.recv_ns) as f64 / 1e3;
            self.out.recv_to_send.record(r2s);
            if s.origin_ns != 0 && s.received_ns >= s.origin_ns {
                rt = (s.received_ns - s.origin_ns) as f64 / 1e3;
                self.out.round_trip.record(rt);
            }
        }
        self.row(format_args!(
            "{k},{},{},{},{r2s},{rt},{jitter}\n",
            fault_label(f),
            s.state,
            s.flags
        ));
    }

    fn close_bucket(&mut self) {
        if let Some(b) = self.bucket {
            let t = b as f64 * self.bucket_s;
            self.out.recv_to_send.close_bucket(t);
            self.out.round_trip.close_bucket(t);
            self.out.jitter.close_bucket(t);
        }
    }

    fn row(&mut self, line: std::fmt::Arguments) {
        if self.table_error.is_some() {
            return;
        }
        if let Some((path, w)) = &mut self.table {
            if let Err(e) = w.write_fmt(line) {
                self.table_error = Some(format!("cannot write {}: {e}", path.display()));
            }
        }
    }

    /// Settles every slot left (those with no packet are missed) and
    /// returns the figures; fails only when the per-bin table could not be
    /// written, naming it.
    pub fn finish(mut self) -> Result<Measured, String> {
        while self.next < self.n {
            if self.window.is_empty() {
                self.window.push_back(None);
            }
            self.settle_front();
        }
        if self.reference_ns.is_none() {
            self.end_warm_up();
        }
        self.close_bucket();
        if let Some((path, mut w)) = self.table.take() {
            if let Err(e) = w.flush() {
                self.table_error
                    .get_or_insert(format!("cannot write {}: {e}", path.display()));
            }
        }
        match self.table_error {
            Some(e) => Err(e),
            None => Ok(self.out),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use decoder_core::wire::packet::VelocityPacket;

    fn arrival(seq: u64, sent_ns: u64, flags: u32) -> Arrival {
        Arrival {
            received_ns: sent_ns + 40_000,
            packet: VelocityPacket {
                state: 1,
                seq,
                origin_ns: sent_ns.saturating_sub(90_000),
                recv_ns: sent_ns - 10_000 - seq % 7 * 1_000,
                sent_ns,
                flags,
                command: vec![0.0; 2],
                estimate: vec![0.0; 2],
                click_prob: 0.0,
            },
        }
    }

    /// Every slot settled in order, whatever order packets came in: the
    /// counts equal a whole-run reading of the same packets.
    #[test]
    fn out_of_order_and_missing_slots_are_settled_once_each() {
        let (n, rate) = (5_000usize, 1000.0);
        let faults = FaultSchedule {
            drop_every: Some(50),
            ..FaultSchedule::default()
        };
        let mut m = BenchMeter::new(n, rate, faults, None).unwrap();
        let mut order: Vec<usize> = (0..n).collect();
        // Bursts: every 100 slots, three come in reverse order.
        for c in order.chunks_mut(100) {
            c[..3].reverse();
        }
        for &k in &order {
            if k % 333 == 0 {
                continue; // never came
            }
            let flags = if faults.at(k) == BinFault::Drop {
                FLAG_BIN_MISSING
            } else {
                0
            };
            m.arrive(&arrival(k as u64, 1_000_000 * k as u64 + 5_000_000, flags));
        }
        m.arrive(&arrival(17, 17_000_000, 0)); // a repeat, long settled
        m.arrive(&arrival(n as u64 + 3, 9_000_000_000, 0)); // a heartbeat
        let out = m.finish().unwrap();
        let never = (0..n).filter(|k| k % 333 == 0).count();
        assert_eq!(out.missed_slots, never);
        let dropped = (0..n).filter(|k| k % 50 == 49).count();
        let dropped_missing = (0..n).filter(|k| k % 50 == 49 && k % 333 == 0).count();
        assert_eq!(out.faults, dropped);
        assert_eq!(out.faults_flagged, dropped - dropped_missing);
        assert_eq!(out.unexpected_dropouts, 0);
        assert_eq!((out.extra, out.after_window, out.repeated), (1, 1, 0));
        let decoded = n - never - (dropped - dropped_missing);
        assert_eq!(out.recv_to_send.histogram.len(), decoded as u64);
        // Every packet left 5 ms after its slot: no jitter at all.
        assert_eq!(out.jitter.histogram.max(), 1);
        // Five one-second buckets, each with its exact order statistics.
        assert_eq!(out.recv_to_send.envelopes.len(), 5);
        let e = out.recv_to_send.envelopes[0];
        assert_eq!((e.t_s, e.median_us, e.max_us), (0.0, 13.0, 16.0));
    }

    /// The table streams one row per slot in seq order.
    #[test]
    fn the_table_has_one_row_per_slot_in_order() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("bins.csv");
        let mut m = BenchMeter::new(300, 100.0, FaultSchedule::default(), Some(&path)).unwrap();
        for k in (0..300u64).rev() {
            m.arrive(&arrival(k, 10_000_000 * k + 1_000_000, 0));
        }
        m.finish().unwrap();
        let text = std::fs::read_to_string(&path).unwrap();
        let seqs: Vec<usize> = text
            .lines()
            .skip(1)
            .map(|l| l.split(',').next().unwrap().parse().unwrap())
            .collect();
        assert_eq!(seqs, (0..300).collect::<Vec<_>>());
    }

    /// A run longer than two hours gets wider buckets, never more points.
    #[test]
    fn buckets_widen_past_two_hours() {
        let m = BenchMeter::new(3 * 3600 * 10, 10.0, FaultSchedule::default(), None).unwrap();
        assert_eq!(m.bucket_s, 2.0);
        let m = BenchMeter::new(2 * 3600 * 10, 10.0, FaultSchedule::default(), None).unwrap();
        assert_eq!(m.bucket_s, 1.0);
    }
}
