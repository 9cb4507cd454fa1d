//! Replay of a recorded session through the daemon's own slot engine, from
//! records handed in one at a time, whoever read them.
//!
//! A session is, in the order the real-time loop handled them, every
//! datagram with its receive time, every operator command and model load as
//! applied, and every sent packet with the time its slot was decided on.
//! Feeding those to a fresh [`SlotEngine`] built from the recorded settings
//! reproduces every slot: a datagram drives `on_datagram`; a sent record
//! whose slot the replay has not produced yet was answered at its deadline,
//! so it drives `on_timeout` at its decision time. Each replayed packet is
//! handed to the caller beside the recorded one, which is all a replay
//! (collect estimates) or a verification (compare) needs.
//!
//! Nothing here reads a file: the session log's reader
//! (`formats::session_log::replay_log`) or a test's list of records feeds
//! [`SessionReplay::feed`], and a model record's bytes become a pipeline
//! through the loader the caller gives.

use std::collections::VecDeque;

use crate::engine::pipeline::DecodePipeline;
use crate::engine::slot_engine::{
    EngineEvent, EngineSettings, OperatorCommand, SlotAnswer, SlotEngine, SlotSink, SwapRefused,
    check_swap_against,
};
use crate::wire::packet::{self, SENT_NS_OFFSET};

/// One recorded record, as far as the slot engine is concerned.
#[derive(Clone, Copy, Debug)]
pub enum SessionRecord<'a> {
    /// A model entered the session (at start, by an operator load or an
    /// adaptation update): a model file's bytes.
    Model { model_file: &'a [u8] },
    /// A datagram from the bin socket and when it was read.
    Datagram { recv_ns: u64, bytes: &'a [u8] },
    /// An operator command as the loop applied it.
    Operator { command: OperatorCommand },
    /// A velocity packet as sent, and when its slot was decided.
    Sent { decided_ns: u64, packet: &'a [u8] },
    /// Records the recorder lost.
    Lost { records: u64 },
    /// Anything the slot engine does not take (events, task packets, the end).
    Other,
}

/// Why a session cannot be replayed. `E` is the loader's error.
#[derive(Debug, thiserror::Error)]
pub enum SessionReplayError<E> {
    #[error("the session holds no model record before its first bin; it cannot be replayed")]
    NoModel,
    #[error("model record at offset {offset}: {source}")]
    Model { offset: u64, source: E },
    #[error("the replay model does not fit the recorded stream: {0}")]
    Override(SwapRefused),
    #[error(
        "a sent packet for seq {seq} is recorded at offset {offset} but the replay has no slot for it"
    )]
    UnmatchedSent { seq: u64, offset: u64 },
}

/// The stream a session was recorded for, to check a replacement model
/// against.
#[derive(Clone, Debug)]
pub struct RecordedStream {
    pub settings: EngineSettings,
    pub n_channels: usize,
    pub bin_width: crate::BinWidth,
    pub n_outputs: usize,
    /// What its bins are: the kind its first model decodes.
    pub input: crate::wire::packet::BinKind,
}

/// One slot: what the replay produced, and what the daemon recorded.
pub struct ReplayedSlot<'a> {
    /// The replayed packet, `sent_ns` copied from the recorded one (it is a
    /// wall-clock reading, not a decision).
    pub replayed: &'a [u8],
    /// The recorded packet; `None` for a slot the replay produced after the
    /// session's last sent record (the daemon stopped before recording it).
    pub recorded: Option<&'a [u8]>,
    /// Where the recorded packet's record sits in the session (a log's byte
    /// offset, or the caller's own count).
    pub offset: u64,
}

/// What a replay went through.
#[derive(Clone, Debug, Default)]
pub struct ReplayCounts {
    pub slots: u64,
    pub datagrams: u64,
    pub model_loads: u64,
    pub operator_commands: u64,
    /// Records the daemon's recorder reported lost; a nonzero value means
    /// the replay after that point may differ from the session.
    pub records_lost: u64,
}

#[derive(Default)]
struct Collect {
    packets: VecDeque<Vec<u8>>,
}

impl SlotSink for Collect {
    fn answer(&mut self, packet: &mut [u8], _slot: &SlotAnswer) {
        self.packets.push_back(packet.to_vec());
    }
    fn event(&mut self, _event: &EngineEvent) {}
}

/// A replay in progress: feed it every record in order, then finish it.
pub struct SessionReplay {
    settings: EngineSettings,
    engine: Option<SlotEngine>,
    /// Logged model loads are passed over: every bin is decoded by the
    /// model given at the start (to compare decoders on one session).
    fixed_model: bool,
    sink: Collect,
    counts: ReplayCounts,
}

impl SessionReplay {
    /// A replay that swaps in the recorded models where the daemon did.
    pub fn new(settings: EngineSettings) -> SessionReplay {
        SessionReplay {
            settings,
            engine: None,
            fixed_model: false,
            sink: Collect::default(),
            counts: ReplayCounts::default(),
        }
    }

    /// A replay in which `pipeline` decodes every bin and the recorded
    /// model loads are passed over; the slots stay the recorded ones.
    pub fn with_model<E>(
        stream: &RecordedStream,
        pipeline: DecodePipeline,
    ) -> Result<SessionReplay, SessionReplayError<E>> {
        check_swap_against(
            &pipeline,
            stream.n_channels,
            stream.bin_width,
            stream.n_outputs,
            stream.input,
        )
        .map_err(SessionReplayError::Override)?;
        let mut r = SessionReplay::new(stream.settings.clone());
        r.engine = Some(SlotEngine::new(stream.settings.clone(), pipeline));
        r.fixed_model = true;
        Ok(r)
    }

    /// Takes the next record; `load` builds a pipeline from a model
    /// record's bytes. Every slot the record completes goes to `on_slot`.
    pub fn feed<E>(
        &mut self,
        offset: u64,
        record: SessionRecord<'_>,
        load: impl FnOnce(&[u8]) -> Result<DecodePipeline, E>,
        mut on_slot: impl FnMut(&ReplayedSlot<'_>),
    ) -> Result<(), SessionReplayError<E>> {
        let sink = &mut self.sink;
        match record {
            SessionRecord::Model { model_file } => {
                self.counts.model_loads += 1;
                if self.fixed_model {
                    return Ok(());
                }
                let p = load(model_file)
                    .map_err(|source| SessionReplayError::Model { offset, source })?;
                match self.engine.as_mut() {
                    None => self.engine = Some(SlotEngine::new(self.settings.clone(), p)),
                    Some(e) => {
                        // A refused swap was refused live too; the daemon
                        // checks before it records a load.
                        let _ = e.swap_pipeline(p, sink);
                    }
                }
            }
            SessionRecord::Datagram { recv_ns, bytes } => {
                self.counts.datagrams += 1;
                let e = self.engine.as_mut().ok_or(SessionReplayError::NoModel)?;
                e.on_datagram(recv_ns, bytes, sink);
            }
            SessionRecord::Operator { command } => {
                self.counts.operator_commands += 1;
                if let Some(e) = self.engine.as_mut() {
                    let _ = e.operator(command, sink);
                }
            }
            SessionRecord::Sent { decided_ns, packet } => {
                if sink.packets.is_empty() {
                    if let Some(e) = self.engine.as_mut() {
                        e.on_timeout(decided_ns, sink);
                    }
                }
                let Some(mut replayed) = sink.packets.pop_front() else {
                    let seq = packet::VelocityPacket::parse(packet).map_or(0, |p| p.seq);
                    return Err(SessionReplayError::UnmatchedSent { seq, offset });
                };
                if packet.len() >= SENT_NS_OFFSET + 8 && replayed.len() >= SENT_NS_OFFSET + 8 {
                    replayed[SENT_NS_OFFSET..SENT_NS_OFFSET + 8]
                        .copy_from_slice(&packet[SENT_NS_OFFSET..SENT_NS_OFFSET + 8]);
                }
                self.counts.slots += 1;
                on_slot(&ReplayedSlot {
                    replayed: &replayed,
                    recorded: Some(packet),
                    offset,
                });
            }
            SessionRecord::Lost { records } => self.counts.records_lost += records,
            SessionRecord::Other => {}
        }
        Ok(())
    }

    /// Hands over the slots the replay produced after the last recorded
    /// one (their `offset` is `end_offset`) and says what it went through.
    pub fn finish(
        mut self,
        end_offset: u64,
        mut on_slot: impl FnMut(&ReplayedSlot<'_>),
    ) -> ReplayCounts {
        for replayed in self.sink.packets.drain(..) {
            self.counts.slots += 1;
            on_slot(&ReplayedSlot {
                replayed: &replayed,
                recorded: None,
                offset: end_offset,
            });
        }
        self.counts
    }
}

/// Replays `records` (each with its offset) in order through `replay`:
/// [`SessionReplay::feed`] over any iterator, for records already in
/// memory or read by any reader. The last offset stands for the end.
pub fn replay_records<'r, E>(
    mut replay: SessionReplay,
    records: impl IntoIterator<Item = (u64, SessionRecord<'r>)>,
    mut load: impl FnMut(&[u8]) -> Result<DecodePipeline, E>,
    mut on_slot: impl FnMut(&ReplayedSlot<'_>),
) -> Result<ReplayCounts, SessionReplayError<E>> {
    let mut end = 0;
    for (offset, record) in records {
        end = offset;
        replay.feed(offset, record, &mut load, &mut on_slot)?;
    }
    Ok(replay.finish(end, on_slot))
}
