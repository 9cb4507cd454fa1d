//! The session log: everything the daemon received, sent and decided, in
//! the order it happened, so a session can be read back and replayed.
//!
//! Layout (little-endian). File header: 8-byte magic `VDECSLOG`, u32 format
//! version, u32 header length, u32 CRC-32 of the header, then the header as
//! JSON ([`LogHeader`]: daemon version, engine settings, stream shape).
//! Then records, each `u32 length | u32 CRC-32 | u8 kind | u64 time_ns |
//! body`, where length and CRC cover kind, time and body. Kinds are in
//! [`RecordKind`]. A record cut short by a crash (declared length past the
//! end of the file, or a bad checksum on the very last record) is a torn
//! tail: the reader stops before it and says how many bytes it dropped. A
//! bad checksum with more data behind it is corruption, reported with the
//! record's offset.
//!
//! Writing a record appends to a caller's buffer, so the daemon's real-time
//! thread encodes without allocating; the file itself is written by the
//! daemon's recorder thread.

use std::fs::File;
use std::io::{BufReader, Read};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::engine::slot_engine::{EngineSettings, OperatorCommand};

pub const LOG_MAGIC: &[u8; 8] = b"VDECSLOG";
/// Version this build writes. Version 4 records `drift.left_out_after_s`
/// (a Kalman filter's change of channels left out takes effect that long
/// after it is judged); a log of an earlier version changed at once, and
/// is read with 0. Version 3 added the operator's drift on and off
/// (operator codes 4 and 5); version 2 added task records (kind 8); logs
/// of versions 1 and 2, which have neither, are read too.
pub const LOG_FORMAT_VERSION: u32 = 4;
/// Oldest version this build reads.
pub const LOG_OLDEST_VERSION: u32 = 1;
const FILE_HEADER_LEN: usize = 8 + 4 + 4 + 4;
const RECORD_PREFIX_LEN: usize = 4 + 4;
/// kind + time_ns
const RECORD_FIXED_LEN: usize = 1 + 8;
/// Largest record a reader accepts (a model of a very large array).
const MAX_RECORD_LEN: usize = 1 << 30;
/// Largest header a reader accepts.
const MAX_HEADER_LEN: usize = 1 << 24;

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[repr(u8)]
pub enum RecordKind {
    /// A datagram as read from the socket; time is its `recv_ns`.
    Datagram = 1,
    /// A velocity packet as sent; time is the `decided_ns` the engine
    /// answered the slot on.
    Sent = 2,
    /// An informational event as JSON (transition, reject, late bin, ...).
    Event = 3,
    /// An operator's arm, disarm or halt as the real-time loop applied it:
    /// one byte command, one byte outcome (0 applied, 1 refused).
    Operator = 4,
    /// A model file (the whole file's bytes) taking effect at this point.
    Model = 5,
    /// The recorder lost records here (u64 count); a replay cannot be
    /// verified across this point.
    Lost = 6,
    /// The daemon stopped cleanly; body is a JSON summary.
    End = 7,
    /// A datagram from the task socket as read (PROTOCOL.md §6); time is
    /// its receive time. Recorded whether or not it parses.
    Task = 8,
}

impl RecordKind {
    fn from_u8(b: u8) -> Option<RecordKind> {
        Some(match b {
            1 => RecordKind::Datagram,
            2 => RecordKind::Sent,
            3 => RecordKind::Event,
            4 => RecordKind::Operator,
            5 => RecordKind::Model,
            6 => RecordKind::Lost,
            7 => RecordKind::End,
            8 => RecordKind::Task,
            _ => return None,
        })
    }
}

/// What a log says about itself.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LogHeader {
    pub daemon_version: String,
    /// Monotonic ns when the log was opened.
    pub opened_ns: u64,
    /// Wall-clock time the log was opened, RFC 3339, as the daemon saw it.
    pub opened_at: String,
    pub n_channels: usize,
    /// u32 µs on disk.
    #[serde(with = "crate::bin_width::as_us", rename = "bin_us")]
    pub bin_width: crate::bin_width::BinWidth,
    pub outputs: Vec<String>,
    pub settings: EngineSettings,
}

/// One record, decoded.
#[derive(Clone, Debug, PartialEq)]
pub enum LogRecord {
    Datagram {
        recv_ns: u64,
        bytes: Vec<u8>,
    },
    Sent {
        decided_ns: u64,
        packet: Vec<u8>,
    },
    Event {
        time_ns: u64,
        json: String,
    },
    Operator {
        time_ns: u64,
        command: OperatorCommand,
        applied: bool,
    },
    Model {
        time_ns: u64,
        model_file: Vec<u8>,
    },
    Lost {
        time_ns: u64,
        records: u64,
    },
    End {
        time_ns: u64,
        json: String,
    },
    Task {
        recv_ns: u64,
        bytes: Vec<u8>,
    },
}

#[derive(Debug, thiserror::Error)]
pub enum SessionLogError {
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: not a session log (no VDECSLOG magic); pass the .vdlog file the daemon wrote")]
    NotALog { path: PathBuf },
    #[error(
        "{path}: session log format version {version}; this build reads versions {LOG_OLDEST_VERSION} to {LOG_FORMAT_VERSION}"
    )]
    Version { path: PathBuf, version: u32 },
    #[error(
        "{path}: the log ends inside its header ({bytes} bytes): the daemon stopped before the header was written, and the file holds no session"
    )]
    CutInHeader { path: PathBuf, bytes: u64 },
    #[error("{path}: the log header is damaged ({problem}); the file cannot be read")]
    Header { path: PathBuf, problem: String },
}

/// How reading a log ended.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
#[serde(tag = "end", rename_all = "snake_case")]
pub enum LogEnd {
    /// An End record closed the log.
    Clean,
    /// Every record is intact but no End record: the daemon was killed or
    /// is still running.
    Unclosed,
    /// The last record was cut short; `bytes` bytes at `offset` were dropped.
    TornTail { offset: u64, bytes: u64 },
    /// A record in the middle fails its checksum or has an unknown kind;
    /// reading stopped at `offset`. `seq` is the bin seq the damaged record
    /// appears to carry (a datagram or a sent packet), when readable.
    Corrupt {
        offset: u64,
        problem: String,
        seq: Option<u64>,
    },
}

/// Appends one record to `out`. The body is the concatenation of `parts`,
/// so callers need not copy a datagram to prefix it.
pub fn encode_record(out: &mut Vec<u8>, kind: RecordKind, time_ns: u64, parts: &[&[u8]]) {
    let body: usize = parts.iter().map(|p| p.len()).sum();
    let len = (RECORD_FIXED_LEN + body) as u32;
    let mut crc = crc32fast::Hasher::new();
    let kind_byte = [kind as u8];
    let time = time_ns.to_le_bytes();
    crc.update(&kind_byte);
    crc.update(&time);
    for p in parts {
        crc.update(p);
    }
    out.extend_from_slice(&len.to_le_bytes());
    out.extend_from_slice(&crc.finalize().to_le_bytes());
    out.extend_from_slice(&kind_byte);
    out.extend_from_slice(&time);
    for p in parts {
        out.extend_from_slice(p);
    }
}

/// The length, checksum, kind and time of a record whose body is `body`,
/// for writers that send the body separately.
pub fn encode_record_prefix(kind: RecordKind, time_ns: u64, body: &[u8]) -> Vec<u8> {
    let len = (RECORD_FIXED_LEN + body.len()) as u32;
    let kind_byte = [kind as u8];
    let time = time_ns.to_le_bytes();
    let mut crc = crc32fast::Hasher::new();
    crc.update(&kind_byte);
    crc.update(&time);
    crc.update(body);
    let mut out = Vec::with_capacity(RECORD_PREFIX_LEN + RECORD_FIXED_LEN);
    out.extend_from_slice(&len.to_le_bytes());
    out.extend_from_slice(&crc.finalize().to_le_bytes());
    out.extend_from_slice(&kind_byte);
    out.extend_from_slice(&time);
    out
}

/// Bytes one record with a body of `body_len` takes.
pub fn record_len(body_len: usize) -> usize {
    RECORD_PREFIX_LEN + RECORD_FIXED_LEN + body_len
}

/// The file header for `header`.
pub fn encode_header(header: &LogHeader) -> Vec<u8> {
    let json = serde_json::to_vec(header).expect("log header serialises");
    let mut out = Vec::with_capacity(FILE_HEADER_LEN + json.len());
    out.extend_from_slice(LOG_MAGIC);
    out.extend_from_slice(&LOG_FORMAT_VERSION.to_le_bytes());
    out.extend_from_slice(&(json.len() as u32).to_le_bytes());
    out.extend_from_slice(&crc32fast::hash(&json).to_le_bytes());
    out.extend_from_slice(&json);
    out
}

/// Reads a log record by record.
pub struct LogReader {
    path: PathBuf,
    input: BufReader<File>,
    offset: u64,
    file_len: u64,
    header: LogHeader,
    end: Option<LogEnd>,
    saw_end_record: bool,
}

impl LogReader {
    pub fn open(path: &Path) -> Result<LogReader, SessionLogError> {
        let io = |source| SessionLogError::Io {
            path: path.to_path_buf(),
            source,
        };
        let file = File::open(path).map_err(io)?;
        let file_len = file.metadata().map_err(io)?.len();
        let mut input = BufReader::with_capacity(1 << 16, file);
        let mut fixed = [0u8; FILE_HEADER_LEN];
        if file_len >= 8 && file_len < FILE_HEADER_LEN as u64 {
            let mut magic = [0u8; 8];
            if input.read_exact(&mut magic).is_ok() && &magic == LOG_MAGIC {
                return Err(SessionLogError::CutInHeader {
                    path: path.to_path_buf(),
                    bytes: file_len,
                });
            }
        }
        if input.read_exact(&mut fixed).is_err() || &fixed[0..8] != LOG_MAGIC {
            return Err(SessionLogError::NotALog {
                path: path.to_path_buf(),
            });
        }
        let version = u32::from_le_bytes(fixed[8..12].try_into().expect("4 bytes"));
        if !(LOG_OLDEST_VERSION..=LOG_FORMAT_VERSION).contains(&version) {
            return Err(SessionLogError::Version {
                path: path.to_path_buf(),
                version,
            });
        }
        let header_err = |problem: String| SessionLogError::Header {
            path: path.to_path_buf(),
            problem,
        };
        let len = u32::from_le_bytes(fixed[12..16].try_into().expect("4 bytes")) as usize;
        let crc = u32::from_le_bytes(fixed[16..20].try_into().expect("4 bytes"));
        if len > MAX_HEADER_LEN {
            return Err(header_err(format!("declared length {len} is impossible")));
        }
        if (FILE_HEADER_LEN + len) as u64 > file_len {
            return Err(SessionLogError::CutInHeader {
                path: path.to_path_buf(),
                bytes: file_len,
            });
        }
        let mut json = vec![0u8; len];
        input.read_exact(&mut json).map_err(io)?;
        if crc32fast::hash(&json) != crc {
            return Err(header_err("checksum mismatch".into()));
        }
        let mut header: LogHeader =
            serde_json::from_slice(&json).map_err(|e| header_err(e.to_string()))?;
        if version < 4 {
            // Recorded when a change of channels left out took effect at
            // the bin it was judged.
            header.settings.drift.left_out_after_s = 0.0;
        }
        Ok(LogReader {
            path: path.to_path_buf(),
            input,
            offset: (FILE_HEADER_LEN + len) as u64,
            file_len,
            header,
            end: None,
            saw_end_record: false,
        })
    }

    pub fn header(&self) -> &LogHeader {
        &self.header
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// How the log ended; `None` until [`LogReader::next_record`] has
    /// returned `None`.
    pub fn end(&self) -> Option<&LogEnd> {
        self.end.as_ref()
    }

    /// Byte offset of the next record.
    pub fn offset(&self) -> u64 {
        self.offset
    }

    /// The next intact record, or `None` at the end of the readable part
    /// (see [`LogReader::end`] for why it ended).
    pub fn next_record(&mut self) -> Option<LogRecord> {
        if self.end.is_some() {
            return None;
        }
        let remaining = self.file_len - self.offset;
        if remaining == 0 {
            self.end = Some(if self.saw_end_record {
                LogEnd::Clean
            } else {
                LogEnd::Unclosed
            });
            return None;
        }
        let torn = |s: &Self| LogEnd::TornTail {
            offset: s.offset,
            bytes: remaining,
        };
        if remaining < (RECORD_PREFIX_LEN + RECORD_FIXED_LEN) as u64 {
            self.end = Some(torn(self));
            return None;
        }
        let mut prefix = [0u8; RECORD_PREFIX_LEN];
        if self.input.read_exact(&mut prefix).is_err() {
            self.end = Some(torn(self));
            return None;
        }
        let len = u32::from_le_bytes(prefix[0..4].try_into().expect("4 bytes")) as usize;
        let crc = u32::from_le_bytes(prefix[4..8].try_into().expect("4 bytes"));
        let total = (RECORD_PREFIX_LEN + len) as u64;
        if total > remaining {
            // A crash while writing the last batch cuts its last record
            // short; a damaged length in the middle looks the same, except
            // that intact records follow it.
            self.end = Some(match self.intact_record_after() {
                Some(next) => LogEnd::Corrupt {
                    offset: self.offset,
                    problem: format!(
                        "record length {len} runs past the end of the file, yet an intact record follows at byte {next}"
                    ),
                    seq: None,
                },
                None => torn(self),
            });
            return None;
        }
        if !(RECORD_FIXED_LEN..=MAX_RECORD_LEN).contains(&len) {
            self.end = Some(LogEnd::Corrupt {
                offset: self.offset,
                problem: format!("record length {len} is impossible"),
                seq: None,
            });
            return None;
        }
        let mut body = vec![0u8; len];
        if self.input.read_exact(&mut body).is_err() {
            self.end = Some(torn(self));
            return None;
        }
        if crc32fast::hash(&body) != crc {
            // The last record failing its checksum is a torn write, unless
            // its length is what is wrong and an intact record hides
            // inside what it claims.
            self.end = Some(
                if total == remaining && self.intact_record_after().is_none() {
                    torn(self)
                } else {
                    LogEnd::Corrupt {
                        offset: self.offset,
                        problem: "record checksum mismatch".into(),
                        seq: seq_hint(&body),
                    }
                },
            );
            return None;
        }
        let at = self.offset;
        self.offset += total;
        match decode_body(&body) {
            Some(r) => {
                if matches!(r, LogRecord::End { .. }) {
                    self.saw_end_record = true;
                }
                Some(r)
            }
            None => {
                self.end = Some(LogEnd::Corrupt {
                    offset: at,
                    problem: format!("unknown record kind {} or short body", body[0]),
                    seq: None,
                });
                None
            }
        }
    }
}

impl LogReader {
    /// The offset of the first intact record after the one at `offset`,
    /// within [`RESYNC_WINDOW`] bytes: a plausible length, a known kind, a
    /// time within a year of the log's opening, and a matching checksum.
    fn intact_record_after(&self) -> Option<u64> {
        use std::io::{Read, Seek, SeekFrom};
        let start = self.offset + 1;
        let end = self.file_len.min(start + RESYNC_WINDOW);
        let mut file = File::open(&self.path).ok()?;
        file.seek(SeekFrom::Start(start)).ok()?;
        let mut buf = Vec::with_capacity((end - start) as usize);
        file.take(end - start).read_to_end(&mut buf).ok()?;
        let opened = self.header.opened_ns;
        let earliest = opened.saturating_sub(1_000_000_000);
        let latest = opened.saturating_add(366 * 86_400 * 1_000_000_000);
        let fixed = RECORD_PREFIX_LEN + RECORD_FIXED_LEN;
        for p in 0..buf.len().saturating_sub(fixed) {
            let len = u32::from_le_bytes(buf[p..p + 4].try_into().expect("4 bytes")) as usize;
            if !(RECORD_FIXED_LEN..=MAX_RECORD_LEN).contains(&len)
                || p + RECORD_PREFIX_LEN + len > buf.len()
                || RecordKind::from_u8(buf[p + 8]).is_none()
            {
                continue;
            }
            let time = u64::from_le_bytes(buf[p + 9..p + 17].try_into().expect("8 bytes"));
            if !(earliest..=latest).contains(&time) {
                continue;
            }
            let crc = u32::from_le_bytes(buf[p + 4..p + 8].try_into().expect("4 bytes"));
            if crc32fast::hash(&buf[p + 8..p + 8 + len]) == crc {
                return Some(start + p as u64);
            }
        }
        None
    }
}

/// How far past a damaged length the reader looks for an intact record.
const RESYNC_WINDOW: u64 = 16 << 20;

/// The seq a datagram or sent-packet record carries (both packet layouts
/// have it at byte 8), read without trusting the checksum.
fn seq_hint(body: &[u8]) -> Option<u64> {
    let kind = RecordKind::from_u8(*body.first()?)?;
    if !matches!(kind, RecordKind::Datagram | RecordKind::Sent) {
        return None;
    }
    let at = RECORD_FIXED_LEN + 8;
    Some(u64::from_le_bytes(body.get(at..at + 8)?.try_into().ok()?))
}

fn decode_body(body: &[u8]) -> Option<LogRecord> {
    let kind = RecordKind::from_u8(body[0])?;
    let time_ns = u64::from_le_bytes(body[1..9].try_into().ok()?);
    let rest = &body[9..];
    Some(match kind {
        RecordKind::Datagram => LogRecord::Datagram {
            recv_ns: time_ns,
            bytes: rest.to_vec(),
        },
        RecordKind::Sent => LogRecord::Sent {
            decided_ns: time_ns,
            packet: rest.to_vec(),
        },
        RecordKind::Event => LogRecord::Event {
            time_ns,
            json: String::from_utf8_lossy(rest).into_owned(),
        },
        RecordKind::Operator => {
            let command = match rest.first()? {
                1 => OperatorCommand::Arm,
                2 => OperatorCommand::Disarm,
                3 => OperatorCommand::Halt,
                4 => OperatorCommand::DriftOn,
                5 => OperatorCommand::DriftOff,
                _ => return None,
            };
            LogRecord::Operator {
                time_ns,
                command,
                applied: *rest.get(1)? == 0,
            }
        }
        RecordKind::Model => LogRecord::Model {
            time_ns,
            model_file: rest.to_vec(),
        },
        RecordKind::Lost => LogRecord::Lost {
            time_ns,
            records: u64::from_le_bytes(rest.get(0..8)?.try_into().ok()?),
        },
        RecordKind::End => LogRecord::End {
            time_ns,
            json: String::from_utf8_lossy(rest).into_owned(),
        },
        RecordKind::Task => LogRecord::Task {
            recv_ns: time_ns,
            bytes: rest.to_vec(),
        },
    })
}

/// The one-byte code of an operator command in an Operator record.
pub fn operator_code(command: OperatorCommand) -> u8 {
    match command {
        OperatorCommand::Arm => 1,
        OperatorCommand::Disarm => 2,
        OperatorCommand::Halt => 3,
        OperatorCommand::DriftOn => 4,
        OperatorCommand::DriftOff => 5,
    }
}
