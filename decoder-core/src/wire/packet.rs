//! The two UDP packet layouts (PROTOCOL.md §1 bin packet, §2 velocity packet).
//!
//! Parsing a bin packet is the first thing the daemon does with bytes from
//! the network, so it must return a value or a typed reason for any input
//! and never panic. Encoding a velocity packet writes into a caller's buffer
//! so the per-bin path allocates nothing. Both live here, in the pure core,
//! so the offline replay of a recorded session parses and encodes exactly as
//! the daemon did.

use crate::bin_width::BinWidth;

/// ASCII `NBIN`.
pub const BIN_MAGIC: [u8; 4] = *b"NBIN";
/// ASCII `NVEL`.
pub const VELOCITY_MAGIC: [u8; 4] = *b"NVEL";
/// Version of the bin packet this crate writes (and reads, beside 2).
pub const PACKET_VERSION: u16 = 1;
/// Version of the velocity packet this crate writes: 2 carries the click
/// probability at offset 44 (version 1 had it reserved as 0).
pub const VELOCITY_VERSION: u16 = 2;
/// The bin packet version that carries a `kind` (counts or features).
pub const BIN_VERSION_WITH_KIND: u16 = 2;
pub const BIN_HEADER_LEN: usize = 32;
pub const VELOCITY_HEADER_LEN: usize = 48;
pub const MAX_CHANNELS: usize = 16384;
pub const MAX_DIMS: usize = 8;
/// Largest valid bin datagram (32 + 2·16384 bytes).
pub const MAX_BIN_DATAGRAM: usize = BIN_HEADER_LEN + 2 * MAX_CHANNELS;

/// Velocity packet flag: the bin never came; the estimate is a prediction.
pub const FLAG_BIN_MISSING: u32 = 1 << 0;
/// Velocity packet flag: the command was scaled down to the speed limit.
pub const FLAG_SPEED_CLAMPED: u32 = 1 << 1;
/// Velocity packet flag: the change of command was cut to the acceleration limit.
pub const FLAG_ACCEL_CLAMPED: u32 = 1 << 2;
/// Velocity packet flag: a newly loaded model decoded this bin.
pub const FLAG_MODEL_CHANGED: u32 = 1 << 3;
/// Velocity packet flag: a click was decided at this bin.
pub const FLAG_CLICK: u32 = 1 << 4;

/// What a bin packet's body holds (PROTOCOL.md §1): version 1 and version
/// 2 with kind 0 carry u16 counts, version 2 with kind 1 carries f32
/// features.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum BinKind {
    #[default]
    Counts,
    Features,
}

impl BinKind {
    pub fn name(self) -> &'static str {
        match self {
            BinKind::Counts => "counts",
            BinKind::Features => "features",
        }
    }

    /// Bytes per channel in the body.
    pub fn value_len(self) -> usize {
        match self {
            BinKind::Counts => 2,
            BinKind::Features => 4,
        }
    }
}

/// One bin's values, of either kind, as a decoder reads them.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum BinValues<'a> {
    Counts(&'a [u16]),
    Features(&'a [f32]),
}

impl BinValues<'_> {
    pub fn kind(&self) -> BinKind {
        match self {
            BinValues::Counts(_) => BinKind::Counts,
            BinValues::Features(_) => BinKind::Features,
        }
    }

    /// Channels.
    pub fn len(&self) -> usize {
        match self {
            BinValues::Counts(c) => c.len(),
            BinValues::Features(f) => f.len(),
        }
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The values as f64, into `out` (one per channel).
    pub fn to_f64(&self, out: &mut [f64]) {
        match self {
            BinValues::Counts(c) => {
                for (o, &v) in out.iter_mut().zip(c.iter()) {
                    *o = f64::from(v);
                }
            }
            BinValues::Features(f) => {
                for (o, &v) in out.iter_mut().zip(f.iter()) {
                    *o = f64::from(v);
                }
            }
        }
    }
}

/// The fixed fields of a bin packet; the values stay in the datagram until
/// [`read_counts`] copies them out.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct BinHeader {
    pub channels: u16,
    pub seq: u64,
    pub origin_ns: u64,
    pub bin_us: u32,
    /// Version 1's flags (0 in version 2, whose offset 28 is the kind).
    pub flags: u32,
    pub kind: BinKind,
}

/// Why a datagram was not decoded. Each reason has its own counter.
#[derive(Clone, Copy, Debug, PartialEq, Eq, thiserror::Error)]
pub enum RejectReason {
    #[error("datagram of {len} bytes is shorter than the 32-byte bin header")]
    TooShort { len: usize },
    #[error("magic is not NBIN")]
    BadMagic,
    #[error("packet version {version}; this daemon reads versions 1 and 2")]
    BadVersion { version: u16 },
    #[error("channel count {channels} is outside 1..=16384")]
    ChannelsOutOfRange { channels: u16 },
    #[error("datagram of {len} bytes; {channels} channels need exactly {expected}")]
    LengthMismatch {
        len: usize,
        channels: u16,
        expected: usize,
    },
    #[error("bin carries {got} channels but the model expects {expected}")]
    ChannelMismatch { got: u16, expected: usize },
    #[error("bin is {got} µs wide but the model was trained on {expected} µs bins")]
    BinWidthMismatch { got: u32, expected: u32 },
    #[error("version 2 kind {kind} is neither 0 (counts) nor 1 (features)")]
    BadKind { kind: u32 },
    #[error("feature of channel {channel} is not a finite number")]
    NonFiniteFeature { channel: usize },
    #[error("bin carries {got} but the model decodes {expected}")]
    KindMismatch {
        got: &'static str,
        expected: &'static str,
    },
}

/// Number of distinct reject reasons, for per-reason counters.
pub const N_REJECT_REASONS: usize = 10;

impl RejectReason {
    /// Stable index for per-reason counters.
    pub fn index(&self) -> usize {
        match self {
            RejectReason::TooShort { .. } => 0,
            RejectReason::BadMagic => 1,
            RejectReason::BadVersion { .. } => 2,
            RejectReason::ChannelsOutOfRange { .. } => 3,
            RejectReason::LengthMismatch { .. } => 4,
            RejectReason::ChannelMismatch { .. } => 5,
            RejectReason::BinWidthMismatch { .. } => 6,
            RejectReason::BadKind { .. } => 7,
            RejectReason::NonFiniteFeature { .. } => 8,
            RejectReason::KindMismatch { .. } => 9,
        }
    }

    /// Counter names, in [`RejectReason::index`] order.
    pub const NAMES: [&'static str; N_REJECT_REASONS] = [
        "too_short",
        "bad_magic",
        "bad_version",
        "channels_out_of_range",
        "length_mismatch",
        "channel_mismatch",
        "bin_width_mismatch",
        "bad_kind",
        "non_finite_feature",
        "kind_mismatch",
    ];

    pub fn name(&self) -> &'static str {
        Self::NAMES[self.index()]
    }
}

fn u16_at(b: &[u8], at: usize) -> u16 {
    u16::from_le_bytes([b[at], b[at + 1]])
}

fn u32_at(b: &[u8], at: usize) -> u32 {
    u32::from_le_bytes(b[at..at + 4].try_into().expect("4 bytes"))
}

fn u64_at(b: &[u8], at: usize) -> u64 {
    u64::from_le_bytes(b[at..at + 8].try_into().expect("8 bytes"))
}

/// Parses and checks the structure of a bin datagram: header, magic,
/// version, kind, channel range, exact length and (features) that every
/// value is finite. Unknown flag bits of version 1 are kept but ignored,
/// as PROTOCOL.md §1 says.
pub fn parse_bin(datagram: &[u8]) -> Result<BinHeader, RejectReason> {
    if datagram.len() < BIN_HEADER_LEN {
        return Err(RejectReason::TooShort {
            len: datagram.len(),
        });
    }
    if datagram[0..4] != BIN_MAGIC {
        return Err(RejectReason::BadMagic);
    }
    let version = u16_at(datagram, 4);
    let (kind, flags) = match version {
        PACKET_VERSION => (BinKind::Counts, u32_at(datagram, 28)),
        BIN_VERSION_WITH_KIND => match u32_at(datagram, 28) {
            0 => (BinKind::Counts, 0),
            1 => (BinKind::Features, 0),
            kind => return Err(RejectReason::BadKind { kind }),
        },
        _ => return Err(RejectReason::BadVersion { version }),
    };
    let channels = u16_at(datagram, 6);
    if channels == 0 || usize::from(channels) > MAX_CHANNELS {
        return Err(RejectReason::ChannelsOutOfRange { channels });
    }
    let expected = BIN_HEADER_LEN + kind.value_len() * usize::from(channels);
    if datagram.len() != expected {
        return Err(RejectReason::LengthMismatch {
            len: datagram.len(),
            channels,
            expected,
        });
    }
    if kind == BinKind::Features {
        let body = &datagram[BIN_HEADER_LEN..];
        if let Some(channel) = body
            .chunks_exact(4)
            .position(|b| !f32::from_le_bytes([b[0], b[1], b[2], b[3]]).is_finite())
        {
            return Err(RejectReason::NonFiniteFeature { channel });
        }
    }
    Ok(BinHeader {
        channels,
        seq: u64_at(datagram, 8),
        origin_ns: u64_at(datagram, 16),
        bin_us: u32_at(datagram, 24),
        flags,
        kind,
    })
}

/// [`parse_bin`], then the checks against the running model, which
/// decodes bins of `kind`.
pub fn parse_bin_for(
    datagram: &[u8],
    kind: BinKind,
    n_channels: usize,
    bin_width: BinWidth,
) -> Result<BinHeader, RejectReason> {
    let header = parse_bin(datagram)?;
    if header.kind != kind {
        return Err(RejectReason::KindMismatch {
            got: header.kind.name(),
            expected: kind.name(),
        });
    }
    if usize::from(header.channels) != n_channels {
        return Err(RejectReason::ChannelMismatch {
            got: header.channels,
            expected: n_channels,
        });
    }
    // One rule for equality: the same whole microseconds.
    if header.bin_us != bin_width.us() {
        return Err(RejectReason::BinWidthMismatch {
            got: header.bin_us,
            expected: bin_width.us(),
        });
    }
    Ok(header)
}

/// Copies the features of a features datagram that [`parse_bin`]
/// accepted (every one finite) into `out` (whose length must be the
/// header's channel count).
pub fn read_features(datagram: &[u8], out: &mut [f32]) {
    let body = &datagram[BIN_HEADER_LEN..BIN_HEADER_LEN + 4 * out.len()];
    for (v, quad) in out.iter_mut().zip(body.chunks_exact(4)) {
        *v = f32::from_le_bytes([quad[0], quad[1], quad[2], quad[3]]);
    }
}

/// Copies the counts of a counts datagram that [`parse_bin`] accepted
/// into `out` (whose length must be the header's channel count).
pub fn read_counts(datagram: &[u8], out: &mut [u16]) {
    let body = &datagram[BIN_HEADER_LEN..BIN_HEADER_LEN + 2 * out.len()];
    for (c, pair) in out.iter_mut().zip(body.chunks_exact(2)) {
        *c = u16::from_le_bytes([pair[0], pair[1]]);
    }
}

/// Writes a bin packet (for senders, tests and the bench).
pub fn encode_bin(header: &BinHeader, counts: &[u16], out: &mut Vec<u8>) {
    out.clear();
    out.extend_from_slice(&BIN_MAGIC);
    out.extend_from_slice(&PACKET_VERSION.to_le_bytes());
    out.extend_from_slice(&header.channels.to_le_bytes());
    out.extend_from_slice(&header.seq.to_le_bytes());
    out.extend_from_slice(&header.origin_ns.to_le_bytes());
    out.extend_from_slice(&header.bin_us.to_le_bytes());
    out.extend_from_slice(&header.flags.to_le_bytes());
    for c in counts {
        out.extend_from_slice(&c.to_le_bytes());
    }
}

/// A bin datagram for `counts` with seq and origin 0, for senders that
/// stamp those just before sending (benches, replays, examples).
pub fn bin_datagram(counts: &[u16], bin_us: u32) -> Vec<u8> {
    let mut out = Vec::with_capacity(BIN_HEADER_LEN + 2 * counts.len());
    encode_bin(
        &BinHeader {
            channels: counts.len() as u16,
            seq: 0,
            origin_ns: 0,
            bin_us,
            flags: 0,
            kind: BinKind::Counts,
        },
        counts,
        &mut out,
    );
    out
}

/// A version 2 bin datagram of features (kind 1), seq and origin 0.
pub fn features_datagram(features: &[f32], bin_us: u32) -> Vec<u8> {
    let body: Vec<u8> = features.iter().flat_map(|f| f.to_le_bytes()).collect();
    bin_datagram_v2(BinKind::Features, features.len() as u16, &body, bin_us)
}

/// The bin datagram a front end sends for one bin of values: version 1
/// for counts, version 2 kind 1 for features; seq and origin 0.
pub fn values_datagram(values: BinValues<'_>, bin_us: u32) -> Vec<u8> {
    match values {
        BinValues::Counts(c) => bin_datagram(c, bin_us),
        BinValues::Features(f) => features_datagram(f, bin_us),
    }
}

/// A version 2 bin datagram of `kind` whose body is `body` (2 bytes a
/// channel for counts, 4 for features, little-endian), seq and origin 0.
pub fn bin_datagram_v2(kind: BinKind, channels: u16, body: &[u8], bin_us: u32) -> Vec<u8> {
    let mut out = Vec::with_capacity(BIN_HEADER_LEN + body.len());
    out.extend_from_slice(&BIN_MAGIC);
    out.extend_from_slice(&BIN_VERSION_WITH_KIND.to_le_bytes());
    out.extend_from_slice(&channels.to_le_bytes());
    out.extend_from_slice(&[0; 16]);
    out.extend_from_slice(&bin_us.to_le_bytes());
    let k: u32 = match kind {
        BinKind::Counts => 0,
        BinKind::Features => 1,
    };
    out.extend_from_slice(&k.to_le_bytes());
    out.extend_from_slice(body);
    out
}

/// Byte length of a velocity packet with `dims` outputs.
pub fn velocity_len(dims: usize) -> usize {
    VELOCITY_HEADER_LEN + 16 * dims
}

/// Offset of `sent_ns`, which the sender patches just before sending.
pub const SENT_NS_OFFSET: usize = 32;

/// One velocity packet's fields, borrowed for encoding.
#[derive(Clone, Copy, Debug)]
pub struct VelocityFields<'a> {
    pub state: u8,
    pub seq: u64,
    pub origin_ns: u64,
    pub recv_ns: u64,
    pub sent_ns: u64,
    pub flags: u32,
    /// The click decoder's probability (0 without one).
    pub click_prob: f32,
    pub command: &'a [f64],
    pub estimate: &'a [f64],
}

/// Encodes a velocity packet into `out`, whose length must be
/// [`velocity_len`] of the command's length.
pub fn encode_velocity(fields: &VelocityFields<'_>, out: &mut [u8]) {
    let d = fields.command.len();
    debug_assert_eq!(fields.estimate.len(), d);
    debug_assert_eq!(out.len(), velocity_len(d));
    out[0..4].copy_from_slice(&VELOCITY_MAGIC);
    out[4..6].copy_from_slice(&VELOCITY_VERSION.to_le_bytes());
    out[6] = fields.state;
    out[7] = d as u8;
    out[8..16].copy_from_slice(&fields.seq.to_le_bytes());
    out[16..24].copy_from_slice(&fields.origin_ns.to_le_bytes());
    out[24..32].copy_from_slice(&fields.recv_ns.to_le_bytes());
    out[32..40].copy_from_slice(&fields.sent_ns.to_le_bytes());
    out[40..44].copy_from_slice(&fields.flags.to_le_bytes());
    out[44..48].copy_from_slice(&fields.click_prob.to_le_bytes());
    let mut at = VELOCITY_HEADER_LEN;
    for v in fields.command.iter().chain(fields.estimate) {
        out[at..at + 8].copy_from_slice(&v.to_le_bytes());
        at += 8;
    }
}

/// Sets `sent_ns` in an encoded velocity packet.
pub fn patch_sent_ns(packet: &mut [u8], sent_ns: u64) {
    packet[SENT_NS_OFFSET..SENT_NS_OFFSET + 8].copy_from_slice(&sent_ns.to_le_bytes());
}

/// A decoded velocity packet (actuator side, tests, replay verification).
#[derive(Clone, Debug, PartialEq)]
pub struct VelocityPacket {
    pub state: u8,
    pub seq: u64,
    pub origin_ns: u64,
    pub recv_ns: u64,
    pub sent_ns: u64,
    pub flags: u32,
    /// The click probability (version 2; 0 in version 1).
    pub click_prob: f32,
    pub command: Vec<f64>,
    pub estimate: Vec<f64>,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, thiserror::Error)]
pub enum VelocityPacketError {
    #[error("velocity packet of {len} bytes is shorter than its 48-byte header")]
    TooShort { len: usize },
    #[error("magic is not NVEL")]
    BadMagic,
    #[error("velocity packet version {version}; expected 1 or 2")]
    BadVersion { version: u16 },
    #[error("dims {dims} is outside 1..=8")]
    BadDims { dims: u8 },
    #[error("velocity packet of {len} bytes; {dims} dims need exactly {expected}")]
    LengthMismatch {
        len: usize,
        dims: u8,
        expected: usize,
    },
}

impl VelocityPacket {
    pub fn parse(bytes: &[u8]) -> Result<VelocityPacket, VelocityPacketError> {
        if bytes.len() < VELOCITY_HEADER_LEN {
            return Err(VelocityPacketError::TooShort { len: bytes.len() });
        }
        if bytes[0..4] != VELOCITY_MAGIC {
            return Err(VelocityPacketError::BadMagic);
        }
        let version = u16_at(bytes, 4);
        if version != 1 && version != VELOCITY_VERSION {
            return Err(VelocityPacketError::BadVersion { version });
        }
        let dims = bytes[7];
        if dims == 0 || usize::from(dims) > MAX_DIMS {
            return Err(VelocityPacketError::BadDims { dims });
        }
        let d = usize::from(dims);
        let expected = velocity_len(d);
        if bytes.len() != expected {
            return Err(VelocityPacketError::LengthMismatch {
                len: bytes.len(),
                dims,
                expected,
            });
        }
        let f64_at = |i: usize| {
            f64::from_le_bytes(
                bytes[VELOCITY_HEADER_LEN + 8 * i..VELOCITY_HEADER_LEN + 8 * i + 8]
                    .try_into()
                    .expect("8 bytes"),
            )
        };
        Ok(VelocityPacket {
            state: bytes[6],
            seq: u64_at(bytes, 8),
            origin_ns: u64_at(bytes, 16),
            recv_ns: u64_at(bytes, 24),
            sent_ns: u64_at(bytes, 32),
            flags: u32_at(bytes, 40),
            click_prob: if version == 1 {
                0.0
            } else {
                f32::from_le_bytes(bytes[44..48].try_into().expect("4 bytes"))
            },
            command: (0..d).map(f64_at).collect(),
            estimate: (d..2 * d).map(f64_at).collect(),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn bin(channels: u16, counts: &[u16]) -> Vec<u8> {
        let mut out = Vec::new();
        encode_bin(
            &BinHeader {
                channels,
                seq: 7,
                origin_ns: 11,
                bin_us: 20_000,
                flags: 0,
                kind: BinKind::Counts,
            },
            counts,
            &mut out,
        );
        out
    }

    #[test]
    fn bin_round_trip() {
        let bytes = bin(3, &[1, 0, 65535]);
        assert_eq!(bytes.len(), 38);
        let h = parse_bin_for(
            &bytes,
            BinKind::Counts,
            3,
            BinWidth::from_us(20_000).unwrap(),
        )
        .unwrap();
        assert_eq!((h.seq, h.origin_ns, h.bin_us), (7, 11, 20_000));
        let mut counts = [0u16; 3];
        read_counts(&bytes, &mut counts);
        assert_eq!(counts, [1, 0, 65535]);
    }

    #[test]
    fn each_malformation_has_its_reason() {
        let good = bin(3, &[1, 2, 3]);
        assert_eq!(
            parse_bin(&good[..10]),
            Err(RejectReason::TooShort { len: 10 })
        );
        let mut m = good.clone();
        m[0] = b'X';
        assert_eq!(parse_bin(&m), Err(RejectReason::BadMagic));
        let mut m = good.clone();
        m[4] = 3;
        assert_eq!(parse_bin(&m), Err(RejectReason::BadVersion { version: 3 }));
        let mut m = good.clone();
        m[6] = 0;
        m[7] = 0;
        assert_eq!(
            parse_bin(&m),
            Err(RejectReason::ChannelsOutOfRange { channels: 0 })
        );
        assert!(matches!(
            parse_bin(&good[..good.len() - 1]),
            Err(RejectReason::LengthMismatch { .. })
        ));
        assert!(matches!(
            parse_bin_for(
                &good,
                BinKind::Counts,
                4,
                BinWidth::from_us(20_000).unwrap()
            ),
            Err(RejectReason::ChannelMismatch { .. })
        ));
        assert!(matches!(
            parse_bin_for(
                &good,
                BinKind::Counts,
                3,
                BinWidth::from_us(10_000).unwrap()
            ),
            Err(RejectReason::BinWidthMismatch { .. })
        ));
    }

    /// Version 2 (PROTOCOL.md §1): kind 0 carries the same counts as
    /// version 1; kind 1 carries f32 features (4 bytes a channel), every
    /// one finite; any other kind is malformed; a bin of the other kind
    /// than the model's is a mismatch with its own reason.
    #[test]
    fn version_2_carries_counts_or_features_by_kind() {
        let w = BinWidth::from_us(20_000).unwrap();
        let v1 = bin_datagram(&[1, 0, 65535], 20_000);
        let body: Vec<u8> = [1u16, 0, 65535]
            .iter()
            .flat_map(|c| c.to_le_bytes())
            .collect();
        let v2 = bin_datagram_v2(BinKind::Counts, 3, &body, 20_000);
        assert_eq!(v2.len(), v1.len());
        let h = parse_bin_for(&v2, BinKind::Counts, 3, w).unwrap();
        assert_eq!((h.kind, h.flags), (BinKind::Counts, 0));
        let (mut a, mut b) = ([0u16; 3], [0u16; 3]);
        read_counts(&v1, &mut a);
        read_counts(&v2, &mut b);
        assert_eq!(a, b);

        let features: Vec<u8> = [0.5f32, -2.0, 1e6]
            .iter()
            .flat_map(|v| v.to_le_bytes())
            .collect();
        let f = bin_datagram_v2(BinKind::Features, 3, &features, 20_000);
        assert_eq!(f.len(), 32 + 12);
        assert_eq!(parse_bin(&f).unwrap().kind, BinKind::Features);
        assert_eq!(
            parse_bin_for(&f, BinKind::Counts, 3, w),
            Err(RejectReason::KindMismatch {
                got: "features",
                expected: "counts"
            })
        );
        // A features body as long as counts would be is the wrong length.
        let short = bin_datagram_v2(BinKind::Features, 3, &body, 20_000);
        assert!(matches!(
            parse_bin(&short),
            Err(RejectReason::LengthMismatch { expected: 44, .. })
        ));
        let mut nan = features.clone();
        nan[4..8].copy_from_slice(&f32::NAN.to_le_bytes());
        assert_eq!(
            parse_bin(&bin_datagram_v2(BinKind::Features, 3, &nan, 20_000)),
            Err(RejectReason::NonFiniteFeature { channel: 1 })
        );
        let mut odd = v2.clone();
        odd[28..32].copy_from_slice(&2u32.to_le_bytes());
        assert_eq!(parse_bin(&odd), Err(RejectReason::BadKind { kind: 2 }));
        // Every reason has its own counter name.
        let names: std::collections::BTreeSet<_> = RejectReason::NAMES.iter().collect();
        assert_eq!(names.len(), N_REJECT_REASONS);
    }

    #[test]
    fn unknown_flag_bits_are_ignored() {
        let mut m = bin(1, &[4]);
        m[28..32].copy_from_slice(&0xdead_beefu32.to_le_bytes());
        assert!(parse_bin_for(&m, BinKind::Counts, 1, BinWidth::from_us(20_000).unwrap()).is_ok());
    }

    #[test]
    fn velocity_round_trip() {
        let mut buf = vec![0u8; velocity_len(2)];
        encode_velocity(
            &VelocityFields {
                state: 1,
                seq: 42,
                origin_ns: 1,
                recv_ns: 2,
                sent_ns: 0,
                flags: FLAG_SPEED_CLAMPED | FLAG_CLICK,
                command: &[0.5, -0.25],
                estimate: &[1.0, -0.5],
                click_prob: 0.875,
            },
            &mut buf,
        );
        patch_sent_ns(&mut buf, 3);
        // Version 2: the click probability at offset 44, flag bit 4.
        assert_eq!(u16::from_le_bytes([buf[4], buf[5]]), 2);
        assert_eq!(buf[44..48], 0.875f32.to_le_bytes());
        let p = VelocityPacket::parse(&buf).unwrap();
        assert_eq!(p.seq, 42);
        assert_eq!(p.sent_ns, 3);
        assert_eq!(p.command, vec![0.5, -0.25]);
        assert_eq!(p.estimate, vec![1.0, -0.5]);
        assert_eq!(p.flags, FLAG_SPEED_CLAMPED | FLAG_CLICK);
        assert_eq!(p.click_prob, 0.875);
        // A version 1 packet still reads, its reserved field as no click.
        let mut v1 = buf.clone();
        v1[4..6].copy_from_slice(&1u16.to_le_bytes());
        assert_eq!(VelocityPacket::parse(&v1).unwrap().click_prob, 0.0);
        v1[4..6].copy_from_slice(&3u16.to_le_bytes());
        assert!(VelocityPacket::parse(&v1).is_err());
    }
}
