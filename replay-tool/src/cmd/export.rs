//! `replay-tool export LOG --out DIR`: a session log recorded through the
//! daemon, written as a session directory (PROTOCOL.md §3 and §5) — the
//! counts as received, the kinematics the task showed, trials, which rows
//! are valid for training, and the estimates and commands the daemon sent.
//! The calibration block a rig records is then a folder like any other.
//! With `--nwb FILE` the same session is written as a Neurodata Without
//! Borders file ([`crate::nwb_export`]) to share.

use decoder_core::session::open::Session;
use std::path::PathBuf;

use anyhow::{Context, Result};
use decoder_core::formats::log_block::export_log;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// The session log (.vdlog) decoderd recorded.
    pub log: PathBuf,
    /// Session directory to write (created; files in it are replaced).
    #[arg(long, required_unless_present = "nwb")]
    pub out: Option<PathBuf>,
    /// Also (or instead) write the session as a Neurodata Without Borders
    /// 2.x file here.
    #[arg(long)]
    pub nwb: Option<PathBuf>,
    /// With --nwb: what the log cannot know (`[subject]` subject_id,
    /// species, sex, age, description; `[session]` session_description,
    /// experimenter, institution, lab, keywords), in NWB's terms.
    #[arg(long, requires = "nwb")]
    pub metadata: Option<PathBuf>,
}

pub fn run(args: &Args) -> Result<()> {
    Session::log_at(&args.log, "export")?;
    let meta = match &args.metadata {
        Some(m) => crate::nwb_export::Metadata::read(m)?,
        None => crate::nwb_export::Metadata::default(),
    };
    if let Some(out) = &args.out {
        export_dir(args, out)?;
    }
    if let Some(nwb) = &args.nwb {
        let w = crate::nwb_export::export_nwb(&args.log, nwb, &meta)
            .with_context(|| format!("exporting {} to {}", args.log.display(), nwb.display()))?;
        println!(
            "exported {} -> {} (Neurodata Without Borders {}): {} rows × {} channels, {} trials, {} model record(s){}",
            args.log.display(),
            nwb.display(),
            crate::nwb_export::NWB_VERSION,
            w.rows,
            w.channels,
            w.trials,
            w.models,
            if args.metadata.is_none() {
                "; no --metadata: the file has no subject, experimenter or institution, which archives ask for"
            } else {
                ""
            }
        );
    }
    Ok(())
}

fn export_dir(args: &Args, out: &std::path::Path) -> Result<()> {
    // Two passes over the log, the rows written as they are met: a log
    // of any length exports in bounded memory.
    let s = export_log(&args.log, out)
        .with_context(|| format!("exporting {} to {}", args.log.display(), out.display()))?;
    println!(
        "exported {} -> {}: {} rows (one per slot), {} valid; {} bins missing, {} rows before the first task packet; {} trials",
        args.log.display(),
        out.display(),
        s.rows,
        s.valid_rows,
        s.bins_missing,
        s.rows_without_task_state,
        s.trials,
    );
    if s.dims.is_none() {
        println!(
            "   no task packets in the log: counts, estimates and commands only, no kinematics.npy or trials.csv (send task packets, PROTOCOL.md §6, to train from a recording)"
        );
    } else {
        println!(
            "   task packets: {} read, {} rejected{}; {} rows in closed loop",
            s.task_packets,
            s.task_packets_rejected,
            if s.task_packets_other_dims > 0 {
                format!(
                    ", {} of another dimension left out",
                    s.task_packets_other_dims
                )
            } else {
                String::new()
            },
            s.closed_loop_rows
        );
    }
    if s.torn_tail {
        println!(
            "   the log ends in a torn tail (the daemon stopped mid-write); the rows before it are exported"
        );
    }
    Ok(())
}
