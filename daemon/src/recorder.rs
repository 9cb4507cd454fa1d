//! Recording: the real-time loop encodes records into pooled buffers and
//! hands them to a writer thread over a bounded crossbeam channel, so a slow
//! or full disk never blocks decoding.
//!
//! Accounting is exact: a record is *accepted* when its batch is handed to
//! the writer, *written* when the writer has put it in the file, and *lost*
//! when there was no free buffer, the channel was full, or the disk failed.
//! At a clean stop accepted equals written. Records lost before the writer
//! had trouble are marked in the log with a Lost record; after a write error
//! the writer stops touching the file (a half-written record would make the
//! rest unreadable), raises the alarm and counts everything after as lost,
//! and the log reads up to the failure.

use std::fs::File;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::thread::JoinHandle;
use std::time::Duration;

use crossbeam_channel::{Receiver, Sender, TrySendError};
use decoder_core::formats::session_log::{self, RecordKind};
use serde::{Deserialize, Serialize};

/// A destination for the log: a file, or a test double.
pub trait LogDestination: Write + Send + 'static {
    /// Makes what was written durable.
    fn sync(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}

impl LogDestination for File {
    fn sync(&mut self) -> std::io::Result<()> {
        self.sync_data()
    }
}

#[derive(Debug, Default)]
pub struct RecorderStats {
    pub accepted: AtomicU64,
    pub written: AtomicU64,
    pub lost: AtomicU64,
    pub bytes: AtomicU64,
    /// Set by the writer when the disk fails; shown in status and logs.
    pub alarm: Mutex<Option<String>>,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct RecorderSnapshot {
    pub path: Option<String>,
    pub records_accepted: u64,
    pub records_written: u64,
    pub records_lost: u64,
    pub bytes_written: u64,
    pub alarm: Option<String>,
}

impl RecorderStats {
    pub fn snapshot(&self, path: Option<&Path>) -> RecorderSnapshot {
        RecorderSnapshot {
            path: path.map(|p| p.display().to_string()),
            records_accepted: self.accepted.load(Ordering::Relaxed),
            records_written: self.written.load(Ordering::Relaxed),
            records_lost: self.lost.load(Ordering::Relaxed),
            bytes_written: self.bytes.load(Ordering::Relaxed),
            alarm: self.alarm.lock().map(|a| a.clone()).unwrap_or(None),
        }
    }
}

enum ToWriter {
    /// A pooled buffer, returned to the pool once written.
    Pooled { buf: Vec<u8>, records: u64 },
    /// A one-off record (a model file): its prefix and its body, written
    /// back to back so a large body is never copied.
    Owned {
        prefix: Vec<u8>,
        body: Vec<u8>,
        records: u64,
    },
}

/// The real-time side: encodes records without allocating.
pub struct RecordBatcher {
    free: Receiver<Vec<u8>>,
    to_writer: Option<Sender<ToWriter>>,
    current: Option<Vec<u8>>,
    current_records: u64,
    stats: Arc<RecorderStats>,
}

impl RecordBatcher {
    /// Appends one record to the current batch; counts it lost when no
    /// buffer is free.
    pub fn record(&mut self, kind: RecordKind, time_ns: u64, parts: &[&[u8]]) {
        let needed = session_log::record_len(parts.iter().map(|p| p.len()).sum());
        // A full batch goes now rather than growing its buffer: a burst of
        // slots after a stall must not allocate. (Only a record bigger than
        // a whole buffer — an oversized junk datagram — grows one.)
        if let Some(buf) = self.current.as_ref() {
            if !buf.is_empty() && buf.len() + needed > buf.capacity() {
                self.flush();
            }
        }
        if self.current.is_none() {
            self.current = self.free.try_recv().ok();
        }
        match self.current.as_mut() {
            Some(buf) => {
                session_log::encode_record(buf, kind, time_ns, parts);
                self.current_records += 1;
            }
            None => {
                self.stats.lost.fetch_add(1, Ordering::Relaxed);
            }
        }
    }

    /// Hands the current batch to the writer (end of a loop iteration).
    pub fn flush(&mut self) {
        if self.current_records == 0 {
            return;
        }
        let Some(buf) = self.current.take() else {
            return;
        };
        let records = std::mem::take(&mut self.current_records);
        let Some(tx) = self.to_writer.as_ref() else {
            return;
        };
        match tx.try_send(ToWriter::Pooled { buf, records }) {
            Ok(()) => {
                self.stats.accepted.fetch_add(records, Ordering::Relaxed);
            }
            Err(TrySendError::Full(ToWriter::Pooled { mut buf, .. }))
            | Err(TrySendError::Disconnected(ToWriter::Pooled { mut buf, .. })) => {
                self.stats.lost.fetch_add(records, Ordering::Relaxed);
                buf.clear();
                self.current = Some(buf);
            }
            Err(_) => {}
        }
    }

    /// Records a large one-off body (a model file, the end summary) in
    /// order with the rest. Allocates a little; used at start, at model
    /// loads and at the end, never per bin.
    pub fn record_owned(&mut self, kind: RecordKind, time_ns: u64, body: Vec<u8>) {
        self.flush();
        let prefix = session_log::encode_record_prefix(kind, time_ns, &body);
        let Some(tx) = self.to_writer.as_ref() else {
            return;
        };
        // A model record must not be dropped for want of room: wait for it.
        let message = ToWriter::Owned {
            prefix,
            body,
            records: 1,
        };
        match tx.send(message) {
            Ok(()) => self.stats.accepted.fetch_add(1, Ordering::Relaxed),
            Err(_) => self.stats.lost.fetch_add(1, Ordering::Relaxed),
        };
    }

    /// Ends the recording: closes the channel so the writer drains, syncs
    /// and exits.
    pub fn close(&mut self) {
        self.flush();
        self.to_writer = None;
    }
}

/// The writer thread and its shared counters.
pub struct Recorder {
    pub path: PathBuf,
    pub stats: Arc<RecorderStats>,
    thread: Option<JoinHandle<()>>,
}

impl Recorder {
    /// Creates `path` (never overwriting an existing file), writes `header`
    /// and starts the writer. `pool` buffers of `buffer_capacity` bytes are
    /// allocated now, none later.
    pub fn create(
        path: &Path,
        header: &[u8],
        pool: usize,
        buffer_capacity: usize,
    ) -> std::io::Result<(Recorder, RecordBatcher)> {
        let file = File::options().write(true).create_new(true).open(path)?;
        Self::start(file, path, header, pool, buffer_capacity)
    }

    pub fn start<W: LogDestination>(
        out: W,
        path: &Path,
        header: &[u8],
        pool: usize,
        buffer_capacity: usize,
    ) -> std::io::Result<(Recorder, RecordBatcher)> {
        // No user-space buffer: a batch counts as written once the kernel has
        // it, so the counters never claim what a later flush could lose.
        let mut out = out;
        out.write_all(header)?;
        out.flush()?;
        let stats = Arc::new(RecorderStats::default());
        stats.bytes.store(header.len() as u64, Ordering::Relaxed);
        let (free_tx, free_rx) = crossbeam_channel::bounded(pool);
        for _ in 0..pool {
            free_tx
                .send(Vec::with_capacity(buffer_capacity))
                .expect("pool channel has room");
        }
        let (tx, rx) = crossbeam_channel::bounded(pool);
        let thread_stats = stats.clone();
        let thread = std::thread::Builder::new()
            .name("decoderd-recorder".into())
            .spawn(move || writer_loop(out, rx, free_tx, thread_stats))?;
        Ok((
            Recorder {
                path: path.to_path_buf(),
                stats: stats.clone(),
                thread: Some(thread),
            },
            RecordBatcher {
                free: free_rx,
                to_writer: Some(tx),
                current: None,
                current_records: 0,
                stats,
            },
        ))
    }

    /// Waits for the writer to drain and sync (after the batcher closed).
    pub fn join(mut self) {
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

fn writer_loop<W: LogDestination>(
    mut out: W,
    rx: Receiver<ToWriter>,
    free: Sender<Vec<u8>>,
    stats: Arc<RecorderStats>,
) {
    let mut failed = false;
    let mut lost_marked = 0u64;
    let mut dirty = false;
    let mut marker = Vec::with_capacity(64);
    let fail = |failed: &mut bool, what: &str, e: std::io::Error| {
        *failed = true;
        let msg = format!(
            "recording stopped: {what} failed ({e}); decoding continues, later records are counted as lost"
        );
        tracing::error!(target: "decoderd::recorder", "{msg}");
        if let Ok(mut a) = stats.alarm.lock() {
            *a = Some(msg);
        }
    };
    loop {
        let msg = match rx.recv_timeout(Duration::from_millis(100)) {
            Ok(m) => m,
            Err(crossbeam_channel::RecvTimeoutError::Timeout) => {
                if dirty && !failed {
                    if let Err(e) = out.flush() {
                        fail(&mut failed, "flushing the session log", e);
                    }
                    dirty = false;
                }
                continue;
            }
            Err(crossbeam_channel::RecvTimeoutError::Disconnected) => break,
        };
        let (buf, body, records, pooled) = match msg {
            ToWriter::Pooled { buf, records } => (buf, Vec::new(), records, true),
            ToWriter::Owned {
                prefix,
                body,
                records,
            } => (prefix, body, records, false),
        };
        if failed {
            stats.lost.fetch_add(records, Ordering::Relaxed);
        } else {
            let lost_now = stats.lost.load(Ordering::Relaxed);
            if lost_now > lost_marked {
                marker.clear();
                let delta = (lost_now - lost_marked).to_le_bytes();
                session_log::encode_record(&mut marker, RecordKind::Lost, 0, &[&delta]);
                lost_marked = lost_now;
                if let Err(e) = out.write_all(&marker) {
                    fail(&mut failed, "writing the session log", e);
                }
            }
            if !failed {
                match out.write_all(&buf).and_then(|()| out.write_all(&body)) {
                    Ok(()) => {
                        stats.written.fetch_add(records, Ordering::Relaxed);
                        stats
                            .bytes
                            .fetch_add((buf.len() + body.len()) as u64, Ordering::Relaxed);
                        dirty = true;
                    }
                    Err(e) => {
                        stats.lost.fetch_add(records, Ordering::Relaxed);
                        fail(&mut failed, "writing the session log", e);
                    }
                }
            } else {
                stats.lost.fetch_add(records, Ordering::Relaxed);
            }
        }
        if pooled {
            let mut buf = buf;
            buf.clear();
            let _ = free.try_send(buf);
        }
    }
    if !failed {
        if let Err(e) = out.flush().and_then(|()| out.sync()) {
            fail(&mut failed, "syncing the session log", e);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use decoder_core::formats::session_log::{
        LogEnd, LogHeader, LogReader, LogRecord, encode_header,
    };

    /// A destination that takes `room` bytes and then fails like a full disk.
    struct FillsUp {
        room: usize,
        data: Arc<Mutex<Vec<u8>>>,
    }

    impl Write for FillsUp {
        fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
            if self.room == 0 {
                return Err(std::io::Error::from_raw_os_error(libc::ENOSPC));
            }
            let n = buf.len().min(self.room);
            self.room -= n;
            self.data.lock().unwrap().extend_from_slice(&buf[..n]);
            Ok(n)
        }
        fn flush(&mut self) -> std::io::Result<()> {
            Ok(())
        }
    }

    impl LogDestination for FillsUp {}

    fn header() -> Vec<u8> {
        let settings = decoder_core::engine::slot_engine::EngineSettings {
            bin_width: decoder_core::BinWidth::from_us(1_000).unwrap(),
            deadline_slack_ns: 500_000,
            reorder_window: 8,
            clock_tracking: 0.0,
            limits: decoder_core::engine::supervisor::SafetyLimits {
                max_speed: 1.0,
                max_accel: 1.0,
                max_coast_bins: 5,
                coast_decay: 0.5,
                bin_width: decoder_core::BinWidth::from_us(1_000).unwrap(),
            },
            armed_at_start: false,
            dead_channel_bins: 100,
            saturation_count: 2,
            click_gate: Default::default(),
            drift: Default::default(),
        };
        encode_header(&LogHeader {
            daemon_version: "test".into(),
            opened_ns: 0,
            opened_at: String::new(),
            n_channels: 1,
            bin_width: decoder_core::BinWidth::from_us(1000).unwrap(),
            outputs: vec!["vel_x".into()],
            settings,
        })
    }

    /// Waits until `total` records are written or lost; a writer that
    /// has not got there in 5 s fails the test rather than passing it.
    fn wait_for(stats: &RecorderStats, total: u64) {
        for _ in 0..2500 {
            let done = stats.written.load(Ordering::Relaxed) + stats.lost.load(Ordering::Relaxed);
            if done >= total {
                return;
            }
            std::thread::sleep(Duration::from_millis(2));
        }
        panic!("the writer has not handled {total} records within 5 s");
    }

    #[test]
    fn accepted_equals_written_and_the_log_reads_back() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("a.vdlog");
        let (rec, mut b) = Recorder::create(&path, &header(), 16, 256).unwrap();
        for i in 0..1000u64 {
            b.record(RecordKind::Datagram, i, &[&i.to_le_bytes()]);
            b.flush();
            // Never more in flight than the 16-batch buffer holds, so no
            // record may be lost.
            if i % 8 == 7 {
                wait_for(&rec.stats, i + 1);
            }
        }
        b.record_owned(RecordKind::End, 1000, b"{}".to_vec());
        b.close();
        let stats = rec.stats.clone();
        rec.join();
        let s = stats.snapshot(None);
        assert_eq!(s.records_accepted, s.records_written);
        assert_eq!((s.records_written, s.records_lost), (1001, 0));
        let mut r = LogReader::open(&path).unwrap();
        let mut n = 0;
        while let Some(rec) = r.next_record() {
            if matches!(rec, LogRecord::Datagram { .. }) {
                n += 1;
            }
        }
        assert_eq!(r.end(), Some(&LogEnd::Clean));
        assert_eq!(n + s.records_lost, 1000);
    }

    #[test]
    fn a_full_disk_raises_the_alarm_and_counts_losses_without_blocking() {
        let data = Arc::new(Mutex::new(Vec::new()));
        let h = header();
        let room = h.len() + 40 * 25 + 7; // 40 records fit, the 41st tears
        let dest = FillsUp {
            room,
            data: data.clone(),
        };
        let (rec, mut b) = Recorder::start(dest, Path::new("full"), &h, 8, 64).unwrap();
        let started = std::time::Instant::now();
        for i in 0..10_000u64 {
            b.record(RecordKind::Datagram, i, &[&i.to_le_bytes()]);
            b.flush();
            // Pace the first hundred so the disk fills; then flood.
            if i < 100 {
                wait_for(&rec.stats, i + 1);
            }
        }
        // The real-time side never waited on the writer.
        assert!(started.elapsed() < Duration::from_secs(5));
        b.close();
        let stats = rec.stats.clone();
        rec.join();
        let s = stats.snapshot(None);
        assert!(
            s.alarm
                .as_deref()
                .unwrap_or("")
                .contains("recording stopped"),
            "{s:?}"
        );
        assert_eq!(s.records_written + s.records_lost, 10_000);
        assert!(s.records_lost > 0);
        // What reached the "disk" reads up to the tear.
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("torn.vdlog");
        std::fs::write(&path, &*data.lock().unwrap()).unwrap();
        let mut r = LogReader::open(&path).unwrap();
        let mut n = 0u64;
        while let Some(rec) = r.next_record() {
            if matches!(rec, LogRecord::Datagram { .. }) {
                n += 1;
            }
        }
        assert!(
            matches!(r.end(), Some(LogEnd::TornTail { .. })),
            "{:?}",
            r.end()
        );
        assert!(n <= s.records_written);
        assert!(n >= 30, "{n} datagram records readable");
    }
}
