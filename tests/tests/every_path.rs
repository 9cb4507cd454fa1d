//! One simulated recording through every path a bin can take to an
//! estimate, compared bit for bit: the block in memory, the block read
//! from disk a few rows at a time, the slot engine driven with the bins'
//! times as data, a live daemon fed on the bin clock, the offline replay of
//! the log that daemon recorded, and the replay of that log's export. The
//! per-bin arithmetic is one piece of code; this test holds every way in
//! to it.

use std::net::UdpSocket;
use std::time::Duration;

use daemon_rig::{ActuatorSink, BinFault, Launch, paced_send};
use decoder_core::engine::slot_engine::{EngineEvent, SlotAnswer, SlotEngine, SlotSink};
use decoder_core::formats::block_rows::BlockFiles;
use decoder_core::formats::log_block::export_log;
use decoder_core::formats::log_replay::replay_log;
use decoder_core::formats::session_log::LogReader;
use decoder_core::session::replay::{replay_block, replay_rows};
use decoder_core::sim::model::{rig_settings, small_kalman};
use decoder_core::wire::packet::{self, FLAG_BIN_MISSING, VelocityPacket};

/// Estimates from velocity packets, slot after slot.
fn estimates(packets: &[VelocityPacket]) -> Vec<f64> {
    packets.iter().flat_map(|p| p.estimate.clone()).collect()
}

/// Equal bits, element by element (f64 `==` would let -0.0 pass for 0.0).
fn assert_same_bits(what: &str, got: &[f64], want: &[f64]) {
    assert_eq!(got.len(), want.len(), "{what}: length");
    for (i, (g, w)) in got.iter().zip(want).enumerate() {
        assert_eq!(g.to_bits(), w.to_bits(), "{what}: value {i}: {g} != {w}");
    }
}

/// Collects the slot engine's packets.
#[derive(Default)]
struct Packets(Vec<VelocityPacket>);

impl SlotSink for Packets {
    fn answer(&mut self, packet: &mut [u8], _slot: &SlotAnswer) {
        self.0
            .push(VelocityPacket::parse(packet).expect("the engine encodes"));
    }
    fn event(&mut self, _event: &EngineEvent) {}
}

#[test]
fn one_recording_gives_the_same_bits_on_every_path() {
    let (model, block) = small_kalman(16, 21, 0.05);
    let n = block.n_bins;
    let d = model.decoder.outputs().len();
    let dir = tempfile::tempdir().unwrap();

    // The block in memory: the reference for every other path.
    let (in_memory, faults) = replay_block(&mut model.pipeline().unwrap(), &block).unwrap();
    assert_eq!(faults, 0);
    assert_eq!(in_memory.len(), n * d);

    // The block from disk, 7 rows at a time (every chunk edge crossed).
    let on_disk = dir.path().join("block");
    block.write(&on_disk).unwrap();
    let mut from_disk = Vec::new();
    replay_rows(
        &BlockFiles::open_with_chunk(&on_disk, 7).unwrap(),
        &on_disk,
        &mut model.pipeline().unwrap(),
        &[],
        |est| {
            from_disk.extend_from_slice(est);
            Ok(())
        },
    )
    .unwrap();
    assert_same_bits("rows read in chunks", &from_disk, &in_memory);

    // The slot engine with the bins' times as data: bin k read at exactly
    // its slot's time, so each is decoded in its slot.
    let settings = rig_settings();
    let bin_ns = settings.bin_width.ns();
    let mut engine = SlotEngine::new(settings, model.pipeline().unwrap());
    let mut sink = Packets::default();
    let datagrams: Vec<Vec<u8>> = (0..n)
        .map(|k| packet::bin_datagram(block.bin_counts(k), block.bin_width.us()))
        .collect();
    let t0 = 1_000_000_000u64;
    for (k, bytes) in datagrams.iter().enumerate() {
        let mut with_seq = bytes.clone();
        with_seq[8..16].copy_from_slice(&(k as u64).to_le_bytes());
        engine.on_datagram(t0 + k as u64 * bin_ns, &with_seq, &mut sink);
    }
    assert_eq!(sink.0.len(), n);
    assert!(sink.0.iter().all(|p| p.flags & FLAG_BIN_MISSING == 0));
    assert_same_bits("slot engine", &estimates(&sink.0), &in_memory);

    // A live daemon on loopback, fed on the bin clock, recording.
    let model_path = dir.path().join("k.model");
    std::fs::write(&model_path, model.to_bytes()).unwrap();
    let actuator = ActuatorSink::on_loopback().unwrap();
    let daemon = Launch::new(&model_path, &dir.path().join("daemon"), actuator.addr)
        .extra_toml("[timing]\ndeadline_slack_bins = 4.0\n")
        .arm(true)
        .record(true)
        .start()
        .unwrap();
    let sender = UdpSocket::bind("127.0.0.1:0").unwrap();
    paced_send(&sender, daemon.listen, &datagrams, n, 50.0, |_| {
        BinFault::None
    });
    actuator
        .wait_for_seq(n as u64 - 1, Duration::from_secs(20))
        .unwrap();
    let stopped = daemon.stop().unwrap();
    let live: Vec<VelocityPacket> = actuator
        .finish()
        .into_iter()
        .map(|a| a.packet)
        .take_while(|p| p.seq < n as u64)
        .collect();
    assert_eq!(live.len(), n, "one packet a slot");
    // Whether a bin beat its deadline is the host scheduler's call: up to
    // the first slot it made coast, the daemon decoded what the block
    // holds; after it, the log's replay and its export still reproduce the
    // daemon exactly.
    let decoded = live
        .iter()
        .position(|p| p.flags & FLAG_BIN_MISSING != 0)
        .unwrap_or(n);
    let live_est = estimates(&live);
    assert_same_bits(
        "live daemon, decoded slots",
        &live_est[..decoded * d],
        &in_memory[..decoded * d],
    );

    // The daemon's log, replayed through a fresh slot engine.
    let log = stopped.session_log.expect("the daemon recorded");
    let mut reader = LogReader::open(&log).unwrap();
    let (mut replayed, mut differing) = (Vec::new(), 0);
    let summary = replay_log(&mut reader, None, |slot| {
        differing += usize::from(slot.recorded != Some(slot.replayed));
        replayed.push(VelocityPacket::parse(slot.replayed).unwrap());
    })
    .unwrap();
    assert_eq!(differing, 0, "a replayed packet differs from the sent one");
    assert!(summary.slots as usize >= n);
    assert_same_bits("replay of the log", &estimates(&replayed[..n]), &live_est);

    // The log exported as a session directory and replayed as rows.
    let exported = dir.path().join("export");
    export_log(&log, &exported).unwrap();
    let mut from_export = Vec::new();
    replay_rows(
        &BlockFiles::open_with_chunk(&exported, 5).unwrap(),
        &exported,
        &mut model.pipeline().unwrap(),
        &[],
        |est| {
            from_export.extend_from_slice(est);
            Ok(())
        },
    )
    .unwrap();
    assert!(from_export.len() >= n * d);
    assert_same_bits(
        "replay of the export, decoded slots",
        &from_export[..decoded * d],
        &in_memory[..decoded * d],
    );
    eprintln!("every path agreed; the live daemon decoded {decoded} of {n} slots in their slot");
}
