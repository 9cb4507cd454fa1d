//! The slot engine's rules with time as data: one answer per slot, coasting
//! and halting on missing bins, late, duplicate and reordered bins, new
//! streams and model swaps — checked without sockets or clocks.

use decoder_core::engine::slot_engine::{
    EngineEvent, EngineSettings, OperatorCommand, SlotAnswer, SlotEngine, SlotSink,
};
use decoder_core::engine::supervisor::SupervisorState;
use decoder_core::formats::model_file::ModelFile;
use decoder_core::sim::model::small_kalman;
use decoder_core::wire::packet::{
    self, BinHeader, FLAG_BIN_MISSING, FLAG_MODEL_CHANGED, VelocityPacket,
};

const BIN_NS: u64 = 20_000_000;
const T0: u64 = 1_000_000_000;

fn model() -> (ModelFile, decoder_core::Block) {
    small_kalman(8, 1, 1.0)
}

fn settings(armed: bool) -> EngineSettings {
    EngineSettings {
        reorder_window: 64,
        clock_tracking: 0.0,
        armed_at_start: armed,
        dead_channel_bins: 1500,
        ..decoder_core::sim::model::rig_settings()
    }
}

#[derive(Default)]
struct Collected {
    packets: Vec<VelocityPacket>,
    events: Vec<EngineEvent>,
}

impl SlotSink for Collected {
    fn answer(&mut self, packet: &mut [u8], slot: &SlotAnswer) {
        let p = VelocityPacket::parse(packet).unwrap();
        assert_eq!(p.seq, slot.seq);
        self.packets.push(p);
    }
    fn event(&mut self, event: &EngineEvent) {
        self.events.push(*event);
    }
}

struct Rig {
    engine: SlotEngine,
    session: decoder_core::Block,
    out: Collected,
    buf: Vec<u8>,
}

impl Rig {
    fn new(armed: bool) -> Rig {
        let (m, session) = model();
        Rig {
            engine: SlotEngine::new(settings(armed), m.pipeline().unwrap()),
            session,
            out: Collected::default(),
            buf: Vec::new(),
        }
    }

    /// Bin `seq` arriving `late_ns` after its nominal time (seq 0 at T0).
    fn send(&mut self, seq: u64, late_ns: u64) {
        self.send_at(seq, T0 + seq * BIN_NS + late_ns);
    }

    /// Bin `seq` arriving at `at`.
    fn send_at(&mut self, seq: u64, at: u64) {
        let counts = self.session.bin_counts(seq as usize % self.session.n_bins);
        packet::encode_bin(
            &BinHeader {
                channels: counts.len() as u16,
                seq,
                origin_ns: T0 + seq * BIN_NS,
                bin_us: 20_000,
                flags: 0,
                kind: decoder_core::wire::packet::BinKind::Counts,
            },
            counts,
            &mut self.buf,
        );
        self.engine.on_datagram(at, &self.buf, &mut self.out);
    }

    /// Bin `seq` arriving at `at`, stamped by the front end at `at`.
    fn send_seq_at(&mut self, seq: u64, at: u64) {
        let counts = self.session.bin_counts(seq as usize % self.session.n_bins);
        packet::encode_bin(
            &BinHeader {
                channels: counts.len() as u16,
                seq,
                origin_ns: at,
                bin_us: 20_000,
                flags: 0,
                kind: decoder_core::wire::packet::BinKind::Counts,
            },
            counts,
            &mut self.buf,
        );
        self.engine.on_datagram(at, &self.buf, &mut self.out);
    }

    /// Time passes to just before bin `seq`'s nominal time.
    fn wait_until(&mut self, seq: u64) {
        self.engine.on_timeout(T0 + seq * BIN_NS - 1, &mut self.out);
    }

    fn seqs(&self) -> Vec<u64> {
        self.out.packets.iter().map(|p| p.seq).collect()
    }
}

#[test]
fn steady_stream_answers_each_bin_once_from_counts() {
    let mut rig = Rig::new(true);
    for seq in 0..50 {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
    }
    assert_eq!(rig.seqs(), (0..50).collect::<Vec<_>>());
    assert!(
        rig.out
            .packets
            .iter()
            .all(|p| p.flags & FLAG_BIN_MISSING == 0)
    );
    assert!(rig.out.packets.iter().all(|p| p.state == 1));
    assert_eq!(rig.engine.counters().bins_decoded, 50);
}

#[test]
fn gap_of_three_bins_coasts_exactly_those_seqs() {
    let mut rig = Rig::new(true);
    for seq in (0..10).chain(13..20) {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
    }
    assert_eq!(rig.seqs(), (0..20).collect::<Vec<_>>());
    for p in &rig.out.packets {
        let gap = (10..13).contains(&p.seq);
        assert_eq!(p.flags & FLAG_BIN_MISSING != 0, gap, "seq {}", p.seq);
        let want = if gap {
            SupervisorState::Coasting
        } else {
            SupervisorState::Armed
        };
        assert_eq!(p.state, want.wire(), "seq {}", p.seq);
        if gap {
            assert_eq!((p.recv_ns, p.origin_ns), (0, 0));
        }
    }
    assert_eq!(rig.engine.counters().bins_missing, 3);
}

#[test]
fn gap_of_thirty_bins_halts_and_commands_zero_after() {
    let mut rig = Rig::new(true);
    for seq in (0..40).chain(70..100) {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
    }
    assert_eq!(rig.seqs(), (0..100).collect::<Vec<_>>());
    let halted_from = 40 + 5; // five coasted bins, the sixth missing halts
    for p in &rig.out.packets[40..] {
        let want = if p.seq < halted_from { 2 } else { 3 };
        assert_eq!(p.state, want, "seq {}", p.seq);
    }
    // The controlled stop reaches zero within the gap and stays there.
    for p in &rig.out.packets[70..] {
        assert!(p.command.iter().all(|&c| c == 0.0), "seq {}", p.seq);
    }
    assert_eq!(rig.engine.state(), SupervisorState::Halted);
}

#[test]
fn reordered_bins_are_decoded_in_seq_order() {
    let mut rig = Rig::new(true);
    for seq in 0..5 {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
    }
    rig.wait_until(5);
    rig.send_at(6, T0 + 5 * BIN_NS + 50_000); // 6 comes early, before 5
    assert_eq!(rig.seqs().len(), 5);
    rig.send(5, 200_000);
    assert_eq!(rig.seqs(), (0..7).collect::<Vec<_>>());
    assert!(
        rig.out
            .packets
            .iter()
            .all(|p| p.flags & FLAG_BIN_MISSING == 0)
    );
}

#[test]
fn duplicates_and_late_bins_are_dropped_and_counted() {
    let mut rig = Rig::new(true);
    for seq in 0..5 {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
    }
    rig.send(4, 300_000); // duplicate of a decoded bin
    rig.send(5, BIN_NS * 3 / 4); // after its deadline (slack is half a bin)
    let c = rig.engine.counters();
    assert_eq!((c.bins_duplicate, c.bins_late, c.bins_missing), (1, 1, 1));
    assert_eq!(rig.seqs(), (0..6).collect::<Vec<_>>());
    assert_ne!(rig.out.packets[5].flags & FLAG_BIN_MISSING, 0);
}

#[test]
fn seq_going_back_starts_a_new_stream_halted() {
    let mut rig = Rig::new(true);
    for seq in 1000..1010 {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
    }
    // The front end restarts at 0, right after bin 1009: bin 0 alone is a
    // stray; bin 1 following it a bin later confirms the new stream.
    rig.send_at(0, T0 + 1009 * BIN_NS + 200_000);
    assert_eq!(rig.engine.counters().new_streams, 0);
    assert_eq!(rig.engine.counters().bins_stray, 1);
    assert_eq!(rig.engine.state(), SupervisorState::Armed);
    rig.send_at(1, T0 + 1010 * BIN_NS + 200_000);
    assert_eq!(rig.engine.counters().new_streams, 1);
    assert_eq!(rig.engine.state(), SupervisorState::Halted);
    assert_eq!(rig.out.packets.last().unwrap().seq, 1);
    assert_eq!(rig.engine.next_seq(), Some(2));
}

#[test]
fn a_stall_longer_than_the_window_is_not_a_new_stream() {
    // The daemon stalls for 100 bins (window 64); the socket then delivers
    // the queued bins in a burst. Their slots were answered at their
    // deadlines; the burst is late, not a restarted sender, and every slot
    // keeps exactly one answer.
    let mut rig = Rig::new(true);
    for seq in 0..10 {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
    }
    let wake = T0 + 110 * BIN_NS;
    for (i, seq) in (10..110).enumerate() {
        rig.send_at(seq, wake + i as u64 * 2_000);
    }
    for seq in 111..130 {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
    }
    let c = rig.engine.counters();
    assert_eq!(c.new_streams, 0, "{c:?}");
    assert_eq!(rig.seqs(), (0..130).collect::<Vec<_>>());
    assert!(c.bins_late >= 99, "{c:?}");
}

#[test]
fn stale_packets_never_reset_the_stream() {
    let mut rig = Rig::new(true);
    for seq in 100..200 {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
        rig.send(0, 200_000); // a stale replay of an old bin, every bin
    }
    let c = rig.engine.counters();
    assert_eq!((c.new_streams, c.bins_stray, c.bins_decoded), (0, 100, 100));
    assert_eq!(rig.seqs(), (100..200).collect::<Vec<_>>());
    assert_eq!(rig.engine.state(), SupervisorState::Armed);
}

#[test]
fn heartbeat_continues_after_the_sender_stops() {
    let mut rig = Rig::new(true);
    for seq in 0..5 {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
    }
    rig.wait_until(50);
    assert_eq!(rig.seqs(), (0..50).collect::<Vec<_>>());
    assert_eq!(rig.out.packets.last().unwrap().state, 3);
}

#[test]
fn a_swapped_model_flags_exactly_the_next_slot() {
    let mut rig = Rig::new(true);
    for seq in 0..5 {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
    }
    let (m, _) = model();
    let old = rig
        .engine
        .swap_pipeline(m.pipeline().unwrap(), &mut rig.out)
        .unwrap();
    drop(old);
    for seq in 5..8 {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
    }
    let flagged: Vec<u64> = rig
        .out
        .packets
        .iter()
        .filter(|p| p.flags & FLAG_MODEL_CHANGED != 0)
        .map(|p| p.seq)
        .collect();
    assert_eq!(flagged, vec![5]);
}

#[test]
fn arming_needs_a_live_stream() {
    let mut rig = Rig::new(false);
    assert!(
        rig.engine
            .operator(OperatorCommand::Arm, &mut rig.out)
            .is_err()
    );
    rig.send(0, 100_000);
    rig.wait_until(3); // bins 1 and 2 missing
    assert!(
        rig.engine
            .operator(OperatorCommand::Arm, &mut rig.out)
            .is_err()
    );
    rig.send(3, 100_000);
    assert!(
        rig.engine
            .operator(OperatorCommand::Arm, &mut rig.out)
            .is_ok()
    );
    assert_eq!(rig.engine.state(), SupervisorState::Armed);
}

#[test]
fn a_mismatched_model_is_refused_for_swap() {
    let mut rig = Rig::new(true);
    let (m, _) = small_kalman(9, 1, 1.0);
    let err = rig
        .engine
        .swap_pipeline(m.pipeline().unwrap(), &mut rig.out)
        .err()
        .unwrap()
        .0;
    assert!(err.to_string().contains("9 channels"), "{err}");
}

#[test]
fn clock_tracking_follows_a_slow_sender() {
    // The sender's bins come 100 ppm slow; after 20 000 bins (400 s) they
    // arrive 40 ms (two bins) later than a fixed clock expects. With
    // tracking, none is late.
    let (m, session) = model();
    let mut s = settings(true);
    s.clock_tracking = 0.05;
    let mut engine = SlotEngine::new(s, m.pipeline().unwrap());
    let mut out = Collected::default();
    let mut buf = Vec::new();
    for seq in 0..20_000u64 {
        let at = T0 + seq * BIN_NS + seq * BIN_NS / 10_000;
        engine.on_timeout(at - 1, &mut out);
        packet::encode_bin(
            &BinHeader {
                channels: 8,
                seq,
                origin_ns: 0,
                bin_us: 20_000,
                flags: 0,
                kind: decoder_core::wire::packet::BinKind::Counts,
            },
            session.bin_counts(seq as usize % session.n_bins),
            &mut buf,
        );
        engine.on_datagram(at, &buf, &mut out);
    }
    assert_eq!(engine.counters().bins_late, 0);
    assert_eq!(engine.counters().bins_missing, 0);
    out.packets.clear();
}

#[test]
fn dead_and_saturated_channels_are_reported() {
    let (m, _) = model();
    let mut s = settings(true);
    s.dead_channel_bins = 50;
    let mut engine = SlotEngine::new(s, m.pipeline().unwrap());
    let mut out = Collected::default();
    let mut buf = Vec::new();
    for seq in 0..200u64 {
        // Channel 2 never fires; channel 5 reports an impossible count once.
        let mut counts = vec![1u16; 8];
        counts[2] = 0;
        if seq == 180 {
            counts[5] = 40;
        }
        send_on_the_dot(&mut engine, &mut out, seq, &counts, &mut buf);
    }
    let (dead, saturated) = engine.channel_health();
    assert_eq!(dead, vec![2]);
    assert_eq!(saturated, vec![5]);
}

/// Seqs run up to u64::MAX and wrap to 0: every slot is answered once, in
/// order, from its counts (u64::MAX is a seq like any other, not a marker).
#[test]
fn a_stream_across_the_end_of_the_seq_range_is_decoded_in_order() {
    let mut rig = Rig::new(true);
    let first = u64::MAX - 9;
    let seqs: Vec<u64> = (0..20).map(|i| first.wrapping_add(i)).collect();
    for (i, &seq) in seqs.iter().enumerate() {
        rig.send_seq_at(seq, T0 + i as u64 * BIN_NS + 100_000);
    }
    // A duplicate of the last seq before the wrap is a duplicate, not new.
    rig.send_seq_at(u64::MAX, T0 + 20 * BIN_NS);
    assert_eq!(rig.seqs(), seqs);
    assert!(
        rig.out
            .packets
            .iter()
            .all(|p| p.flags & FLAG_BIN_MISSING == 0)
    );
    let c = rig.engine.counters();
    assert_eq!((c.new_streams, c.bins_decoded), (0, 20), "{c:?}");
    assert_eq!(c.bins_duplicate + c.bins_late, 1, "{c:?}");
}

/// A receive clock that steps backwards (a wrong timestamp, a VM pause
/// undone) never answers a slot twice, never skips one, never panics.
#[test]
fn a_clock_that_goes_backwards_answers_each_slot_once() {
    let mut rig = Rig::new(true);
    for seq in 0..10 {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
    }
    // Seq 10 stamped a second before the stream began, then time at zero.
    rig.send_at(10, 1);
    rig.engine.on_timeout(0, &mut rig.out);
    for seq in 11..30 {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
    }
    assert_eq!(rig.seqs(), (0..30).collect::<Vec<_>>());
}

/// A decoder that overflows puts no NaN or infinity in any field of the
/// packets that leave: the estimate reads as zeros, the command is zero
/// and the supervisor halts.
#[test]
fn a_numerical_fault_never_puts_a_non_finite_value_in_a_packet() {
    use decoder_core::decoders::wiener::WienerModel;
    let (_, session) = model();
    let n = session.n_channels;
    let mut weights = vec![1e308; 1 + n];
    weights[0] = 0.0;
    let wiener = WienerModel {
        outputs: vec!["vel_x".into(), "vel_y".into()],
        taps: 1,
        n_channels: n,
        weights: decoder_core::linalg::Mat {
            rows: 2,
            cols: 1 + n,
            data: [weights.clone(), weights].concat(),
        },
        mean_counts: vec![1.0; n],
    };
    let m = ModelFile {
        input: decoder_core::wire::packet::BinKind::Counts,
        bin_width: decoder_core::BinWidth::from_us(20_000).unwrap(),
        decoder: decoder_core::DecoderModel::Wiener(wiener),
        provenance: decoder_core::Provenance::untracked(),
        click: None,
    };
    let mut rig = Rig::new(true);
    rig.engine = SlotEngine::new(settings(true), m.pipeline().unwrap());
    for seq in 0..20 {
        rig.wait_until(seq);
        rig.send(seq, 100_000);
    }
    let c = rig.engine.counters();
    assert!(c.numerical_faults > 0, "the model must overflow: {c:?}");
    for p in &rig.out.packets {
        assert!(
            p.estimate.iter().chain(&p.command).all(|v| v.is_finite()),
            "{p:?}"
        );
        assert!(p.command.iter().all(|&v| v == 0.0) || p.state != 3, "{p:?}");
    }
    assert_eq!(rig.out.packets.last().unwrap().state, 3, "halted");
}

/// Bin `seq` of `session` arriving a microsecond after its nominal time.
fn send_on_time(
    engine: &mut SlotEngine,
    out: &mut Collected,
    session: &decoder_core::Block,
    seq: u64,
) {
    let counts = session.bin_counts(seq as usize % session.n_bins);
    let mut buf = Vec::new();
    packet::encode_bin(
        &BinHeader {
            channels: counts.len() as u16,
            seq,
            origin_ns: T0 + seq * BIN_NS,
            bin_us: 20_000,
            flags: 0,
            kind: decoder_core::wire::packet::BinKind::Counts,
        },
        counts,
        &mut buf,
    );
    engine.on_datagram(T0 + seq * BIN_NS + 1000, &buf, out);
}

/// With a click decoder in the model, every packet carries the click
/// probability the filter gives for its bin, and flag bit 4 exactly where
/// the gate (the engine's settings) says — only while armed, never on a
/// slot whose bin never came; disarmed, the probability still goes out but
/// no click does.
#[test]
fn clicks_go_out_where_the_gate_says_and_only_while_armed() {
    use decoder_core::decoders::click::{ClickFilter, ClickModel};
    use decoder_core::wire::packet::FLAG_CLICK;
    let (mut m, session) = model();
    let n = m.decoder.n_channels();
    // Channel 0 carries the click: the log odds rise with its count.
    let mut weights = vec![0.0; 2 * n];
    weights[0] = 3.0;
    weights[n] = 1.5;
    let click = ClickModel {
        n_channels: n,
        lags: 2,
        weights,
        intercept: 2.0,
        prior_click: 0.1,
        stay_rest: 0.95,
        stay_click: 0.9,
    };
    m.click = Some(click.clone());
    // Armed; disarmed; armed with a speed above which no click is made,
    // set below any moving command.
    for (armed, max_speed) in [(true, 0.0), (false, 0.0), (true, 1e-9)] {
        let mut settings = settings(armed);
        settings.click_gate.max_speed = max_speed;
        let mut engine = SlotEngine::new(settings.clone(), m.pipeline().unwrap());
        let mut out = Collected::default();
        let missing = [17u64, 18];
        for seq in 0..120u64 {
            if missing.contains(&seq) {
                engine.on_timeout(T0 + (seq + 1) * BIN_NS, &mut out);
                continue;
            }
            send_on_time(&mut engine, &mut out, &session, seq);
        }
        // The same filter and gate, run beside the engine.
        let mut filter = ClickFilter::new(click.clone()).unwrap();
        let mut gate = settings.click_gate.gate(settings.bin_width);
        let mut clicks = 0;
        for p in out.packets.iter().filter(|p| p.seq < 120) {
            let came = !missing.contains(&p.seq);
            let prob = if came {
                filter.step(session.bin_counts(p.seq as usize % session.n_bins))
            } else {
                filter.predict_only()
            };
            assert_eq!(p.click_prob, prob as f32, "seq {}", p.seq);
            let armed_now = p.state == 1;
            let speed = p.command.iter().map(|v| v * v).sum::<f64>().sqrt();
            let slow = max_speed <= 0.0 || speed <= max_speed;
            let want = gate.step(prob, came && armed_now && slow);
            assert_eq!(p.flags & FLAG_CLICK != 0, want, "seq {}", p.seq);
            clicks += usize::from(want);
        }
        if armed && max_speed == 0.0 {
            assert!(clicks >= 2, "{clicks} clicks while armed");
        } else {
            assert_eq!(clicks, 0);
            assert!(out.packets.iter().any(|p| p.click_prob > 0.5));
        }
        assert_eq!(engine.clicks().0, clicks as u64);
    }
}

/// However wrong the click decoder (here its weights shuffled across
/// channels and its intercept pushed up so it claims a click every bin),
/// the gate bounds the clicks: at most one per hold plus refractory time.
#[test]
fn a_wrong_click_decoder_clicks_no_more_than_the_gate_allows() {
    use decoder_core::decoders::click::ClickModel;
    use decoder_core::wire::packet::FLAG_CLICK;
    let (mut m, session) = model();
    let n = m.decoder.n_channels();
    let mut weights: Vec<f64> = (0..2 * n).map(|i| ((i * 7919) % 13) as f64 - 6.0).collect();
    weights.reverse();
    m.click = Some(ClickModel {
        n_channels: n,
        lags: 2,
        weights,
        intercept: 50.0,
        prior_click: 0.1,
        stay_rest: 0.95,
        stay_click: 0.9,
    });
    let settings = settings(true);
    let gate = settings.click_gate;
    let mut engine = SlotEngine::new(settings.clone(), m.pipeline().unwrap());
    let mut out = Collected::default();
    let bins = 1000u64;
    for seq in 0..bins {
        send_on_time(&mut engine, &mut out, &session, seq);
    }
    let clicks = out
        .packets
        .iter()
        .filter(|p| p.flags & FLAG_CLICK != 0)
        .count() as u64;
    let refractory = (gate.refractory_ms / 20.0).ceil() as u64;
    let most = bins.div_ceil(u64::from(gate.hold_bins) + refractory);
    assert!(
        clicks >= 1 && clicks <= most,
        "{clicks} clicks, at most {most}"
    );
}

/// Drift handling's floor: with more than `max_left_out` of the channels
/// left out the engine halts (command zero) and refuses to arm; a channel
/// left out and restored is an event each time; drift off leaves the
/// packets exactly as without the section.
#[test]
fn too_many_channels_left_out_halts_and_refuses_to_arm() {
    let (m, _) = model();
    let mut s = settings(true);
    s.drift = decoder_core::engine::drift::DriftSettings {
        enabled: true,
        dead_after_s: 0.5,
        dead_min_rate_hz: 1.0,
        max_left_out: 0.3,
        ..Default::default()
    };
    let mut engine = SlotEngine::new(s, m.pipeline().unwrap());
    let mut out = Collected::default();
    let mut buf = Vec::new();
    let mut send = |engine: &mut SlotEngine, out: &mut Collected, seq: u64, silent: usize| {
        // Channels below `silent` fire nothing; the rest one a bin (50 Hz,
        // below the noisy limit of 4 × 20 Hz).
        let counts: Vec<u16> = (0..8).map(|c| u16::from(c >= silent)).collect();
        send_on_the_dot(engine, out, seq, &counts, &mut buf);
    };
    // Two of eight silent (25 %): left out after 25 bins, still armed.
    for seq in 0..40 {
        send(&mut engine, &mut out, seq, 2);
    }
    assert_eq!(engine.state(), SupervisorState::Armed);
    assert_eq!(engine.pipeline().drift().unwrap().n_left_out(), 2);
    // A third silent channel (37.5 %): halted, with the reason.
    for seq in 40..80 {
        send(&mut engine, &mut out, seq, 3);
    }
    assert_eq!(engine.state(), SupervisorState::Halted, "{:?}", out.events);
    assert!(out.events.iter().any(|e| matches!(
        e,
        EngineEvent::Transition(t) if matches!(
            t.reason,
            decoder_core::engine::supervisor::TransitionReason::TooManyLeftOut { left_out: 3, channels: 8 }
        )
    )));
    let last = out.packets.last().unwrap();
    assert!(last.command.iter().all(|&v| v == 0.0), "{last:?}");
    assert!(engine.operator(OperatorCommand::Arm, &mut out).is_err());
    let left: usize = out
        .events
        .iter()
        .filter(|e| matches!(e, EngineEvent::ChannelLeftOut { .. }))
        .count();
    assert_eq!(left, 3);
}

#[test]
fn drift_handling_off_gives_exactly_what_no_section_gives() {
    let run = |drift: Option<decoder_core::engine::drift::DriftSettings>| {
        let (m, session) = model();
        let mut s = settings(true);
        if let Some(d) = drift {
            s.drift = d;
        }
        let mut rig = Rig {
            engine: SlotEngine::new(s, m.pipeline().unwrap()),
            session,
            out: Collected::default(),
            buf: Vec::new(),
        };
        for seq in 0..300 {
            rig.send(seq, 1000);
        }
        rig.out.packets
    };
    let plain = run(None);
    let off = run(Some(decoder_core::engine::drift::DriftSettings {
        enabled: false,
        baseline_tau_s: 5.0,
        ..Default::default()
    }));
    assert_eq!(plain, off);
    let on = run(Some(decoder_core::engine::drift::DriftSettings {
        enabled: true,
        baseline_tau_s: 5.0,
        ..Default::default()
    }));
    assert_ne!(plain, on, "drift handling on changes the estimates");
}

/// Bin `seq` of 8 channels with `counts`, 1 µs after its nominal time,
/// every earlier slot answered first.
fn send_on_the_dot(
    engine: &mut SlotEngine,
    out: &mut Collected,
    seq: u64,
    counts: &[u16],
    buf: &mut Vec<u8>,
) {
    packet::encode_bin(
        &BinHeader {
            channels: 8,
            seq,
            origin_ns: 0,
            bin_us: 20_000,
            flags: 0,
            kind: decoder_core::wire::packet::BinKind::Counts,
        },
        counts,
        buf,
    );
    engine.on_timeout(T0 + seq * BIN_NS - 1, out);
    engine.on_datagram(T0 + seq * BIN_NS + 1000, buf, out);
}
