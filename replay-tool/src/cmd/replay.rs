//! `replay-tool replay`: decode a stored block with a model, bin by bin,
//! through the same pipeline the daemon runs, and write the estimates.
//!
//! A session directory is decoded bin after bin, read and written a chunk
//! of rows at a time, so a block of any length replays in bounded memory. A session log from
//! `decoderd` is replayed through the daemon's own slot engine — the same
//! datagrams at the same times, the same operator commands and model loads —
//! so every slot the daemon answered is answered again (with the logged
//! model unless `--model`). `replay-tool verify` is the bit-for-bit check
//! of the same replay.

use std::path::PathBuf;
use std::time::Instant;

use anyhow::{Context, Result, bail};
use decoder_core::ModelFile;
use decoder_core::formats::block_rows::{AllRows, BlockFiles};
use decoder_core::formats::log_replay::replay_log;
use decoder_core::formats::session_log::{LogEnd, LogReader};
use decoder_core::session::open::Session;
use decoder_core::session::replay::replay_rows;
use decoder_core::wire::packet::VelocityPacket;

use crate::output::write_table;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Block to replay: a session directory, or a session log (.vdlog) that
    /// decoderd recorded.
    #[arg(long)]
    pub session: PathBuf,
    /// Model file from `replay-tool train`. Required for a session
    /// directory; for a session log it replaces the logged model(s).
    #[arg(long)]
    pub model: Option<PathBuf>,
    /// Estimates to write: FILE.npy (shape bins × outputs, float64) or
    /// FILE.csv.
    #[arg(long)]
    pub out: PathBuf,
    /// Run the full covariance update even when the model has a
    /// steady-state gain (session directories only).
    #[arg(long)]
    pub no_steady_state: bool,
    /// Session log with --model OTHER: also write the logged model's and
    /// OTHER's estimates side by side to this CSV.
    #[arg(long, requires = "model")]
    pub compare: Option<PathBuf>,
    /// With a click decoder: write (T, 2) of each bin's click probability
    /// and click flag (0 or 1), as the velocity packet carries them (a
    /// session directory replays as a daemon armed throughout, a log with
    /// its logged states).
    #[arg(long, value_name = "FILE.npy|FILE.csv")]
    pub click_out: Option<PathBuf>,
    /// A session directory's run-time settings from this daemon
    /// configuration: drift handling (`[drift]`) and click gating
    /// (`[click]`); without it, the daemon's defaults (drift handling off).
    /// A log replays with the settings it recorded.
    #[arg(long, value_name = "DAEMON.toml")]
    pub config: Option<PathBuf>,
}

pub struct ReplaySummary {
    pub n_bins: usize,
    pub bins_per_second: f64,
    /// (output, CC) against the block's own kinematics, when it has them.
    pub cc: Vec<(String, f64)>,
    /// For a session log: slots whose replayed packet equals the recorded
    /// one byte for byte, out of those recorded.
    pub identical: Option<(u64, u64)>,
}

pub fn replay(args: &Args) -> Result<ReplaySummary> {
    if let Session::Log(_) = Session::at(&args.session)? {
        return replay_session_log(args);
    }
    if args.compare.is_some() {
        bail!("--compare needs a session log (.vdlog) from decoderd, not a session directory");
    }
    let out = &args.out;
    let Some(model_path) = &args.model else {
        bail!("--model is required to replay a session directory");
    };
    let model = ModelFile::read(model_path)?;
    let mut pipeline = model
        .pipeline_with(!args.no_steady_state)
        .with_context(|| format!("building the decoder from {}", model_path.display()))?;
    // The settings a daemon with this configuration and model would run.
    let (raw, origin) = match &args.config {
        Some(c) => (
            daemon::config::RawConfig::from_file(c)?,
            c.display().to_string(),
        ),
        None => (Default::default(), "the daemon's defaults".to_string()),
    };
    // The model replayed stands in for the daemon's.
    let overrides = daemon::config::Overrides {
        model: Some(model_path.clone()),
        ..Default::default()
    };
    let settings =
        daemon::config::Config::resolve(raw, &overrides, &origin)?.engine_settings(model.bin_width);
    pipeline.configure_drift(settings.drift, settings.saturation_count);
    let outputs = model.decoder.outputs().to_vec();
    let started = Instant::now();
    let rows = BlockFiles::open(&args.session)?;
    let ext = out.extension().and_then(|e| e.to_str()).unwrap_or("");
    let mut sink = crate::output::TableWriter::create(out, &outputs, rows.all_bins(), ext)?;
    let streamed = replay_rows(&rows, &args.session, &mut pipeline, &outputs, |est| {
        sink.write_rows(est).map_err(Into::into)
    })
    .with_context(|| {
        format!(
            "replaying {} with {}",
            args.session.display(),
            model_path.display()
        )
    })?;
    sink.finish()?;
    if let Some(click_out) = &args.click_out {
        replay_clicks(&rows, &model, &settings.click_gate, click_out)?;
    }
    if let Some(t) = pipeline.drift() {
        let out: Vec<String> = t
            .left_out_channels()
            .map(|(c, r)| format!("{c} ({})", r.name()))
            .collect();
        tracing::info!(
            "drift handling on: {} channels left out at the end{}",
            out.len(),
            if out.is_empty() {
                String::new()
            } else {
                format!(": {}", out.join(", "))
            }
        );
    }
    let elapsed = started.elapsed().as_secs_f64();
    if streamed.faults > 0 {
        tracing::warn!(
            faults = streamed.faults,
            "bins with a numerical fault (estimate unusable)"
        );
    }
    Ok(ReplaySummary {
        n_bins: streamed.bins,
        bins_per_second: streamed.bins as f64 / elapsed.max(1e-9),
        cc: streamed.cc,
        identical: None,
    })
}

/// A session directory's click probability and clicks, bin by bin, as a
/// daemon armed throughout would send them: the model's click decoder on
/// every bin (a bin marked not valid counts as one that never came) and
/// the gate of `settings`.
fn replay_clicks(
    rows: &BlockFiles,
    model: &ModelFile,
    settings: &decoder_core::engine::slot_engine::ClickGateSettings,
    out: &std::path::Path,
) -> Result<()> {
    use decoder_core::decoders::click::ClickFilter;
    let Some(click) = &model.click else {
        bail!("--click-out needs a model with a click decoder (train it with --click)");
    };
    let mut filter = ClickFilter::new(click.clone()).context("the model's click decoder")?;
    let mut gate = settings.gate(model.bin_width);
    let n = model.decoder.n_channels();
    let mut table = Vec::with_capacity(2 * rows.all_bins());
    rows.pass_all(&mut |chunk| {
        for r in 0..chunk.rows {
            let came = chunk.is_valid(r);
            let p = if came {
                filter.step(&chunk.counts[r * n..(r + 1) * n])
            } else {
                filter.predict_only()
            };
            let clicked = gate.step(p, came);
            table.push(f64::from(p as f32));
            table.push(f64::from(u8::from(clicked)));
        }
    })?;
    let header = ["click_prob", "click"].map(String::from);
    write_table(out, &header, table.len() / 2, &table)
}

fn replay_session_log(args: &Args) -> Result<ReplaySummary> {
    if args.config.is_some() {
        bail!(
            "--config applies to session directories; a log replays with the settings it recorded"
        );
    }
    let model = match &args.model {
        Some(p) => Some(ModelFile::read(p)?),
        None => None,
    };
    if args.no_steady_state {
        bail!("--no-steady-state applies to session directories; a log replays as the daemon ran");
    }
    let mut reader = LogReader::open(&args.session)?;
    let outputs = reader.header().outputs.clone();
    let d = outputs.len();
    let started = Instant::now();
    let mut estimates = Vec::new();
    let (mut identical, mut recorded) = (0u64, 0u64);
    let mut bad_packet = None;
    let mut clicks = Vec::new();
    let summary = replay_log(&mut reader, model.as_ref(), |slot| {
        match VelocityPacket::parse(slot.replayed) {
            Ok(p) => {
                estimates.extend_from_slice(&p.estimate);
                clicks.push(f64::from(p.click_prob));
                clicks.push(f64::from(u8::from(
                    p.flags & decoder_core::wire::packet::FLAG_CLICK != 0,
                )));
            }
            Err(e) => bad_packet = Some(e),
        }
        if let Some(r) = slot.recorded {
            recorded += 1;
            identical += u64::from(r == slot.replayed);
        }
    })?;
    if let Some(e) = bad_packet {
        bail!("the replay produced an unreadable packet: {e}");
    }
    let elapsed = started.elapsed().as_secs_f64();
    let n = estimates.len() / d.max(1);
    write_table(&args.out, &outputs, n, &estimates)?;
    if let Some(click_out) = &args.click_out {
        let header = ["click_prob", "click"].map(String::from);
        write_table(click_out, &header, clicks.len() / 2, &clicks)?;
    }
    match &summary.end {
        Some(LogEnd::TornTail { offset, bytes }) => tracing::warn!(
            "{}: torn tail at byte {offset} ({bytes} bytes dropped); replayed up to it",
            args.session.display()
        ),
        Some(LogEnd::Corrupt {
            offset, problem, ..
        }) => tracing::warn!(
            "{}: {problem} at byte {offset}; replayed up to it",
            args.session.display()
        ),
        Some(LogEnd::Unclosed) => tracing::warn!(
            "{}: the log has no end record (daemon killed or still running)",
            args.session.display()
        ),
        _ => {}
    }
    if summary.records_lost > 0 {
        tracing::warn!(
            lost = summary.records_lost,
            "the recorder lost records in this session; the replay may differ after that point"
        );
    }
    Ok(ReplaySummary {
        n_bins: n,
        bins_per_second: n as f64 / elapsed.max(1e-9),
        cc: Vec::new(),
        identical: model.is_none().then_some((identical, recorded)),
    })
}

pub fn run(args: &Args) -> Result<()> {
    if let (Some(other), Some(csv)) = (&args.model, &args.compare) {
        Session::log_at(&args.session, "--compare")?;
        let model = ModelFile::read(other)?;
        let (n, rms) = super::verify::compare_models(&args.session, &model, csv)?;
        let parts: Vec<String> = rms.iter().map(|r| format!("{r:.4}")).collect();
        println!(
            "compared the logged model with {} on {n} slots: RMS difference of the estimates {}; side by side -> {}",
            other.display(),
            parts.join(", "),
            csv.display()
        );
    }
    let summary = replay(args)?;
    println!(
        "replayed {} bins through the decode pipeline ({:.0} bins/s); wrote {}",
        summary.n_bins,
        summary.bins_per_second,
        args.out.display()
    );
    if !summary.cc.is_empty() {
        let parts: Vec<String> = summary
            .cc
            .iter()
            .map(|(n, c)| format!("{n} CC {c:.3}"))
            .collect();
        println!("against the block's own kinematics: {}", parts.join(", "));
    }
    if let Some((same, of)) = summary.identical {
        println!("{same} of {of} recorded velocity packets reproduced byte for byte");
    }
    Ok(())
}
