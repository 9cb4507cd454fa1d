//! The task packet (PROTOCOL.md §6): what the participant saw — cursor,
//! target, the phase of the trial — sent by the task computer beside the
//! bins. The daemon records it and never decodes from it; offline it turns
//! a session log into a calibration block (the kinematics the task showed)
//! and gives intention re-estimation its cursor and target.
//!
//! Parsing runs on the daemon's real-time thread, so it returns a value or
//! a typed reason for any input, never panics and never allocates: the
//! state lives in fixed arrays of the largest dimension the packet allows.

/// ASCII `NTSK`.
pub const TASK_MAGIC: [u8; 4] = *b"NTSK";
pub const TASK_VERSION: u16 = 1;
/// Fixed fields before the per-dimension arrays.
pub const TASK_HEADER_LEN: usize = 40;
/// Most position dimensions a task packet carries.
pub const MAX_TASK_DIMS: usize = 8;

/// Flag: the cursor follows the decoder (a closed-loop block).
pub const TASK_FLAG_CLOSED_LOOP: u32 = 1 << 0;
/// Flag: `target_pos` and `target_radius` hold a target.
pub const TASK_FLAG_TARGET_VALID: u32 = 1 << 1;
/// Flag: the task is cueing a click (the participant is attempting one).
pub const TASK_FLAG_CLICK_CUE: u32 = 1 << 2;
/// Flag: the task selects a target by click (not by dwelling in it).
pub const TASK_FLAG_SELECT_BY_CLICK: u32 = 1 << 3;

/// The exact length of a task packet with `dims` position dimensions.
pub const fn task_packet_len(dims: usize) -> usize {
    TASK_HEADER_LEN + 24 * dims
}

/// The phase of the trial the task was in.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Phase {
    /// Between trials (no target to reach).
    Between = 0,
    /// Target shown, the participant reaches for it.
    Reach = 1,
    /// Holding inside the target.
    Hold = 2,
    /// The trial ended in success.
    Success = 3,
    /// The trial ended in failure (timeout, left the target).
    Failure = 4,
}

impl Phase {
    pub fn from_u8(b: u8) -> Option<Phase> {
        Some(match b {
            0 => Phase::Between,
            1 => Phase::Reach,
            2 => Phase::Hold,
            3 => Phase::Success,
            4 => Phase::Failure,
            _ => return None,
        })
    }

    pub fn name(self) -> &'static str {
        match self {
            Phase::Between => "between",
            Phase::Reach => "reach",
            Phase::Hold => "hold",
            Phase::Success => "success",
            Phase::Failure => "failure",
        }
    }

    /// A phase inside a trial (reach, hold, or its outcome).
    pub fn in_trial(self) -> bool {
        self != Phase::Between
    }
}

/// One task packet, decoded. Only the first `dims` entries of each array
/// are meaningful; the rest are zero.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct TaskState {
    pub dims: u8,
    pub phase: Phase,
    /// Seq of the last bin the task had seen when it drew this state.
    pub bin_seq: u64,
    pub origin_ns: u64,
    pub trial: u32,
    pub flags: u32,
    pub target_radius: f64,
    pub cursor_pos: [f64; MAX_TASK_DIMS],
    pub cursor_vel: [f64; MAX_TASK_DIMS],
    pub target_pos: [f64; MAX_TASK_DIMS],
}

impl TaskState {
    /// A state of `dims` dimensions with everything else zero.
    pub fn new(dims: usize) -> TaskState {
        TaskState {
            dims: dims.clamp(1, MAX_TASK_DIMS) as u8,
            phase: Phase::Between,
            bin_seq: 0,
            origin_ns: 0,
            trial: 0,
            flags: 0,
            target_radius: 0.0,
            cursor_pos: [0.0; MAX_TASK_DIMS],
            cursor_vel: [0.0; MAX_TASK_DIMS],
            target_pos: [0.0; MAX_TASK_DIMS],
        }
    }

    pub fn dims(&self) -> usize {
        usize::from(self.dims)
    }

    pub fn closed_loop(&self) -> bool {
        self.flags & TASK_FLAG_CLOSED_LOOP != 0
    }

    pub fn target_valid(&self) -> bool {
        self.flags & TASK_FLAG_TARGET_VALID != 0
    }

    pub fn click_cued(&self) -> bool {
        self.flags & TASK_FLAG_CLICK_CUE != 0
    }

    pub fn cursor_pos(&self) -> &[f64] {
        &self.cursor_pos[..self.dims()]
    }

    pub fn cursor_vel(&self) -> &[f64] {
        &self.cursor_vel[..self.dims()]
    }

    pub fn target_pos(&self) -> &[f64] {
        &self.target_pos[..self.dims()]
    }
}

/// Why a task datagram was not taken. Each reason has its own counter.
#[derive(Clone, Copy, Debug, PartialEq, Eq, thiserror::Error)]
pub enum TaskReject {
    #[error("datagram of {len} bytes is shorter than the 40-byte task header")]
    TooShort { len: usize },
    #[error("magic is not NTSK")]
    BadMagic,
    #[error("task packet version {version}; this daemon reads version 1")]
    BadVersion { version: u16 },
    #[error("dims {dims} is outside 1..=8")]
    DimsOutOfRange { dims: u8 },
    #[error("datagram of {len} bytes; {dims} dimensions need exactly {expected}")]
    LengthMismatch {
        len: usize,
        dims: u8,
        expected: usize,
    },
    #[error("phase {phase} is not one of 0 between, 1 reach, 2 hold, 3 success, 4 failure")]
    UnknownPhase { phase: u8 },
    #[error("{field} is not finite (or a target radius below zero)")]
    BadNumber { field: &'static str },
}

/// Number of distinct task reject reasons.
pub const N_TASK_REJECT_REASONS: usize = 7;

impl TaskReject {
    pub fn index(&self) -> usize {
        match self {
            TaskReject::TooShort { .. } => 0,
            TaskReject::BadMagic => 1,
            TaskReject::BadVersion { .. } => 2,
            TaskReject::DimsOutOfRange { .. } => 3,
            TaskReject::LengthMismatch { .. } => 4,
            TaskReject::UnknownPhase { .. } => 5,
            TaskReject::BadNumber { .. } => 6,
        }
    }

    /// Counter names, in [`TaskReject::index`] order.
    pub const NAMES: [&'static str; N_TASK_REJECT_REASONS] = [
        "too_short",
        "bad_magic",
        "bad_version",
        "dims_out_of_range",
        "length_mismatch",
        "unknown_phase",
        "bad_number",
    ];

    pub fn name(&self) -> &'static str {
        Self::NAMES[self.index()]
    }
}

fn u32_at(b: &[u8], at: usize) -> u32 {
    u32::from_le_bytes(b[at..at + 4].try_into().expect("4 bytes"))
}

fn u64_at(b: &[u8], at: usize) -> u64 {
    u64::from_le_bytes(b[at..at + 8].try_into().expect("8 bytes"))
}

fn f64_at(b: &[u8], at: usize) -> f64 {
    f64::from_le_bytes(b[at..at + 8].try_into().expect("8 bytes"))
}

/// Parses and checks a task datagram: magic, version, dims, exact length,
/// a known phase and finite numbers. Unknown flag bits are kept but
/// ignored, as PROTOCOL.md §6 says.
pub fn parse_task(datagram: &[u8]) -> Result<TaskState, TaskReject> {
    if datagram.len() < TASK_HEADER_LEN {
        return Err(TaskReject::TooShort {
            len: datagram.len(),
        });
    }
    if datagram[0..4] != TASK_MAGIC {
        return Err(TaskReject::BadMagic);
    }
    let version = u16::from_le_bytes([datagram[4], datagram[5]]);
    if version != TASK_VERSION {
        return Err(TaskReject::BadVersion { version });
    }
    let dims = datagram[6];
    if dims == 0 || usize::from(dims) > MAX_TASK_DIMS {
        return Err(TaskReject::DimsOutOfRange { dims });
    }
    let d = usize::from(dims);
    let expected = task_packet_len(d);
    if datagram.len() != expected {
        return Err(TaskReject::LengthMismatch {
            len: datagram.len(),
            dims,
            expected,
        });
    }
    let phase =
        Phase::from_u8(datagram[7]).ok_or(TaskReject::UnknownPhase { phase: datagram[7] })?;
    let mut state = TaskState::new(d);
    state.phase = phase;
    state.bin_seq = u64_at(datagram, 8);
    state.origin_ns = u64_at(datagram, 16);
    state.trial = u32_at(datagram, 24);
    state.flags = u32_at(datagram, 28);
    state.target_radius = f64_at(datagram, 32);
    if !(state.target_radius.is_finite() && state.target_radius >= 0.0) {
        return Err(TaskReject::BadNumber {
            field: "target_radius",
        });
    }
    let arrays: [(&mut [f64; MAX_TASK_DIMS], usize, &'static str); 3] = [
        (&mut state.cursor_pos, TASK_HEADER_LEN, "cursor_pos"),
        (&mut state.cursor_vel, TASK_HEADER_LEN + 8 * d, "cursor_vel"),
        (
            &mut state.target_pos,
            TASK_HEADER_LEN + 16 * d,
            "target_pos",
        ),
    ];
    for (values, at, field) in arrays {
        for (i, v) in values.iter_mut().take(d).enumerate() {
            *v = f64_at(datagram, at + 8 * i);
            if !v.is_finite() {
                return Err(TaskReject::BadNumber { field });
            }
        }
    }
    Ok(state)
}

/// Writes `state` as a task datagram into `out` (cleared first).
pub fn encode_task(state: &TaskState, out: &mut Vec<u8>) {
    let d = state.dims();
    out.clear();
    out.extend_from_slice(&TASK_MAGIC);
    out.extend_from_slice(&TASK_VERSION.to_le_bytes());
    out.push(state.dims);
    out.push(state.phase as u8);
    out.extend_from_slice(&state.bin_seq.to_le_bytes());
    out.extend_from_slice(&state.origin_ns.to_le_bytes());
    out.extend_from_slice(&state.trial.to_le_bytes());
    out.extend_from_slice(&state.flags.to_le_bytes());
    out.extend_from_slice(&state.target_radius.to_le_bytes());
    for values in [&state.cursor_pos, &state.cursor_vel, &state.target_pos] {
        for v in &values[..d] {
            out.extend_from_slice(&v.to_le_bytes());
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample() -> TaskState {
        let mut s = TaskState::new(2);
        s.phase = Phase::Reach;
        s.bin_seq = 41;
        s.origin_ns = 123_456_789;
        s.trial = 7;
        s.flags = TASK_FLAG_CLOSED_LOOP | TASK_FLAG_TARGET_VALID;
        s.target_radius = 1.5;
        s.cursor_pos[..2].copy_from_slice(&[1.0, -2.0]);
        s.cursor_vel[..2].copy_from_slice(&[3.0, 4.0]);
        s.target_pos[..2].copy_from_slice(&[8.0, 0.0]);
        s
    }

    #[test]
    fn the_layout_is_the_protocol_table() {
        // PROTOCOL.md §6: field offsets and the length 40 + 24·D.
        let mut b = Vec::new();
        encode_task(&sample(), &mut b);
        assert_eq!(b.len(), 40 + 24 * 2);
        assert_eq!(&b[0..4], b"NTSK");
        assert_eq!(u16::from_le_bytes([b[4], b[5]]), 1);
        assert_eq!(b[6], 2);
        assert_eq!(b[7], 1);
        assert_eq!(u64_at(&b, 8), 41);
        assert_eq!(u64_at(&b, 16), 123_456_789);
        assert_eq!(u32_at(&b, 24), 7);
        assert_eq!(u32_at(&b, 28), 3);
        assert_eq!(f64_at(&b, 32), 1.5);
        assert_eq!(f64_at(&b, 40), 1.0);
        assert_eq!(f64_at(&b, 48), -2.0);
        assert_eq!(f64_at(&b, 56), 3.0);
        assert_eq!(f64_at(&b, 72), 8.0);
        assert_eq!(parse_task(&b), Ok(sample()));
    }

    #[test]
    fn every_malformed_packet_gets_its_reason() {
        let mut good = Vec::new();
        encode_task(&sample(), &mut good);
        let with = |f: &dyn Fn(&mut Vec<u8>)| {
            let mut b = good.clone();
            f(&mut b);
            parse_task(&b).map_err(|e| e.name())
        };
        assert_eq!(with(&|b| b.truncate(39)), Err("too_short"));
        assert_eq!(with(&|b| b[0] = b'X'), Err("bad_magic"));
        assert_eq!(with(&|b| b[4] = 2), Err("bad_version"));
        assert_eq!(with(&|b| b[6] = 0), Err("dims_out_of_range"));
        assert_eq!(with(&|b| b[6] = 9), Err("dims_out_of_range"));
        assert_eq!(with(&|b| b[6] = 3), Err("length_mismatch"));
        assert_eq!(with(&|b| b.push(0)), Err("length_mismatch"));
        assert_eq!(with(&|b| b[7] = 5), Err("unknown_phase"));
        assert_eq!(
            with(&|b| b[32..40].copy_from_slice(&(-1.0f64).to_le_bytes())),
            Err("bad_number")
        );
        assert_eq!(
            with(&|b| b[64..72].copy_from_slice(&f64::NAN.to_le_bytes())),
            Err("bad_number")
        );
        // Unknown flag bits are ignored, not refused.
        assert!(with(&|b| b[31] = 0x80).is_ok());
    }

    #[test]
    fn any_bytes_parse_or_are_refused_without_a_panic() {
        let mut rng = 0x2545_f491_4f6c_dd1du64;
        let mut good = Vec::new();
        encode_task(&sample(), &mut good);
        for _ in 0..20_000 {
            rng ^= rng << 13;
            rng ^= rng >> 7;
            rng ^= rng << 17;
            let mut b = good.clone();
            b.truncate((rng % 200) as usize);
            let at = (rng >> 8) as usize % good.len();
            if at < b.len() {
                b[at] ^= (rng >> 20) as u8;
            }
            let _ = parse_task(&b);
        }
    }
}
