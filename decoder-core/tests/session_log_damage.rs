//! A session log damaged on a bad day reads as what it is: a torn tail is
//! a crash while the last batch was written (the records before it are
//! whole), a wrong length or checksum with records behind it is damage in
//! the middle, a log without an end record is a daemon that was killed,
//! and a file cut inside its header holds no session.

use decoder_core::BinWidth;
use decoder_core::engine::slot_engine::EngineSettings;
use decoder_core::formats::session_log::{
    LogEnd, LogHeader, LogReader, LogRecord, RecordKind, SessionLogError, encode_header,
    encode_record,
};

const OPENED: u64 = 5_000_000_000;

fn header() -> LogHeader {
    let w = BinWidth::from_us(20_000).unwrap();
    LogHeader {
        daemon_version: "test".into(),
        opened_ns: OPENED,
        opened_at: "2026-01-01T00:00:00Z".into(),
        n_channels: 2,
        bin_width: w,
        outputs: vec!["vel_x".into()],
        settings: EngineSettings {
            armed_at_start: false,
            ..decoder_core::sim::model::rig_settings()
        },
    }
}

/// A log of `n` event records and, when `closed`, an end record; returns
/// the bytes and the offset at which each record starts.
fn log(n: usize, closed: bool) -> (Vec<u8>, Vec<usize>) {
    let mut out = encode_header(&header());
    let mut starts = Vec::new();
    for i in 0..n {
        starts.push(out.len());
        let body = format!("{{\"event\":{i}}}");
        encode_record(
            &mut out,
            RecordKind::Event,
            OPENED + i as u64 * 1000,
            &[body.as_bytes()],
        );
    }
    if closed {
        starts.push(out.len());
        encode_record(
            &mut out,
            RecordKind::End,
            OPENED + n as u64 * 1000,
            &[b"{}"],
        );
    }
    (out, starts)
}

fn read_all(bytes: &[u8]) -> (usize, LogEnd) {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("s.vdlog");
    std::fs::write(&path, bytes).unwrap();
    let mut r = LogReader::open(&path).unwrap();
    let mut n = 0;
    while r.next_record().is_some() {
        n += 1;
    }
    (n, r.end().unwrap().clone())
}

#[test]
fn a_whole_log_reads_clean_and_one_without_its_end_record_unclosed() {
    assert_eq!(read_all(&log(20, true).0), (21, LogEnd::Clean));
    // A daemon killed with SIGKILL writes no end record.
    assert_eq!(read_all(&log(20, false).0), (20, LogEnd::Unclosed));
}

#[test]
fn a_last_record_cut_short_is_a_torn_tail_after_every_whole_record() {
    let (bytes, starts) = log(20, false);
    let cut = starts[19] + 7;
    let (n, end) = read_all(&bytes[..cut]);
    assert_eq!(n, 19);
    assert_eq!(
        end,
        LogEnd::TornTail {
            offset: starts[19] as u64,
            bytes: 7
        }
    );
    // Cut inside the record's body rather than its prefix.
    let (n, end) = read_all(&bytes[..bytes.len() - 3]);
    assert_eq!(n, 19);
    assert!(matches!(end, LogEnd::TornTail { .. }), "{end:?}");
}

#[test]
fn a_length_raised_past_the_end_in_the_middle_is_corruption_not_a_torn_tail() {
    let (mut bytes, starts) = log(20, true);
    let at = starts[5];
    let past_the_end = (bytes.len() as u32).to_le_bytes();
    bytes[at..at + 4].copy_from_slice(&past_the_end);
    let (n, end) = read_all(&bytes);
    assert_eq!(n, 5);
    match end {
        LogEnd::Corrupt {
            offset, problem, ..
        } => {
            assert_eq!(offset, at as u64);
            assert!(problem.contains("intact record follows"), "{problem}");
        }
        other => panic!("read as {other:?}"),
    }
}

#[test]
fn a_wrong_checksum_with_records_behind_it_is_corruption() {
    let (mut bytes, starts) = log(20, true);
    bytes[starts[7] + 12] ^= 0x40;
    let (n, end) = read_all(&bytes);
    assert_eq!(n, 7);
    assert!(
        matches!(&end, LogEnd::Corrupt { offset, .. } if *offset == starts[7] as u64),
        "{end:?}"
    );
}

#[test]
fn a_file_cut_inside_its_header_is_a_clear_error() {
    let (bytes, starts) = log(3, true);
    let dir = tempfile::tempdir().unwrap();
    for cut in [10, 20, starts[0] - 1] {
        let path = dir.path().join(format!("cut{cut}.vdlog"));
        std::fs::write(&path, &bytes[..cut]).unwrap();
        match LogReader::open(&path) {
            Err(e @ SessionLogError::CutInHeader { .. }) => {
                assert!(e.to_string().contains("ends inside its header"), "{e}");
            }
            Err(e) => panic!("cut at {cut}: {e}"),
            Ok(_) => panic!("cut at {cut}: opened"),
        }
    }
}

#[test]
fn records_read_back_as_written() {
    let (bytes, _) = log(3, true);
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("s.vdlog");
    std::fs::write(&path, bytes).unwrap();
    let mut r = LogReader::open(&path).unwrap();
    assert_eq!(
        r.next_record(),
        Some(LogRecord::Event {
            time_ns: OPENED,
            json: "{\"event\":0}".into()
        })
    );
}
