//! The slot engine's replay of a session taken from records in memory —
//! no file, no reader: a session driven through one engine with bins,
//! gaps and an operator halt, written down as the daemon's recorder would,
//! then replayed through a fresh engine from that list. Every replayed
//! packet equals the recorded one byte for byte.

use decoder_core::engine::session_replay::{
    SessionRecord, SessionReplay, SessionReplayError, replay_records,
};
use decoder_core::engine::slot_engine::{
    EngineEvent, OperatorCommand, SlotAnswer, SlotEngine, SlotSink,
};
use decoder_core::sim::model::{rig_settings, small_kalman};
use decoder_core::wire::packet;

/// What the daemon's recorder keeps, owned.
enum Recorded {
    Model(Vec<u8>),
    Datagram(u64, Vec<u8>),
    Operator(OperatorCommand),
    Sent(u64, Vec<u8>),
}

#[derive(Default)]
struct Recorder(Vec<Recorded>);

impl SlotSink for Recorder {
    fn answer(&mut self, bytes: &mut [u8], slot: &SlotAnswer) {
        self.0.push(Recorded::Sent(slot.decided_ns, bytes.to_vec()));
    }
    fn event(&mut self, _event: &EngineEvent) {}
}

fn as_record(r: &Recorded) -> SessionRecord<'_> {
    match r {
        Recorded::Model(m) => SessionRecord::Model { model_file: m },
        Recorded::Datagram(t, b) => SessionRecord::Datagram {
            recv_ns: *t,
            bytes: b,
        },
        Recorded::Operator(c) => SessionRecord::Operator { command: *c },
        Recorded::Sent(t, b) => SessionRecord::Sent {
            decided_ns: *t,
            packet: b,
        },
    }
}

#[test]
fn a_session_in_memory_replays_byte_for_byte() {
    let (model, block) = small_kalman(12, 4, 0.05);
    let settings = rig_settings();
    let bin_ns = settings.bin_width.ns();
    let mut engine = SlotEngine::new(settings.clone(), model.pipeline().unwrap());
    let mut rec = Recorder::default();
    rec.0.push(Recorded::Model(model.to_bytes()));
    let t0 = 5_000_000_000u64;
    for k in 0..block.n_bins as u64 {
        let now = t0 + k * bin_ns;
        // Bins 20..23 never come: their slots are answered at the deadline.
        if (20..23).contains(&k) {
            engine.on_timeout(now + bin_ns / 2 + 1, &mut rec);
            continue;
        }
        if k == 60 {
            rec.0.push(Recorded::Operator(OperatorCommand::Halt));
            let _ = engine.operator(OperatorCommand::Halt, &mut rec);
        }
        let mut bytes = packet::bin_datagram(block.bin_counts(k as usize), block.bin_width.us());
        bytes[8..16].copy_from_slice(&k.to_le_bytes());
        rec.0.push(Recorded::Datagram(now, bytes.clone()));
        engine.on_datagram(now, &bytes, &mut rec);
    }
    let sent = rec
        .0
        .iter()
        .filter(|r| matches!(r, Recorded::Sent(..)))
        .count();
    assert_eq!(sent, block.n_bins, "one packet a slot");

    let (mut equal, mut compared) = (0, 0);
    let counts = replay_records(
        SessionReplay::new(settings),
        rec.0
            .iter()
            .enumerate()
            .map(|(i, r)| (i as u64, as_record(r))),
        |bytes| {
            decoder_core::ModelFile::from_bytes(bytes, "the model record")
                .map_err(|e| e.to_string())?
                .pipeline()
                .map_err(|e| e.to_string())
        },
        |slot| {
            compared += 1;
            equal += usize::from(slot.recorded == Some(slot.replayed));
        },
    )
    .unwrap();
    assert_eq!(compared, block.n_bins);
    assert_eq!(equal, compared, "replayed packets differ from the recorded");
    assert_eq!(counts.datagrams as usize, block.n_bins - 3);
    assert_eq!(counts.operator_commands, 1);
    assert_eq!(counts.model_loads, 1);
}

#[test]
fn a_session_without_a_model_record_is_refused() {
    let (_, block) = small_kalman(12, 4, 0.05);
    let bytes = packet::bin_datagram(block.bin_counts(0), block.bin_width.us());
    let records = [(
        0u64,
        SessionRecord::Datagram {
            recv_ns: 1,
            bytes: &bytes,
        },
    )];
    let e = replay_records(
        SessionReplay::new(rig_settings()),
        records,
        |_| -> Result<_, String> { unreachable!("no model record") },
        |_| {},
    )
    .unwrap_err();
    assert!(matches!(e, SessionReplayError::NoModel), "{e}");
}
