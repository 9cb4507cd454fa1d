//! `replay-tool export LOG --out DIR`: a session log recorded through the
//! daemon, written as a session directory (PROTOCOL.md §3 and §5) — the
//! counts as received, the kinematics the task showed, trials, which rows
//! are valid for training, and the estimates and commands the daemon sent.
//! The calibration block a rig records is then a folder like any other.

use decoder_core::session::open::Session;
use std::path::PathBuf;

use anyhow::{Context, Result};
use decoder_core::formats::log_block::export_log;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// The session log (.vdlog) decoderd recorded.
    pub log: PathBuf,
    /// Session directory to write (created; files in it are replaced).
    #[arg(long)]
    pub out: PathBuf,
}

pub fn run(args: &Args) -> Result<()> {
    Session::log_at(&args.log, "export")?;
    // Two passes over the log, the rows written as they are met: a log
    // of any length exports in bounded memory.
    let s = export_log(&args.log, &args.out)
        .with_context(|| format!("exporting {} to {}", args.log.display(), args.out.display()))?;
    println!(
        "exported {} -> {}: {} rows (one per slot), {} valid; {} bins missing, {} rows before the first task packet; {} trials",
        args.log.display(),
        args.out.display(),
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
