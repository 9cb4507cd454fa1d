//! Property tests for everything that reads bytes from outside: the bin
//! packet parser, the slot engine fed arbitrary datagrams, the velocity
//! packet parser and the session log reader. Each returns a value or a
//! typed error for any input; none panics.

use decoder_core::engine::slot_engine::{
    EngineEvent, EngineSettings, SlotAnswer, SlotEngine, SlotSink,
};
use decoder_core::formats::model_file::ModelFile;
use decoder_core::formats::session_log::LogReader;
use decoder_core::sim::model::small_kalman;
use decoder_core::wire::packet::{self, BinHeader, VelocityPacket};
use proptest::prelude::*;

fn engine() -> SlotEngine {
    static MODEL: std::sync::OnceLock<ModelFile> = std::sync::OnceLock::new();
    let m = MODEL.get_or_init(model);
    SlotEngine::new(settings(), m.pipeline().unwrap())
}

fn model() -> ModelFile {
    small_kalman(4, 1, 0.5).0
}

fn settings() -> EngineSettings {
    decoder_core::sim::model::rig_settings()
}

struct Check {
    last: Option<u64>,
}

impl SlotSink for Check {
    fn answer(&mut self, packet: &mut [u8], slot: &SlotAnswer) {
        let p = VelocityPacket::parse(packet).unwrap();
        assert!(p.command.iter().all(|c| c.is_finite()));
        assert!(p.command.iter().map(|c| c * c).sum::<f64>().sqrt() <= 50.0 + 1e-9);
        assert_ne!(self.last, Some(slot.seq), "slot answered twice");
        self.last = Some(slot.seq);
    }
    fn event(&mut self, _event: &EngineEvent) {}
}

/// A datagram that is valid for the engine's model except where `damage`
/// says, so the engine's deeper paths get exercised, not only the header
/// checks.
fn near_valid() -> impl Strategy<Value = Vec<u8>> {
    (
        0u64..40,
        prop::collection::vec(0u16..30, 4),
        prop::option::of((0usize..40, any::<u8>())),
        prop::option::of(0usize..40),
    )
        .prop_map(|(seq, counts, damage, cut)| {
            let mut out = Vec::new();
            packet::encode_bin(
                &BinHeader {
                    channels: 4,
                    seq,
                    origin_ns: 0,
                    bin_us: 20_000,
                    flags: 0,
                    kind: decoder_core::wire::packet::BinKind::Counts,
                },
                &counts,
                &mut out,
            );
            if let Some((at, b)) = damage {
                let at = at % out.len();
                out[at] = b;
            }
            if let Some(c) = cut {
                out.truncate(c.min(out.len()));
            }
            out
        })
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(512))]

    #[test]
    fn bin_parser_never_panics(bytes in prop::collection::vec(any::<u8>(), 0..200)) {
        match packet::parse_bin(&bytes) {
            Ok(h) => {
                prop_assert_eq!(bytes.len(), 32 + 2 * h.channels as usize);
                let mut counts = vec![0u16; h.channels as usize];
                packet::read_counts(&bytes, &mut counts);
            }
            Err(r) => prop_assert!(!r.to_string().is_empty()),
        }
    }

    #[test]
    fn velocity_parser_never_panics(bytes in prop::collection::vec(any::<u8>(), 0..200)) {
        let _ = VelocityPacket::parse(&bytes);
    }

    #[test]
    fn engine_survives_any_datagram_sequence(
        datagrams in prop::collection::vec(
            prop_oneof![near_valid(), prop::collection::vec(any::<u8>(), 0..64)],
            1..60,
        ),
        gaps in prop::collection::vec(0u64..60_000_000, 60),
    ) {
        let mut e = engine();
        let mut sink = Check { last: None };
        let mut t = 1_000_000_000u64;
        for (i, d) in datagrams.iter().enumerate() {
            t += gaps[i % gaps.len()];
            e.on_datagram(t, d, &mut sink);
            e.on_timeout(t + 1, &mut sink);
        }
        let c = e.counters();
        // Every datagram is accounted for exactly once.
        prop_assert_eq!(
            c.datagrams,
            c.bins_decoded + c.rejected + c.bins_duplicate + c.bins_late + c.bins_stray
                + c.bins_flushed + e.pending_bins() as u64
        );
        prop_assert_eq!(c.slots_answered, c.bins_decoded + c.bins_missing);
    }

    #[test]
    fn log_reader_never_panics(tail in prop::collection::vec(any::<u8>(), 0..300)) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("x.vdlog");
        let mut bytes = b"VDECSLOG".to_vec();
        bytes.extend_from_slice(&tail);
        std::fs::write(&path, &bytes).unwrap();
        if let Ok(mut r) = LogReader::open(&path) {
            while r.next_record().is_some() {}
            prop_assert!(r.end().is_some());
        }
    }
}
