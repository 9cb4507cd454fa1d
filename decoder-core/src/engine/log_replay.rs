//! Offline replay of a session log through the daemon's own slot engine.
//!
//! The log holds, in the order the real-time loop handled them, every
//! datagram with its receive time, every operator command and model load as
//! applied, and every sent packet with the time its slot was decided on.
//! Feeding those to a fresh [`SlotEngine`] built from the logged settings
//! reproduces every slot: a datagram record drives `on_datagram`; a sent
//! record whose slot the replay has not produced yet was answered at its
//! deadline, so it drives `on_timeout` at its decision time. Each replayed
//! packet is handed to the caller beside the recorded one, which is all a
//! replay (collect estimates) or a verification (compare) needs.

use std::collections::VecDeque;

use crate::engine::pipeline::{DecodePipeline, PipelineError};
use crate::engine::slot_engine::{EngineEvent, SlotAnswer, SlotEngine, SlotSink, SwapRefused};
use crate::formats::model_file::{ModelFile, ModelFileError};
use crate::formats::packet::{self, SENT_NS_OFFSET};
use crate::formats::session_log::{LogEnd, LogReader, LogRecord};

#[derive(Debug, thiserror::Error)]
pub enum LogReplayError {
    #[error("{path}: the log holds no model record before its first bin; it cannot be replayed")]
    NoModel { path: String },
    #[error("{path}: model record at offset {offset}: {source}")]
    Model {
        path: String,
        offset: u64,
        source: ModelFileError,
    },
    #[error("{path}: model record at offset {offset}: {source}")]
    Pipeline {
        path: String,
        offset: u64,
        source: PipelineError,
    },
    #[error("{path}: the replay model does not fit the logged stream: {source}")]
    Override { path: String, source: SwapRefused },
    #[error(
        "{path}: a sent packet for seq {seq} is recorded at offset {offset} but the replay has no slot for it"
    )]
    UnmatchedSent { path: String, seq: u64, offset: u64 },
}

/// One slot: what the replay produced, and what the daemon recorded.
pub struct ReplayedSlot<'a> {
    /// The replayed packet, `sent_ns` copied from the recorded one (it is a
    /// wall-clock reading, not a decision).
    pub replayed: &'a [u8],
    /// The recorded packet; `None` for a slot the replay produced after the
    /// log's last sent record (the daemon stopped before recording it).
    pub recorded: Option<&'a [u8]>,
    /// Byte offset of the recorded packet's record in the log.
    pub offset: u64,
}

#[derive(Clone, Debug, Default)]
pub struct ReplaySummary {
    pub slots: u64,
    pub datagrams: u64,
    pub model_loads: u64,
    pub operator_commands: u64,
    /// Records the daemon's recorder reported lost; a nonzero value means
    /// the replay after that point may differ from the session.
    pub records_lost: u64,
    pub end: Option<LogEnd>,
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

/// Replays the log behind `reader`. With `model` the logged model loads are
/// ignored and every bin is decoded by `model` instead (to compare
/// decoders on the same session); the slots stay the logged ones.
pub fn replay_log(
    reader: &mut LogReader,
    model: Option<&ModelFile>,
    mut on_slot: impl FnMut(&ReplayedSlot<'_>),
) -> Result<ReplaySummary, LogReplayError> {
    let path = reader.path().display().to_string();
    let settings = reader.header().settings.clone();
    let mut engine: Option<SlotEngine> = None;
    if let Some(m) = model {
        let p = DecodePipeline::new(m).map_err(|source| LogReplayError::Pipeline {
            path: path.clone(),
            offset: 0,
            source,
        })?;
        let h = reader.header();
        crate::engine::slot_engine::check_swap_against(
            &p,
            h.n_channels,
            h.bin_width,
            h.outputs.len(),
        )
        .map_err(|source| LogReplayError::Override {
            path: path.clone(),
            source,
        })?;
        engine = Some(SlotEngine::new(settings.clone(), p));
    }
    let mut sink = Collect::default();
    let mut summary = ReplaySummary::default();
    loop {
        let offset = reader.offset();
        let Some(record) = reader.next_record() else {
            break;
        };
        match record {
            LogRecord::Model { model_file, .. } => {
                summary.model_loads += 1;
                if model.is_some() {
                    continue;
                }
                let m = ModelFile::from_bytes(&model_file, &format!("{path} (offset {offset})"))
                    .map_err(|source| LogReplayError::Model {
                        path: path.clone(),
                        offset,
                        source,
                    })?;
                let p = DecodePipeline::new(&m).map_err(|source| LogReplayError::Pipeline {
                    path: path.clone(),
                    offset,
                    source,
                })?;
                match engine.as_mut() {
                    None => engine = Some(SlotEngine::new(settings.clone(), p)),
                    Some(e) => {
                        // A refused swap was refused live too; the daemon
                        // checks before it records a load.
                        let _ = e.swap_pipeline(p, &mut sink);
                    }
                }
            }
            LogRecord::Datagram { recv_ns, bytes } => {
                summary.datagrams += 1;
                let e = engine
                    .as_mut()
                    .ok_or_else(|| LogReplayError::NoModel { path: path.clone() })?;
                e.on_datagram(recv_ns, &bytes, &mut sink);
            }
            LogRecord::Operator { command, .. } => {
                summary.operator_commands += 1;
                if let Some(e) = engine.as_mut() {
                    let _ = e.operator(command, &mut sink);
                }
            }
            LogRecord::Sent { decided_ns, packet } => {
                if sink.packets.is_empty() {
                    if let Some(e) = engine.as_mut() {
                        e.on_timeout(decided_ns, &mut sink);
                    }
                }
                let Some(mut replayed) = sink.packets.pop_front() else {
                    let seq = packet::VelocityPacket::parse(&packet).map_or(0, |p| p.seq);
                    return Err(LogReplayError::UnmatchedSent { path, seq, offset });
                };
                if packet.len() >= SENT_NS_OFFSET + 8 && replayed.len() >= SENT_NS_OFFSET + 8 {
                    replayed[SENT_NS_OFFSET..SENT_NS_OFFSET + 8]
                        .copy_from_slice(&packet[SENT_NS_OFFSET..SENT_NS_OFFSET + 8]);
                }
                summary.slots += 1;
                on_slot(&ReplayedSlot {
                    replayed: &replayed,
                    recorded: Some(&packet),
                    offset,
                });
            }
            LogRecord::Lost { records, .. } => summary.records_lost += records,
            LogRecord::Event { .. } | LogRecord::End { .. } | LogRecord::Task { .. } => {}
        }
    }
    for replayed in sink.packets.drain(..) {
        summary.slots += 1;
        on_slot(&ReplayedSlot {
            replayed: &replayed,
            recorded: None,
            offset: reader.offset(),
        });
    }
    summary.end = reader.end().cloned();
    Ok(summary)
}
