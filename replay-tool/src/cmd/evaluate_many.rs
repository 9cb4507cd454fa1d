//! `replay-tool evaluate --sessions LIST --shard I/N --report DIR` and
//! `evaluate --merge DIR`: a lab's archive evaluated as a job array. Each
//! task evaluates its share of the list (sessions I, I + N, … — every
//! N-th, so long and short sessions spread evenly) and writes one result
//! file per session and one file naming its share; the merge checks that
//! every share is there, then writes the combined table, a summary per
//! decoder and output, and a plot. A session evaluates exactly as
//! `evaluate --session` would, so a merged table equals an unsharded run.

use decoder_core::session::open::Session;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};
use decoder_core::fit::evaluate::{DecoderSpec, cross_validate};

use super::train::SideBySide;
use decoder_core::fit::metrics::Scores;
use decoder_core::formats::block_rows::BlockRows;
use serde::{Deserialize, Serialize};

use crate::CheckFailed;
use crate::output::write_atomic;

const SESSIONS_DIR: &str = "sessions";
const SHARDS_DIR: &str = "shards";

/// One decoder's cross-validated means on one session.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct DecoderMeans {
    pub decoder: String,
    pub outputs: Vec<String>,
    pub mean: Vec<Scores>,
}

/// What a shard writes per session.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SessionResult {
    /// 0-based line of the session in the list (comments left out).
    pub index: usize,
    pub session: String,
    pub folds: usize,
    pub by_trial: bool,
    pub bins: usize,
    pub decoders: Vec<DecoderMeans>,
    /// Why the session could not be evaluated, if it could not.
    pub error: Option<String>,
}

/// What a shard writes about itself.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ShardRecord {
    pub shard: usize,
    pub of: usize,
    pub list: String,
    pub list_sessions: usize,
    pub indices: Vec<usize>,
}

/// Parses `I/N` (1 ≤ I ≤ N).
pub fn parse_shard(text: &str) -> Result<(usize, usize)> {
    let bad = || {
        anyhow::anyhow!(
            "--shard {text}: expected I/N with 1 ≤ I ≤ N, e.g. 3/16 (Slurm: --shard $SLURM_ARRAY_TASK_ID/$SLURM_ARRAY_TASK_COUNT with --array=1-N)"
        )
    };
    let (i, n) = text.split_once('/').ok_or_else(bad)?;
    let (i, n): (usize, usize) = (
        i.trim().parse().map_err(|_| bad())?,
        n.trim().parse().map_err(|_| bad())?,
    );
    if n == 0 || i == 0 || i > n {
        return Err(bad());
    }
    Ok((i, n))
}

/// The sessions a list names, relative paths taken from the list's folder.
pub fn read_list(list: &Path) -> Result<Vec<PathBuf>> {
    let text = std::fs::read_to_string(list)
        .with_context(|| format!("--sessions {}: cannot read the list", list.display()))?;
    let base = list.parent().unwrap_or(Path::new("."));
    let sessions: Vec<PathBuf> = text
        .lines()
        .map(str::trim)
        .filter(|l| !l.is_empty() && !l.starts_with('#'))
        .map(|l| {
            let p = PathBuf::from(l);
            if p.is_absolute() { p } else { base.join(p) }
        })
        .collect();
    if sessions.is_empty() {
        bail!("--sessions {}: the list names no session", list.display());
    }
    Ok(sessions)
}

fn result_path(report: &Path, index: usize) -> PathBuf {
    report.join(SESSIONS_DIR).join(format!("{index:06}.json"))
}

/// One shard's share of the list.
pub fn run_shard(
    list: &Path,
    shard: &str,
    report: &Path,
    specs: &[DecoderSpec],
    folds: usize,
) -> Result<()> {
    let (i, n) = parse_shard(shard)?;
    let sessions = read_list(list)?;
    let mine: Vec<usize> = (0..sessions.len()).filter(|k| k % n == i - 1).collect();
    let mut failed = 0;
    for &k in &mine {
        let path = &sessions[k];
        let result = match evaluate_one(path, specs, folds) {
            Ok(mut r) => {
                r.index = k;
                r
            }
            Err(e) => {
                failed += 1;
                eprintln!("replay-tool: session {k} ({}): {e:#}", path.display());
                SessionResult {
                    index: k,
                    session: path.display().to_string(),
                    folds,
                    by_trial: false,
                    bins: 0,
                    decoders: Vec::new(),
                    error: Some(format!("{e:#}")),
                }
            }
        };
        write_atomic(
            &result_path(report, k),
            serde_json::to_string_pretty(&result)?.as_bytes(),
        )?;
        println!(
            "session {k} of {}: {}{}",
            sessions.len(),
            path.display(),
            if result.error.is_some() {
                " FAILED"
            } else {
                ""
            }
        );
    }
    let record = ShardRecord {
        shard: i,
        of: n,
        list: list.display().to_string(),
        list_sessions: sessions.len(),
        indices: mine.clone(),
    };
    write_atomic(
        &report.join(SHARDS_DIR).join(format!("{i}-of-{n}.json")),
        serde_json::to_string_pretty(&record)?.as_bytes(),
    )?;
    println!(
        "shard {i}/{n}: {} of {} sessions evaluated into {}{}; merge with `replay-tool evaluate --merge {}` once every shard has run",
        mine.len() - failed,
        mine.len(),
        report.display(),
        if failed > 0 {
            format!(" ({failed} failed)")
        } else {
            String::new()
        },
        report.display()
    );
    if failed > 0 {
        return Err(CheckFailed(format!(
            "{failed} of {} sessions of shard {i}/{n} could not be evaluated",
            mine.len()
        ))
        .into());
    }
    Ok(())
}

fn evaluate_one(path: &Path, specs: &[DecoderSpec], folds: usize) -> Result<SessionResult> {
    let session = Session::at(path)?.rows_with_kinematics()?;
    let eval = cross_validate(&session.rows, specs, folds, &SideBySide, |_, _| {})?;
    Ok(SessionResult {
        index: 0,
        session: path.display().to_string(),
        folds: eval.folds,
        by_trial: eval.by_trial,
        bins: session.rows.info().n_bins,
        decoders: eval
            .decoders
            .iter()
            .map(|d| DecoderMeans {
                decoder: d.decoder.clone(),
                outputs: d.outputs.clone(),
                mean: d.mean.clone(),
            })
            .collect(),
        error: None,
    })
}

fn read_json<T: serde::de::DeserializeOwned>(path: &Path) -> Result<T> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("cannot read {}", path.display()))?;
    serde_json::from_str(&text).with_context(|| format!("{}: not a result file", path.display()))
}

/// `evaluate --merge DIR`.
pub fn merge(report: &Path) -> Result<()> {
    let shard_dir = report.join(SHARDS_DIR);
    let mut shards: Vec<ShardRecord> = Vec::new();
    let entries = std::fs::read_dir(&shard_dir).with_context(|| {
        format!(
            "--merge {}: no {SHARDS_DIR}/ folder; run `evaluate --sessions LIST --shard I/N --report {}` first",
            report.display(),
            report.display()
        )
    })?;
    for e in entries {
        let p = e?.path();
        if p.extension().is_some_and(|x| x == "json") {
            shards.push(read_json(&p)?);
        }
    }
    let Some(first) = shards.first() else {
        bail!(
            "--merge {}: no shard has written its record yet",
            report.display()
        );
    };
    let (n, total) = (first.of, first.list_sessions);
    if let Some(other) = shards
        .iter()
        .find(|s| s.of != n || s.list_sessions != total)
    {
        bail!(
            "--merge {}: shards of different runs are mixed (shard {}/{} of a {}-session list beside {}/{} of a {}-session list); use one report folder per run",
            report.display(),
            first.shard,
            n,
            total,
            other.shard,
            other.of,
            other.list_sessions
        );
    }
    let missing: Vec<String> = (1..=n)
        .filter(|i| !shards.iter().any(|s| s.shard == *i))
        .map(|i| format!("{i}/{n}"))
        .collect();
    if !missing.is_empty() {
        return Err(CheckFailed(format!(
            "--merge {}: shard{} {} not finished (or failed before writing its record); rerun {} and merge again",
            report.display(),
            if missing.len() == 1 { "" } else { "s" },
            missing.join(", "),
            if missing.len() == 1 { "it" } else { "them" }
        ))
        .into());
    }
    let mut results: Vec<SessionResult> = Vec::with_capacity(total);
    for k in 0..total {
        results.push(read_json(&result_path(report, k))?);
    }
    let (table, summary) = merged_tables(&results);
    write_atomic(&report.join("scores.csv"), table.as_bytes())?;
    write_atomic(&report.join("summary.csv"), summary.as_bytes())?;
    cc_by_session_plot(&results, &report.join("cc-by-session"))?;
    let failed: Vec<&SessionResult> = results.iter().filter(|r| r.error.is_some()).collect();
    print!("{summary}");
    println!(
        "merged {} sessions from {n} shard{} -> {}",
        results.len() - failed.len(),
        if n == 1 { "" } else { "s" },
        report.join("scores.csv").display()
    );
    if !failed.is_empty() {
        for f in &failed {
            eprintln!(
                "replay-tool: session {} ({}) failed: {}",
                f.index,
                f.session,
                f.error.as_deref().unwrap_or("")
            );
        }
        return Err(CheckFailed(format!(
            "{} of {total} sessions could not be evaluated",
            failed.len()
        ))
        .into());
    }
    Ok(())
}

/// The combined table (one row per session, decoder and output) and the
/// summary across sessions (mean and median CC, mean R² and RMSE).
pub fn merged_tables(results: &[SessionResult]) -> (String, String) {
    let mut table = String::from("session_index,session,decoder,output,cc,r2,rmse\n");
    let mut by: Vec<((String, String), Vec<Scores>)> = Vec::new();
    for r in results.iter().filter(|r| r.error.is_none()) {
        for d in &r.decoders {
            for (o, sc) in d.outputs.iter().zip(&d.mean) {
                let _ = writeln!(
                    table,
                    "{},{},{},{},{:?},{:?},{:?}",
                    r.index,
                    csv_field(&r.session),
                    d.decoder,
                    o,
                    sc.cc,
                    sc.r2,
                    sc.rmse
                );
                let key = (d.decoder.clone(), o.clone());
                match by.iter_mut().find(|(k, _)| *k == key) {
                    Some((_, v)) => v.push(*sc),
                    None => by.push((key, vec![*sc])),
                }
            }
        }
    }
    let mut summary = String::from("decoder,output,sessions,mean_cc,median_cc,mean_r2,mean_rmse\n");
    for ((decoder, output), v) in &by {
        let mean = |f: fn(&Scores) -> f64| v.iter().map(f).sum::<f64>() / v.len() as f64;
        let mut cc: Vec<f64> = v.iter().map(|s| s.cc).collect();
        cc.sort_by(f64::total_cmp);
        let median = if cc.len() % 2 == 1 {
            cc[cc.len() / 2]
        } else {
            0.5 * (cc[cc.len() / 2 - 1] + cc[cc.len() / 2])
        };
        let _ = writeln!(
            summary,
            "{decoder},{output},{},{:.4},{:.4},{:.4},{:.4}",
            v.len(),
            mean(|s| s.cc),
            median,
            mean(|s| s.r2),
            mean(|s| s.rmse)
        );
    }
    (table, summary)
}

fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

/// `<stem>.svg` and `<stem>.png`: each decoder's CC (mean over outputs)
/// per session.
fn cc_by_session_plot(results: &[SessionResult], stem: &Path) -> Result<()> {
    let ok: Vec<&SessionResult> = results.iter().filter(|r| r.error.is_none()).collect();
    let mut names: Vec<String> = Vec::new();
    for r in &ok {
        for d in &r.decoders {
            if !names.contains(&d.decoder) {
                names.push(d.decoder.clone());
            }
        }
    }
    let series: Vec<(String, Vec<(f64, f64)>)> = names
        .iter()
        .map(|name| {
            let pts = ok
                .iter()
                .filter_map(|r| {
                    let d = r.decoders.iter().find(|d| &d.decoder == name)?;
                    let cc = d.mean.iter().map(|s| s.cc).sum::<f64>() / d.mean.len().max(1) as f64;
                    Some((r.index as f64, cc))
                })
                .collect();
            (name.clone(), pts)
        })
        .collect();
    let max_x = ok.iter().map(|r| r.index).max().unwrap_or(0) as f64;
    crate::plot::cc_by_session(&series, max_x, stem)
}
