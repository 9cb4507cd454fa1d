//! Fuzzing that reaches past the magic: inputs are built valid and then
//! damaged in one field or byte, so the parsers' deeper paths run and the
//! assertions are about what was parsed, not only that nothing panicked.
//!
//! Case counts: `VDEC_FUZZ_CASES` (property cases, default 256) and
//! `VDEC_FUZZ_DATAGRAMS` (datagrams through the slot engine, default
//! 20 000). CI runs the defaults; BENCHMARKS.md has a long run.

use decoder_core::BinWidth;
use decoder_core::engine::slot_engine::{
    EngineEvent, EngineSettings, SlotAnswer, SlotEngine, SlotSink,
};
use decoder_core::formats::model_file::{ModelFile, ModelFileError};
use decoder_core::formats::session_log::{
    LogEnd, LogHeader, LogReader, LogRecord, RecordKind, encode_header, encode_record,
};
use decoder_core::sim::model::small_kalman;
use decoder_core::wire::packet::{self, BinHeader, RejectReason, VelocityPacket};
use proptest::prelude::*;
use rand::{RngExt, SeedableRng};

fn env_count(name: &str, default: u64) -> u64 {
    std::env::var(name)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

fn cases() -> u32 {
    env_count("VDEC_FUZZ_CASES", 256) as u32
}

const W: BinWidth = match BinWidth::from_us(20_000) {
    Ok(w) => w,
    Err(_) => panic!("20 ms"),
};

fn settings() -> EngineSettings {
    decoder_core::sim::model::rig_settings()
}

fn model() -> &'static ModelFile {
    static M: std::sync::OnceLock<ModelFile> = std::sync::OnceLock::new();
    M.get_or_init(|| small_kalman(4, 1, 0.5).0)
}

fn bin(seq: u64, channels: u16, bin_us: u32, counts: &[u16]) -> Vec<u8> {
    let mut out = Vec::new();
    packet::encode_bin(
        &BinHeader {
            channels,
            seq,
            origin_ns: 7,
            bin_us,
            flags: 0,
            kind: packet::BinKind::Counts,
        },
        counts,
        &mut out,
    );
    out
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(cases()))]

    /// A valid bin with one header field changed parses to exactly that
    /// change, or is refused with the reason that names the field.
    #[test]
    fn a_bin_with_one_field_changed_parses_to_that_field_or_names_it(
        seq in any::<u64>(),
        counts in prop::collection::vec(any::<u16>(), 1..64),
        field in 0usize..6,
        value in any::<u64>(),
    ) {
        let n = counts.len();
        let mut b = bin(seq, n as u16, 20_000, &counts);
        match field {
            0 => b[0] = b'X',                                           // magic
            1 => b[4..6].copy_from_slice(&(3 + value as u16 % 100).to_le_bytes()), // version (1 and 2 are read)
            2 => b[8..16].copy_from_slice(&value.to_le_bytes()),        // seq
            3 => b[6..8].copy_from_slice(&((n as u16).wrapping_add(1 + value as u16 % 50)).to_le_bytes()), // channels
            4 => b[24..28].copy_from_slice(&(value as u32 | 1).to_le_bytes()), // bin_us
            _ => { b.truncate(b.len() - 1 - (value as usize % n.max(1)).min(b.len() - 33)); } // length
        }
        let parsed = packet::parse_bin_for(&b, packet::BinKind::Counts, n, W);
        match field {
            2 => {
                let h = parsed.expect("a changed seq is still a valid bin");
                prop_assert_eq!(h.seq, value);
                let mut got = vec![0u16; n];
                packet::read_counts(&b, &mut got);
                prop_assert_eq!(got, counts);
            }
            // An odd width is never the model's 20 000 µs.
            4 => prop_assert!(matches!(parsed, Err(RejectReason::BinWidthMismatch { .. })), "{:?}", parsed),
            _ => prop_assert!(parsed.is_err(), "field {} accepted", field),
        }
    }

    /// A valid session log damaged at one byte: the records read are the
    /// original records up to the damage, unchanged, and the end says why
    /// reading stopped.
    #[test]
    fn a_log_damaged_at_one_byte_reads_the_records_before_it_unchanged(
        n in 2usize..30,
        at_frac in 0.0f64..1.0,
        xor in 1u8..=255,
        cut in any::<bool>(),
    ) {
        let (bytes, starts, originals) = valid_log(n);
        let first = starts[0];
        let at = first + ((bytes.len() - first) as f64 * at_frac) as usize % (bytes.len() - first);
        let mut damaged = bytes.clone();
        if cut {
            damaged.truncate(at);
        } else {
            damaged[at] ^= xor;
        }
        // One file per test thread, rewritten each case (a directory per
        // case would cost more than the read).
        let path = scratch_log();
        std::fs::write(&path, &damaged).unwrap();
        let mut r = LogReader::open(&path).unwrap();
        let mut read = Vec::new();
        while let Some(rec) = r.next_record() {
            read.push(rec);
        }
        // Every record wholly before the damage is read back unchanged.
        let intact = starts.iter().skip(1).chain(std::iter::once(&bytes.len()))
            .take_while(|&&end| end <= at).count();
        prop_assert!(read.len() >= intact, "read {} of {} intact", read.len(), intact);
        for (got, want) in read.iter().zip(&originals).take(intact) {
            prop_assert_eq!(got, want);
        }
        match r.end().unwrap() {
            LogEnd::Clean => prop_assert!(!cut && read.len() == originals.len()),
            LogEnd::Unclosed => prop_assert!(cut),
            LogEnd::TornTail { .. } => prop_assert!(cut || at >= starts[starts.len() - 1]),
            LogEnd::Corrupt { offset, .. } => prop_assert!(*offset as usize <= at),
        }
    }

    /// A valid model file whose payload has one byte changed and its
    /// checksum re-sealed: refused with a reason, or decoded into a model
    /// that passes its own check — never a panic, never an unchecked model.
    #[test]
    fn a_model_payload_changed_and_resealed_is_refused_or_checked(
        at_frac in 0.0f64..1.0,
        xor in 1u8..=255,
    ) {
        let good = model().to_bytes();
        let mut b = good.clone();
        let at = 24 + ((b.len() - 24) as f64 * at_frac) as usize % (b.len() - 24);
        b[at] ^= xor;
        let crc = crc32fast::hash(&b[24..]);
        b[20..24].copy_from_slice(&crc.to_le_bytes());
        match ModelFile::from_bytes(&b, "m") {
            Ok(m) => prop_assert!(m.decoder.validate().is_ok()),
            Err(e) => prop_assert!(
                matches!(e, ModelFileError::Decode { .. } | ModelFileError::Invalid { .. }),
                "{}", e
            ),
        }
    }
}

/// This thread's scratch log file, in a directory removed at exit.
fn scratch_log() -> std::path::PathBuf {
    static DIR: std::sync::OnceLock<tempfile::TempDir> = std::sync::OnceLock::new();
    let dir = DIR.get_or_init(|| tempfile::tempdir().unwrap());
    dir.path()
        .join(format!("{:?}.vdlog", std::thread::current().id()).replace(['(', ')'], ""))
}

/// A session log of `n` records of several kinds and an end record:
/// (bytes, the offset of each record, the records).
fn valid_log(n: usize) -> (Vec<u8>, Vec<usize>, Vec<LogRecord>) {
    let header = LogHeader {
        daemon_version: "fuzz".into(),
        opened_ns: 1_000,
        opened_at: "2026-01-01T00:00:00Z".into(),
        n_channels: 4,
        bin_width: W,
        outputs: vec!["vel_x".into(), "vel_y".into()],
        settings: settings(),
    };
    let mut out = encode_header(&header);
    let mut starts = Vec::new();
    let mut records = Vec::new();
    for i in 0..n {
        starts.push(out.len());
        let t = 1_000 + i as u64 * 20_000_000;
        let d = bin(i as u64, 4, 20_000, &[i as u16, 1, 2, 3]);
        encode_record(&mut out, RecordKind::Datagram, t, &[&d]);
        records.push(LogRecord::Datagram {
            recv_ns: t,
            bytes: d,
        });
    }
    starts.push(out.len());
    let t = 1_000 + n as u64 * 20_000_000;
    encode_record(&mut out, RecordKind::End, t, &[b"{}"]);
    records.push(LogRecord::End {
        time_ns: t,
        json: "{}".into(),
    });
    (out, starts, records)
}

struct Limits {
    last: Option<u64>,
    answered: u64,
}

impl SlotSink for Limits {
    fn answer(&mut self, packet: &mut [u8], slot: &SlotAnswer) {
        let p = VelocityPacket::parse(packet).expect("the engine encodes valid packets");
        assert!(
            p.command.iter().chain(&p.estimate).all(|v| v.is_finite()),
            "{p:?}"
        );
        let speed = p.command.iter().map(|c| c * c).sum::<f64>().sqrt();
        assert!(speed <= 50.0 + 1e-9, "speed {speed}");
        assert_ne!(
            self.last,
            Some(slot.seq),
            "slot {} answered twice",
            slot.seq
        );
        self.last = Some(slot.seq);
        self.answered += 1;
    }
    fn event(&mut self, _: &EngineEvent) {}
}

/// A seeded stream of near-valid datagrams (in order, reordered, dropped,
/// duplicated, far jumps, wrong widths or channel counts, truncated,
/// bit-flipped, huge counts) with jittered, bursty and stalled arrival
/// times through the slot engine: no panic, every datagram accounted for
/// once, every packet finite and within the speed limit.
#[test]
fn a_long_seeded_stream_of_damaged_datagrams_keeps_every_invariant() {
    let n = env_count("VDEC_FUZZ_DATAGRAMS", 20_000);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(0x0F0220);
    let mut e = SlotEngine::new(settings(), model().pipeline().unwrap());
    let mut sink = Limits {
        last: None,
        answered: 0,
    };
    let mut t = 1_000_000_000u64;
    let mut seq = 0u64;
    let mut counts = [0u16; 4];
    for _ in 0..n {
        let roll: f64 = rng.random();
        t += match rng.random_range(0..100) {
            0 => rng.random_range(0..2_000_000_000), // a stall
            1..=10 => 0,                             // a burst
            _ => rng.random_range(15_000_000..25_000_000),
        };
        seq = match rng.random_range(0..200) {
            0 => seq.wrapping_add(rng.random_range(100..100_000)),
            1 => seq.wrapping_sub(rng.random_range(1..50)),
            2..=9 => seq.wrapping_add(rng.random_range(2..6)),
            10..=14 => seq, // a duplicate
            15 => rng.random(),
            _ => seq.wrapping_add(1),
        };
        for c in &mut counts {
            *c = if roll < 0.001 {
                u16::MAX
            } else {
                rng.random_range(0..8)
            };
        }
        let mut d = bin(seq, 4, 20_000, &counts);
        match rng.random_range(0..100) {
            0 => d[24..28].copy_from_slice(&10_000u32.to_le_bytes()),
            1 => d = bin(seq, 5, 20_000, &[1, 2, 3, 4, 5]),
            2 => d.truncate(rng.random_range(0..d.len())),
            3 => {
                let at = rng.random_range(0..d.len());
                d[at] ^= 1 << rng.random_range(0..8);
            }
            _ => {}
        }
        e.on_datagram(t, &d, &mut sink);
        if rng.random_range(0..4) == 0 {
            e.on_timeout(t + rng.random_range(0..40_000_000), &mut sink);
        }
    }
    let c = e.counters();
    assert_eq!(
        c.datagrams,
        c.bins_decoded
            + c.rejected
            + c.bins_duplicate
            + c.bins_late
            + c.bins_stray
            + c.bins_flushed
            + e.pending_bins() as u64,
        "{c:?}"
    );
    assert_eq!(c.slots_answered, c.bins_decoded + c.bins_missing, "{c:?}");
    assert_eq!(sink.answered, c.slots_answered);
    assert_eq!(c.datagrams, n);
}
