//! A session log replayed through the slot engine: this file reads the
//! log's records and hands them to the engine's
//! [`SessionReplay`], building each
//! logged model from its model-file bytes, and names the log in every error.

use crate::engine::pipeline::PipelineError;
use crate::engine::session_replay::{
    RecordedStream, ReplayCounts, ReplayedSlot, SessionRecord, SessionReplay, SessionReplayError,
};
use crate::formats::model_file::{ModelFile, ModelFileError};
use crate::formats::session_log::{LogEnd, LogReader, LogRecord};

/// Why a log could not be replayed: the engine's reason, with the log.
#[derive(Debug, thiserror::Error)]
#[error("{path}: {problem}")]
pub struct LogReplayError {
    pub path: String,
    pub problem: SessionReplayError<LoadError>,
}

/// What a log's replay went through, and how the log ended.
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

/// Why a model in the log (or the one given to replace them) could not
/// be built.
#[derive(Debug, thiserror::Error)]
pub enum LoadError {
    #[error(transparent)]
    File(#[from] ModelFileError),
    #[error(transparent)]
    Pipeline(#[from] PipelineError),
}

impl LogRecord {
    /// The record as the slot engine's replay takes it.
    pub fn as_session_record(&self) -> SessionRecord<'_> {
        match self {
            LogRecord::Model { model_file, .. } => SessionRecord::Model { model_file },
            LogRecord::Datagram { recv_ns, bytes } => SessionRecord::Datagram {
                recv_ns: *recv_ns,
                bytes,
            },
            LogRecord::Operator { command, .. } => SessionRecord::Operator { command: *command },
            LogRecord::Sent { decided_ns, packet } => SessionRecord::Sent {
                decided_ns: *decided_ns,
                packet,
            },
            LogRecord::Lost { records, .. } => SessionRecord::Lost { records: *records },
            LogRecord::Event { .. } | LogRecord::End { .. } | LogRecord::Task { .. } => {
                SessionRecord::Other
            }
        }
    }
}

/// What the bins of the log at `path` are: the kind its first model
/// decodes (counts when it holds none that reads).
fn logged_input(path: &std::path::Path) -> crate::wire::packet::BinKind {
    let Ok(mut reader) = LogReader::open(path) else {
        return crate::wire::packet::BinKind::Counts;
    };
    while let Some(record) = reader.next_record() {
        if let LogRecord::Model { model_file, .. } = record {
            return ModelFile::from_bytes(&model_file, "")
                .map_or(crate::wire::packet::BinKind::Counts, |m| m.input);
        }
    }
    crate::wire::packet::BinKind::Counts
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
    let h = reader.header();
    let stream = RecordedStream {
        settings: h.settings.clone(),
        n_channels: h.n_channels,
        bin_width: h.bin_width,
        n_outputs: h.outputs.len(),
        input: if model.is_some() {
            logged_input(reader.path())
        } else {
            crate::wire::packet::BinKind::Counts
        },
    };
    let named = |problem| LogReplayError {
        path: path.clone(),
        problem,
    };
    let mut replay = match model {
        Some(m) => {
            let p = m.pipeline().map_err(|e| {
                named(SessionReplayError::Model {
                    offset: 0,
                    source: e.into(),
                })
            })?;
            SessionReplay::with_model(&stream, p).map_err(named)?
        }
        None => SessionReplay::new(stream.settings.clone()),
    };
    loop {
        let offset = reader.offset();
        let Some(record) = reader.next_record() else {
            break;
        };
        let load = |bytes: &[u8]| {
            let m = ModelFile::from_bytes(bytes, &format!("{path} (offset {offset})"))?;
            Ok::<_, LoadError>(m.pipeline()?)
        };
        replay
            .feed(offset, record.as_session_record(), load, &mut on_slot)
            .map_err(named)?;
    }
    let ReplayCounts {
        slots,
        datagrams,
        model_loads,
        operator_commands,
        records_lost,
    } = replay.finish(reader.offset(), &mut on_slot);
    Ok(ReplaySummary {
        slots,
        datagrams,
        model_loads,
        operator_commands,
        records_lost,
        end: reader.end().cloned(),
    })
}
