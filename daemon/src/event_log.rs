//! The logging thread's side of the engine's events: the decode loop
//! sends them over a bounded channel (and counts what it cannot send);
//! here they become log lines, routine ones rate-limited.

/// Logs engine events; routine ones (rejects, late and duplicate bins) at
/// most five per second per kind, with a count of the rest.
use std::time::{Duration, Instant};

use crossbeam_channel::Receiver;
use decoder_core::engine::slot_engine::EngineEvent;

use crate::rt_loop::TimedEvent;

pub(crate) fn log_events(events: Receiver<TimedEvent>) {
    let mut window_start = Instant::now();
    let mut shown = [0u32; 3];
    let mut suppressed = [0u64; 3];
    while let Ok((_, event)) = events.recv() {
        if window_start.elapsed() >= Duration::from_secs(1) {
            let total: u64 = suppressed.iter().sum();
            if total > 0 {
                tracing::warn!(
                    rejected = suppressed[0],
                    late = suppressed[1],
                    duplicate_or_stray = suppressed[2],
                    "{total} more routine events in the last second not logged (see ctl status counters)"
                );
            }
            window_start = Instant::now();
            shown = [0; 3];
            suppressed = [0; 3];
        }
        let routine = match event {
            EngineEvent::Rejected(_) => Some(0),
            EngineEvent::Late { .. } => Some(1),
            EngineEvent::Duplicate { .. } | EngineEvent::Stray { .. } => Some(2),
            _ => None,
        };
        if let Some(k) = routine {
            if shown[k] >= 5 {
                suppressed[k] += 1;
                continue;
            }
            shown[k] += 1;
        }
        match event {
            EngineEvent::Rejected(r) => tracing::warn!(reason = r.name(), "datagram rejected: {r}"),
            EngineEvent::Late { seq } => tracing::warn!(
                seq,
                "bin arrived after its deadline; dropped (its slot was coasted)"
            ),
            EngineEvent::Duplicate { seq } => tracing::warn!(seq, "duplicate bin dropped"),
            EngineEvent::Stray { seq } => tracing::warn!(
                seq,
                "bin far outside the expected seq dropped as a stray (a second in sequence would start a new stream)"
            ),
            EngineEvent::StreamStarted { seq, .. } => {
                tracing::info!(seq, "stream started: bin clock anchored")
            }
            EngineEvent::NewStream { expected_seq, seq } => tracing::warn!(
                expected_seq,
                seq,
                "seq jumped outside the reorder window: new stream, decoder reset, supervisor halted"
            ),
            EngineEvent::Transition(t) => {
                let reason = t.reason;
                if matches!(
                    t.to,
                    decoder_core::engine::supervisor::SupervisorState::Halted
                ) {
                    tracing::warn!(
                        seq = t.seq,
                        "{} -> {} ({reason})",
                        t.from.name(),
                        t.to.name()
                    );
                } else {
                    tracing::info!(
                        seq = t.seq,
                        "{} -> {} ({reason})",
                        t.from.name(),
                        t.to.name()
                    );
                }
            }
            EngineEvent::ModelChanged { seq } => {
                tracing::info!(seq, "model swapped in at this bin")
            }
            EngineEvent::ChannelLeftOut {
                seq,
                channel,
                reason,
            } => tracing::warn!(
                seq,
                channel,
                "channel {channel} left out of the decode: {}",
                reason.name()
            ),
            EngineEvent::ChannelRestored { seq, channel } => tracing::info!(
                seq,
                channel,
                "channel {channel} behaves again: back in the decode"
            ),
            EngineEvent::DriftHandling { seq, enabled } => {
                tracing::info!(seq, "drift handling {}", if enabled { "on" } else { "off" })
            }
        }
    }
}
