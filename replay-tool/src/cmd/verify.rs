//! `replay-tool verify LOG`: replay a recorded session through the
//! daemon's own slot engine, with the logged model, settings, operator
//! commands and model loads, and check that every slot's estimate, command,
//! state and flags come out as recorded — bit for bit (same build), or
//! within `--tolerance` (across builds). The first difference is reported
//! as seq, field, recorded value, replayed value; exit 1. Exit 0 only when
//! every recorded slot was checked (PROTOCOL.md §5).
//!
//! Also here: `replay --compare FILE.csv` with `--model OTHER`, the same
//! bins decoded by the logged model and by another one, side by side — how
//! a user checks a retrained decoder on a real session before it is loaded.

use decoder_core::session::open::Session;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use anyhow::{Result, bail};
use decoder_core::ModelFile;
use decoder_core::engine::session_replay::SessionReplayError;
use decoder_core::formats::log_replay::{LogReplayError, replay_log};
use decoder_core::formats::session_log::{LogEnd, LogReader};
use decoder_core::wire::packet::VelocityPacket;

use crate::CheckFailed;
use crate::output::write_atomic;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// The session log (.vdlog) decoderd recorded.
    pub log: PathBuf,
    /// Compare floats within this relative tolerance instead of bit for
    /// bit (for a log recorded by another build or on another CPU).
    #[arg(long)]
    pub tolerance: Option<f64>,
}

pub fn run(args: &Args) -> Result<()> {
    if let Some(t) = args.tolerance {
        if !(t.is_finite() && t >= 0.0) {
            bail!("--tolerance {t}: must be a finite number ≥ 0");
        }
    }
    Session::log_at(&args.log, "verify")?;
    let v = verify(&args.log, args.tolerance)?;
    let how = match args.tolerance {
        None => "bit for bit".to_string(),
        Some(t) => format!("within relative tolerance {t:e}"),
    };
    match v.end {
        Some(LogEnd::TornTail { offset, bytes }) => println!(
            "verified {} up to a torn tail — a partial check: {} slots before byte {offset} reproduced {how}; the last {bytes} bytes, a record cut short when the daemon stopped, were dropped unchecked",
            args.log.display(),
            v.slots
        ),
        Some(LogEnd::Unclosed) => println!(
            "verified {}: {} slots reproduced {how}; the log has no end record (the daemon was killed or is still running), so this is every slot it holds",
            args.log.display(),
            v.slots
        ),
        _ => println!(
            "verified {}: {} slots, every estimate, command, state and flag reproduced {how}",
            args.log.display(),
            v.slots
        ),
    }
    Ok(())
}

/// The first field that differs.
#[derive(Debug, PartialEq)]
pub struct Mismatch {
    pub seq: u64,
    pub field: String,
    pub recorded: String,
    pub replayed: String,
}

impl std::fmt::Display for Mismatch {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "seq {}: {} recorded {} but replayed {}",
            self.seq, self.field, self.recorded, self.replayed
        )
    }
}

fn float_equal(a: f64, b: f64, tolerance: Option<f64>) -> bool {
    match tolerance {
        None => a.to_bits() == b.to_bits(),
        Some(t) => a == b || (a - b).abs() <= t * a.abs().max(b.abs()).max(1.0),
    }
}

/// Compares two velocity packets field by field; `sent_ns` is a clock
/// reading, not a decision, and is not compared.
pub fn compare_packets(
    recorded: &[u8],
    replayed: &[u8],
    tolerance: Option<f64>,
) -> Option<Mismatch> {
    let (r, p) = match (
        VelocityPacket::parse(recorded),
        VelocityPacket::parse(replayed),
    ) {
        (Ok(r), Ok(p)) => (r, p),
        (Err(e), _) => {
            return Some(Mismatch {
                seq: 0,
                field: "packet".into(),
                recorded: format!("unreadable ({e})"),
                replayed: "a packet".into(),
            });
        }
        (_, Err(e)) => {
            return Some(Mismatch {
                seq: 0,
                field: "packet".into(),
                recorded: "a packet".into(),
                replayed: format!("unreadable ({e})"),
            });
        }
    };
    let m = |field: &str, a: String, b: String| {
        Some(Mismatch {
            seq: r.seq,
            field: field.into(),
            recorded: a,
            replayed: b,
        })
    };
    if r.seq != p.seq {
        return m("seq", r.seq.to_string(), p.seq.to_string());
    }
    if r.state != p.state {
        return m("state", r.state.to_string(), p.state.to_string());
    }
    if r.flags != p.flags {
        return m(
            "flags",
            format!("{:#06b}", r.flags),
            format!("{:#06b}", p.flags),
        );
    }
    if r.origin_ns != p.origin_ns {
        return m(
            "origin_ns",
            r.origin_ns.to_string(),
            p.origin_ns.to_string(),
        );
    }
    if r.recv_ns != p.recv_ns {
        return m("recv_ns", r.recv_ns.to_string(), p.recv_ns.to_string());
    }
    if r.command.len() != p.command.len() {
        return m(
            "dims",
            r.command.len().to_string(),
            p.command.len().to_string(),
        );
    }
    for (name, a, b) in [
        ("estimate", &r.estimate, &p.estimate),
        ("command", &r.command, &p.command),
    ] {
        for (i, (x, y)) in a.iter().zip(b.iter()).enumerate() {
            if !float_equal(*x, *y, tolerance) {
                return m(&format!("{name}[{i}]"), format!("{x:e}"), format!("{y:e}"));
            }
        }
    }
    None
}

pub struct Verified {
    pub slots: u64,
    pub end: Option<LogEnd>,
}

/// Replays `log` and checks every recorded slot.
pub fn verify(log: &Path, tolerance: Option<f64>) -> Result<Verified> {
    let mut reader = LogReader::open(log)?;
    let mut first: Option<Mismatch> = None;
    let mut checked = 0u64;
    let result = replay_log(&mut reader, None, |slot| {
        if first.is_some() {
            return;
        }
        if let Some(recorded) = slot.recorded {
            checked += 1;
            first = compare_packets(recorded, slot.replayed, tolerance);
        }
    });
    let summary = match result {
        Ok(s) => s,
        Err(LogReplayError {
            problem: SessionReplayError::UnmatchedSent { seq, offset },
            ..
        }) if first.is_none() => {
            return Err(CheckFailed(format!(
                "seq {seq}: the log records a sent packet (byte {offset}) for a slot the replay does not produce"
            ))
            .into());
        }
        Err(e) if first.is_none() => return Err(e.into()),
        Err(_) => Default::default(),
    };
    if let Some(m) = first {
        return Err(CheckFailed(format!("{}: {m}", log.display())).into());
    }
    if let Some(LogEnd::Corrupt {
        offset,
        problem,
        seq,
    }) = &summary.end
    {
        let at = seq.map_or_else(String::new, |s| format!("seq {s}: "));
        return Err(CheckFailed(format!(
            "{}: {at}{problem} at byte {offset}; the log was changed or damaged there (verified {checked} slots before it)",
            log.display()
        ))
        .into());
    }
    if summary.records_lost > 0 {
        return Err(CheckFailed(format!(
            "{}: the recorder lost {} records in this session; it cannot be verified past the loss",
            log.display(),
            summary.records_lost
        ))
        .into());
    }
    if checked == 0 {
        bail!("{}: the log has no sent packets to verify", log.display());
    }
    Ok(Verified {
        slots: checked,
        end: summary.end,
    })
}

/// Decodes the log's bins with the logged model(s) and with `other`, and
/// writes both side by side; returns (slots, RMS difference per output).
pub fn compare_models(log: &Path, other: &ModelFile, out: &Path) -> Result<(usize, Vec<f64>)> {
    let collect = |model: Option<&ModelFile>| -> Result<(Vec<VelocityPacket>, Vec<String>)> {
        let mut reader = LogReader::open(log)?;
        let outputs = reader.header().outputs.clone();
        let mut packets = Vec::new();
        replay_log(&mut reader, model, |slot| {
            if let Ok(p) = VelocityPacket::parse(slot.replayed) {
                packets.push(p);
            }
        })?;
        Ok((packets, outputs))
    };
    let (logged, outputs) = collect(None)?;
    let (theirs, _) = collect(Some(other))?;
    let n = logged.len().min(theirs.len());
    let mut csv = String::from("seq,missing");
    for o in &outputs {
        let _ = write!(csv, ",{o}_logged_model,{o}_other_model");
    }
    csv.push('\n');
    let mut sq = vec![0.0; outputs.len()];
    for (a, b) in logged.iter().zip(&theirs).take(n) {
        let _ = write!(csv, "{},{}", a.seq, a.flags & 1);
        for ((s, x), y) in sq.iter_mut().zip(&a.estimate).zip(&b.estimate) {
            let _ = write!(csv, ",{x},{y}");
            *s += (x - y).powi(2);
        }
        csv.push('\n');
    }
    write_atomic(out, csv.as_bytes())?;
    Ok((n, sq.iter().map(|s| (s / n.max(1) as f64).sqrt()).collect()))
}

#[cfg(test)]
mod tests {
    use super::*;
    use decoder_core::wire::packet::{VelocityFields, encode_velocity, velocity_len};

    fn packet(estimate: [f64; 2]) -> Vec<u8> {
        let mut out = vec![0; velocity_len(2)];
        encode_velocity(
            &VelocityFields {
                state: 1,
                seq: 7,
                origin_ns: 1,
                recv_ns: 2,
                sent_ns: 3,
                flags: 0,
                command: &[0.0, 0.0],
                estimate: &estimate,
                click_prob: 0.0,
            },
            &mut out,
        );
        out
    }

    #[test]
    fn bit_for_bit_unless_a_tolerance_is_given() {
        let a = packet([1.0, 2.0]);
        let b = packet([1.0, 2.0 + 1e-12]);
        let m = compare_packets(&a, &b, None).unwrap();
        assert_eq!((m.seq, m.field.as_str()), (7, "estimate[1]"));
        assert_eq!(compare_packets(&a, &b, Some(1e-9)), None);
        assert_eq!(compare_packets(&a, &a, None), None);
    }
}
