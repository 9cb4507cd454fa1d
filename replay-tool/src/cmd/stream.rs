//! `replay-tool stream`: stream a stored block to a running daemon at the
//! bin rate (or a chosen time scale), as its front end would, collect the
//! velocity packets it sends to `--actuator`, and check them against
//! decoding the same bins offline: each slot the daemon decoded from its
//! bin (counts, or features) must give the same estimate bit for bit, and each slot it coasted must
//! equal a predict-only step. This is how a user checks that the daemon on
//! a rig computer decodes exactly what the offline tools do.

use decoder_core::session::open::Session;
use std::net::UdpSocket;
use std::path::{Path, PathBuf};
use std::time::Duration;

use anyhow::{Context, Result, bail};
use daemon_rig::{ActuatorSink, BinFault, paced_send_from};
use decoder_core::formats::session_log::{LogReader, LogRecord};
use decoder_core::wire::packet::{self, BinKind, BinValues, FLAG_BIN_MISSING};
use decoder_core::{Block, ModelFile};

use crate::CheckFailed;

#[derive(Debug, clap::Args)]
#[command(after_help = crate::NOT_NEXT_TO_A_PERSON)]
pub struct Args {
    /// Bins to stream: a session directory, or a session log (its valid
    /// datagrams, with its logged model unless --model).
    #[arg(long)]
    pub session: PathBuf,
    /// The model the daemon runs (required for a session directory).
    #[arg(long)]
    pub model: Option<PathBuf>,
    /// The running daemon's bin address (its network.listen).
    #[arg(long)]
    pub daemon: String,
    /// Where to collect its velocity packets: the address its
    /// network.actuator names, bound here.
    #[arg(long)]
    pub actuator: String,
    /// Time between bins as a multiple of the bin width (1 = the bin rate,
    /// 0.5 = twice as fast).
    #[arg(long, default_value_t = 1.0)]
    pub time_scale: f64,
}

/// One stored bin, of either kind.
pub enum StoredBin {
    Counts(Vec<u16>),
    Features(Vec<f32>),
}

impl StoredBin {
    pub fn values(&self) -> BinValues<'_> {
        match self {
            StoredBin::Counts(c) => BinValues::Counts(c),
            StoredBin::Features(f) => BinValues::Features(f),
        }
    }

    fn of(values: BinValues<'_>) -> StoredBin {
        match values {
            BinValues::Counts(c) => StoredBin::Counts(c.to_vec()),
            BinValues::Features(f) => StoredBin::Features(f.to_vec()),
        }
    }
}

/// The bins of a session directory or of a session log's valid datagrams,
/// with the model to check against.
fn load(session: &Path, model: Option<&Path>) -> Result<(Vec<StoredBin>, ModelFile)> {
    if let Session::Directory(_) = Session::at(session)? {
        let Some(m) = model else {
            bail!("--model is required to stream a session directory (the model the daemon runs)");
        };
        let model = ModelFile::read(m)?;
        let s = Block::read(session)?;
        decoder_core::session::replay::check_block(
            &model.pipeline()?,
            s.input,
            s.n_channels,
            s.bin_width,
        )
        .with_context(|| format!("{} with model {}", session.display(), m.display()))?;
        return Ok((
            (0..s.n_bins)
                .map(|t| StoredBin::of(s.bin_values(t)))
                .collect(),
            model,
        ));
    }
    let mut reader = LogReader::open(session)?;
    let n = reader.header().n_channels;
    let bin_width = reader.header().bin_width;
    let mut logged_model: Option<ModelFile> = None;
    let mut bins = Vec::new();
    while let Some(r) = reader.next_record() {
        match r {
            LogRecord::Model { model_file, .. } if logged_model.is_none() => {
                logged_model = Some(ModelFile::from_bytes(
                    &model_file,
                    &session.display().to_string(),
                )?);
            }
            LogRecord::Datagram { bytes, .. } => {
                let kind = logged_model.as_ref().map_or(BinKind::Counts, |m| m.input);
                if packet::parse_bin_for(&bytes, kind, n, bin_width).is_err() {
                    continue;
                }
                bins.push(match kind {
                    BinKind::Counts => {
                        let mut counts = vec![0u16; n];
                        packet::read_counts(&bytes, &mut counts);
                        StoredBin::Counts(counts)
                    }
                    BinKind::Features => {
                        let mut features = vec![0f32; n];
                        packet::read_features(&bytes, &mut features);
                        StoredBin::Features(features)
                    }
                });
            }
            _ => {}
        }
    }
    let model = match model {
        Some(m) => ModelFile::read(m)?,
        None => logged_model.context("the log holds no model; pass --model")?,
    };
    if let Some(b) = bins.first()
        && b.values().kind() != model.input
    {
        bail!(
            "{} holds bins of {} but the model decodes {}",
            session.display(),
            b.values().kind().name(),
            model.input.name()
        );
    }
    Ok((bins, model))
}

pub fn run(args: &Args) -> Result<()> {
    super::check_time_scale(args.time_scale, false)?;
    let target = super::socket_addr("--daemon", &args.daemon)?;
    let actuator = super::socket_addr("--actuator", &args.actuator)?;
    let (bins, model) = load(&args.session, args.model.as_deref())?;
    if bins.is_empty() {
        bail!("{} has no bins to stream", args.session.display());
    }
    let n = bins.len();
    let channels = model.decoder.n_channels();
    let bin_us = model.bin_width.us();
    let datagrams: Vec<Vec<u8>> = bins
        .iter()
        .map(|b| packet::values_datagram(b.values(), bin_us))
        .collect();
    let sink_socket = UdpSocket::bind(actuator).with_context(|| {
        format!(
            "cannot bind --actuator {actuator}; it must be the address the daemon sends to (network.actuator), on this machine and not in use"
        )
    })?;
    // Seqs far from any earlier stream's, so a daemon that ran before sees
    // a new stream (decoder reset) and decodes from the model's initial
    // state, as the offline check does. A used daemon takes the first bin
    // as a stray and starts the stream at the second, which therefore
    // follows a full bin later, paced as a restarting front end.
    let base = (1u64 << 40) + daemon::sys::monotonic_ns();
    let sink = ActuatorSink::start(sink_socket)?;
    let sender = UdpSocket::bind(if target.is_ipv4() {
        "127.0.0.1:0"
    } else {
        "[::1]:0"
    })?;
    let rate = 1000.0 / model.bin_width.ms() / args.time_scale;
    println!(
        "streaming {n} bins of {channels} channels to {target} at {rate:.0} bins/s; collecting on {actuator} ..."
    );
    let bin = Duration::from_secs_f64(model.bin_width.ms() / 1000.0);
    paced_send_from(&sender, target, &datagrams[..1], 1, rate, base, |_| {
        BinFault::None
    });
    std::thread::sleep(bin);
    if n > 1 {
        paced_send_from(
            &sender,
            target,
            &datagrams[1..],
            n - 1,
            rate,
            base + 1,
            |_| BinFault::None,
        );
    }
    // The daemon answers the last slot one deadline after it is due; wait
    // for that packet (or give up after a second past it).
    let last = base + n as u64 - 1;
    let _ = sink.wait_until(
        "packet for the last bin",
        Duration::from_secs(1) + 4 * bin,
        |a| a.iter().any(|a| a.packet.seq >= last),
    );
    let rec = sink.finish_per_seq(base, n);

    let Some(first) = rec.packets.iter().position(Option::is_some) else {
        bail!(
            "no velocity packets came back on {actuator}; is the daemon's network.actuator set to it?"
        );
    };
    let mut pipeline = model.pipeline()?;
    // Bins before the first answered one were taken as a stray (a daemon
    // that ran another stream before) and are not counted against it.
    let (mut equal, mut decoded, mut coasted, mut absent) = (0usize, 0usize, 0usize, 0usize);
    let mut first_difference = None;
    for (k, (packet, bin)) in rec.packets.iter().zip(&bins).enumerate().skip(first) {
        let Some(p) = packet else {
            absent += 1;
            continue;
        };
        let seq = base + k as u64;
        let offline = if p.flags & FLAG_BIN_MISSING != 0 {
            coasted += 1;
            pipeline.predict_only(seq)
        } else {
            decoded += 1;
            pipeline.step_bin(seq, bin.values())
        };
        let same = offline.estimate.len() == p.estimate.len()
            && offline
                .estimate
                .iter()
                .zip(&p.estimate)
                .all(|(a, b)| a.to_bits() == b.to_bits());
        if same {
            equal += 1;
        } else if first_difference.is_none() {
            first_difference = Some(format!(
                "bin {k} (seq {seq}): live estimate {:?}, offline {:?}",
                p.estimate, offline.estimate
            ));
        }
        if offline.numerical_fault {
            pipeline.reset();
        }
    }
    let checked = decoded + coasted;
    println!(
        "{equal} of {checked} live estimates equal offline decoding bit for bit ({decoded} decoded, {coasted} coasted; {absent} bins without a packet{})",
        if first > 0 {
            format!("; the first {first} started a new stream in the running daemon")
        } else {
            String::new()
        }
    );
    if let Some(d) = first_difference {
        return Err(CheckFailed(format!(
            "live and offline decoding differ: {d} (is the daemon running model {}?)",
            args.model
                .as_deref()
                .map_or_else(|| "the logged one".to_string(), |m| m.display().to_string())
        ))
        .into());
    }
    if absent > 0 {
        return Err(CheckFailed(format!("{absent} bins got no velocity packet")).into());
    }
    Ok(())
}
