//! A session log read as a calibration block (PROTOCOL.md §5, `export`).
//!
//! A rig records its calibration block through the daemon, so the block
//! has to come out of the log: one row per slot the daemon answered, the
//! counts as they arrived, the kinematics the task showed while each bin
//! was counted (for bin seq s, the latest task packet with `bin_seq < s`),
//! trials from the task's trial number and phase, and what the daemon sent.
//! Rows whose bin never came, or that had no task state yet, are kept for
//! timing and marked not valid, so training and scoring leave them out.

use std::path::{Path, PathBuf};

use ndarray_npy::WriteNpyExt;

use crate::formats::block::{Block, Trial};
use crate::formats::session_log::{LogEnd, LogReader, LogRecord, SessionLogError};
use crate::linalg::Mat;
use crate::wire::packet::{self, BinKind, BinValues, FLAG_BIN_MISSING, VelocityPacket};
use crate::wire::task_packet::{self, Phase, TaskState};

#[derive(Debug, thiserror::Error)]
pub enum LogBlockError {
    #[error(transparent)]
    Log(#[from] SessionLogError),
    #[error(transparent)]
    Write(#[from] crate::formats::block::BlockError),
    #[error(
        "{}: the log holds no answered slot; there is nothing to export (was a bin ever sent to the daemon?)",
        path.display()
    )]
    NoSlots { path: PathBuf },
    #[error(
        "{}: the log is damaged at byte {offset} ({problem}); run `replay-tool verify` on it, and cut it before that point to export the rest",
        path.display()
    )]
    Corrupt {
        path: PathBuf,
        offset: u64,
        problem: String,
    },
}

/// A log as a block, with what the daemon sent for each row.
#[derive(Clone, Debug, PartialEq)]
pub struct LogBlock {
    /// Counts, task kinematics (`pos_*`, `vel_*`), trials and `valid`.
    pub block: Block,
    /// The seq of each row.
    pub seqs: Vec<u64>,
    /// `rows × outputs`: the estimate each velocity packet carried.
    pub estimates: Mat,
    /// `rows × outputs`: the command each velocity packet carried.
    pub commands: Mat,
    /// The state each velocity packet carried (PROTOCOL.md §2 codes).
    pub states: Vec<u8>,
    /// When each velocity packet left (the daemon's `sent_ns`).
    pub sent_ns: Vec<u64>,
    /// Each velocity packet's click probability and whether it clicked.
    pub clicks: Vec<(f32, bool)>,
    /// The task state each row was counted under (`None`: none yet).
    pub task: Vec<Option<TaskState>>,
    pub summary: LogBlockSummary,
}

/// What the export found, for its report.
#[derive(Clone, Debug, Default, PartialEq, serde::Serialize)]
pub struct LogBlockSummary {
    pub rows: usize,
    /// Rows whose bin came and that had task state: what training uses.
    pub valid_rows: usize,
    pub trials: usize,
    pub bins_missing: usize,
    pub rows_without_task_state: usize,
    pub task_packets: u64,
    pub task_packets_rejected: u64,
    /// Accepted task packets of another dimension than the first one.
    pub task_packets_other_dims: u64,
    pub dims: Option<usize>,
    pub closed_loop_rows: usize,
    /// The target radius most task packets gave (position units).
    pub target_radius: Option<f64>,
    pub torn_tail: bool,
}

/// Column names for `dims` position dimensions: `pos_x, pos_y[, pos_z,
/// pos_4 …], vel_x, vel_y[, …]`.
pub fn kinematic_names(dims: usize) -> Vec<String> {
    let axis = |i: usize| match i {
        0 => "x".to_string(),
        1 => "y".to_string(),
        2 => "z".to_string(),
        _ => (i + 1).to_string(),
    };
    let mut names: Vec<String> = (0..dims).map(|i| format!("pos_{}", axis(i))).collect();
    names.extend((0..dims).map(|i| format!("vel_{}", axis(i))));
    names
}

/// One pass over a log: `on_slot` gets each answered slot's velocity
/// packet, in the order sent, with its bin's values when the bin came and
/// was decoded (`None`: a coasted slot); accepted task packets go to
/// `tasks`. The first copy of a seq is the one the daemon decoded; bins
/// older than a slot just answered will never be decoded. Bins are of the
/// kind the log's first model decodes (counts, or features); returns that
/// kind.
fn walk_slots(
    path: &Path,
    reader: &mut LogReader,
    summary: &mut LogBlockSummary,
    tasks: &mut Vec<TaskState>,
    mut on_slot: impl FnMut(&VelocityPacket, Option<BinValues<'_>>) -> Result<(), LogBlockError>,
) -> Result<BinKind, LogBlockError> {
    let header = reader.header().clone();
    let n = header.n_channels;
    let bin_us = header.bin_width.us();
    let mut input: Option<BinKind> = None;
    let mut pending: std::collections::BTreeMap<u64, (Vec<u16>, Vec<f32>)> = Default::default();
    while let Some(record) = reader.next_record() {
        match record {
            LogRecord::Model { model_file, .. } if input.is_none() => {
                input = crate::formats::model_file::ModelFile::from_bytes(&model_file, "")
                    .ok()
                    .map(|m| m.input);
            }
            LogRecord::Datagram { bytes, .. } => {
                let Ok(h) = packet::parse_bin(&bytes) else {
                    continue;
                };
                if usize::from(h.channels) != n
                    || h.bin_us != bin_us
                    || h.kind != input.unwrap_or(BinKind::Counts)
                {
                    continue;
                }
                pending.entry(h.seq).or_insert_with(|| match h.kind {
                    BinKind::Counts => {
                        let mut c = vec![0u16; n];
                        packet::read_counts(&bytes, &mut c);
                        (c, Vec::new())
                    }
                    BinKind::Features => {
                        let mut f = vec![0f32; n];
                        packet::read_features(&bytes, &mut f);
                        (Vec::new(), f)
                    }
                });
            }
            LogRecord::Sent { packet: bytes, .. } => {
                let Ok(p) = VelocityPacket::parse(&bytes) else {
                    continue;
                };
                let came = pending.remove(&p.seq);
                pending.retain(|&s, _| s > p.seq);
                let values = came
                    .as_ref()
                    .filter(|_| p.flags & FLAG_BIN_MISSING == 0)
                    .map(|(c, f)| {
                        if f.is_empty() {
                            BinValues::Counts(c)
                        } else {
                            BinValues::Features(f)
                        }
                    });
                on_slot(&p, values)?;
            }
            LogRecord::Task { bytes, .. } => {
                summary.task_packets += 1;
                match task_packet::parse_task(&bytes) {
                    Ok(t) => tasks.push(t),
                    Err(_) => summary.task_packets_rejected += 1,
                }
            }
            _ => {}
        }
    }
    match reader.end() {
        Some(LogEnd::Corrupt {
            offset, problem, ..
        }) => {
            return Err(LogBlockError::Corrupt {
                path: path.to_path_buf(),
                offset: *offset,
                problem: problem.clone(),
            });
        }
        Some(LogEnd::TornTail { .. }) => summary.torn_tail = true,
        _ => {}
    }
    Ok(input.unwrap_or(BinKind::Counts))
}

/// The first `d` values of `v`, zeros after.
fn padded(v: &[f64], d: usize) -> impl Iterator<Item = f64> + '_ {
    (0..d).map(|i| v.get(i).copied().unwrap_or(0.0))
}

/// What a log's task packets make of its rows.
struct RowTask {
    dims: Option<usize>,
    tasks: Vec<TaskState>,
    /// Per row, the index in `tasks` of the screen it was counted under.
    index: Vec<Option<u32>>,
}

impl RowTask {
    fn new(seqs: &[u64], mut tasks: Vec<TaskState>, summary: &mut LogBlockSummary) -> RowTask {
        let dims = tasks.first().map(TaskState::dims);
        if let Some(d) = dims {
            let before = tasks.len();
            tasks.retain(|t| t.dims() == d);
            summary.task_packets_other_dims = (before - tasks.len()) as u64;
        }
        summary.dims = dims;
        summary.target_radius = typical_radius(&tasks);
        let index = task_index_per_row(seqs, &tasks);
        RowTask { dims, tasks, index }
    }

    fn of(&self, row: usize) -> Option<&TaskState> {
        self.index[row].map(|i| &self.tasks[i as usize])
    }

    /// Per row, whether the task was cueing a click while it was counted;
    /// `None` when no task packet ever cued one.
    fn clicks(&self, rows: usize) -> Option<Vec<bool>> {
        let cued: Vec<bool> = (0..rows)
            .map(|r| self.of(r).is_some_and(TaskState::click_cued))
            .collect();
        cued.iter().any(|c| *c).then_some(cued)
    }

    /// The kinematics row (pos, vel) of `row`; zeros without task state.
    fn kinematics(&self, row: usize, out: &mut [f64]) {
        let d = self.dims.unwrap_or(2);
        out.fill(0.0);
        if let Some(t) = self.of(row) {
            out[..d].copy_from_slice(&t.cursor_pos[..d]);
            out[d..2 * d].copy_from_slice(&t.cursor_vel[..d]);
        }
    }
}

fn notes(path: &Path, seqs: &[u64], summary: &LogBlockSummary) -> String {
    format!(
        "exported from session log {}: one row per slot (seqs {}..={}); pos and vel are the cursor the task showed{}",
        path.display(),
        seqs[0],
        seqs[seqs.len() - 1],
        summary
            .target_radius
            .map_or(String::new(), |r| format!("; target radius {r}"))
    )
}

/// Reads the whole log at `path` and builds its block in memory (for
/// training and evaluation, which need it there).
pub fn read_log_block(path: &Path) -> Result<LogBlock, LogBlockError> {
    let mut reader = LogReader::open(path)?;
    let header = reader.header().clone();
    let n = header.n_channels;
    let d_out = header.outputs.len();
    let (mut counts, mut features) = (Vec::new(), Vec::new());
    let (mut missing, mut seqs) = (Vec::new(), Vec::new());
    let (mut estimates, mut commands) = (Vec::new(), Vec::new());
    let (mut states, mut sent_ns, mut clicks) = (Vec::new(), Vec::new(), Vec::new());
    let mut tasks = Vec::new();
    let mut summary = LogBlockSummary::default();
    let mut kind_seen = None;
    let input = walk_slots(path, &mut reader, &mut summary, &mut tasks, |p, c| {
        states.push(p.state);
        sent_ns.push(p.sent_ns);
        clicks.push((p.click_prob, p.flags & packet::FLAG_CLICK != 0));
        // A slot without its bin holds zeros of the log's kind, which the
        // first bin that came tells; until then, counts (fixed up below).
        match c {
            Some(BinValues::Counts(c)) => counts.extend_from_slice(c),
            Some(BinValues::Features(f)) => features.extend_from_slice(f),
            None if kind_seen == Some(BinKind::Features) => {
                features.extend(std::iter::repeat_n(0.0, n))
            }
            None => counts.extend(std::iter::repeat_n(0, n)),
        }
        if let Some(v) = c {
            kind_seen.get_or_insert(v.kind());
        }
        missing.push(c.is_none());
        seqs.push(p.seq);
        estimates.extend(padded(&p.estimate, d_out));
        commands.extend(padded(&p.command, d_out));
        Ok(())
    })?;
    let (rows, rt, valid) = rows_and_tasks(path, &seqs, &missing, tasks, &mut summary)?;
    if input == BinKind::Features && counts.len() + features.len() == rows * n {
        // Slots before the first bin of features were held as zero counts.
        features.splice(0..0, std::iter::repeat_n(0.0, counts.len()));
        counts.clear();
    }
    let d = rt.dims.unwrap_or(2);
    let mut kin = Mat::zeros(rows, 2 * d);
    let task: Vec<Option<TaskState>> = (0..rows).map(|r| rt.of(r).copied()).collect();
    for r in 0..rows {
        rt.kinematics(r, &mut kin.data[r * 2 * d..(r + 1) * 2 * d]);
    }
    let trials = trials_from_task(rows, |r| rt.of(r).copied());
    summary.trials = trials.len();
    let block = Block {
        bin_width: header.bin_width,
        n_bins: rows,
        n_channels: n,
        input,
        counts,
        features,
        kinematic_names: kinematic_names(d),
        kinematics: rt.dims.map(|_| kin),
        trials: rt.dims.map(|_| trials),
        channel_labels: None,
        notes: Some(notes(path, &seqs, &summary)),
        valid: Some(valid),
        click: rt.clicks(rows),
    };
    Ok(LogBlock {
        block,
        seqs,
        estimates: Mat {
            rows,
            cols: d_out,
            data: estimates,
        },
        commands: Mat {
            rows,
            cols: d_out,
            data: commands,
        },
        states,
        sent_ns,
        clicks,
        task,
        summary,
    })
}

/// The rows a first pass found, each with its task state, and which are
/// valid; the summary's row counts filled in.
fn rows_and_tasks(
    path: &Path,
    seqs: &[u64],
    missing: &[bool],
    tasks: Vec<TaskState>,
    summary: &mut LogBlockSummary,
) -> Result<(usize, RowTask, Vec<bool>), LogBlockError> {
    let rows = seqs.len();
    if rows == 0 {
        return Err(LogBlockError::NoSlots {
            path: path.to_path_buf(),
        });
    }
    let rt = RowTask::new(seqs, tasks, summary);
    let mut valid = Vec::with_capacity(rows);
    for (r, &gone) in missing.iter().enumerate() {
        let task = rt.of(r);
        valid.push(task.is_some() && !gone);
        summary.valid_rows += usize::from(task.is_some() && !gone);
        match task {
            Some(t) => summary.closed_loop_rows += usize::from(t.closed_loop()),
            None => summary.rows_without_task_state += 1,
        }
        summary.bins_missing += usize::from(gone);
    }
    summary.rows = rows;
    Ok((rows, rt, valid))
}

/// Writes the log at `path` as a session directory in bounded memory: a
/// first pass finds the slots and the task state of each, a second writes
/// the rows as it meets them. The files are those [`read_log_block`]
/// followed by [`Block::write`] would write, plus `estimates.npy` and
/// `commands.npy`.
pub fn export_log(path: &Path, dir: &Path) -> Result<LogBlockSummary, LogBlockError> {
    use crate::formats::block::{
        COUNTS_FILE, FEATURES_FILE, KINEMATICS_FILE, VALID_FILE, write_atomic, write_manifest,
        write_trials,
    };
    use crate::formats::npy_stream::NpyWriter;
    let mut reader = LogReader::open(path)?;
    let header = reader.header().clone();
    let (n, d_out) = (header.n_channels, header.outputs.len());
    let (mut seqs, mut missing, mut tasks) = (Vec::new(), Vec::new(), Vec::new());
    let mut summary = LogBlockSummary::default();
    let input = walk_slots(path, &mut reader, &mut summary, &mut tasks, |p, c| {
        seqs.push(p.seq);
        missing.push(c.is_none());
        Ok(())
    })?;
    let (rows, rt, valid) = rows_and_tasks(path, &seqs, &missing, tasks, &mut summary)?;
    let d = rt.dims.unwrap_or(2);
    write_manifest(
        dir,
        header.bin_width,
        &kinematic_names(d),
        None,
        Some(notes(path, &seqs, &summary)),
    )?;
    let mut values_out = match input {
        BinKind::Counts => NpyWriter::create_u16(&dir.join(COUNTS_FILE), rows, n)?,
        BinKind::Features => NpyWriter::create_f32(&dir.join(FEATURES_FILE), rows, n)?,
    };
    let mut kin_out = match rt.dims {
        Some(_) => Some(NpyWriter::create(&dir.join(KINEMATICS_FILE), rows, 2 * d)?),
        None => None,
    };
    let mut est_out = NpyWriter::create(&dir.join("estimates.npy"), rows, d_out)?;
    let mut cmd_out = NpyWriter::create(&dir.join("commands.npy"), rows, d_out)?;
    let (zeros, zero_features) = (vec![0u16; n], vec![0f32; n]);
    let mut kin_row = vec![0.0; 2 * d];
    let mut values = Vec::with_capacity(d_out);
    let mut row = 0usize;
    let mut reader = LogReader::open(path)?;
    let mut ignored = Vec::new();
    walk_slots(
        path,
        &mut reader,
        &mut LogBlockSummary::default(),
        &mut ignored,
        |p, c| {
            if row >= rows {
                return Ok(());
            }
            match (c, input) {
                (Some(BinValues::Counts(c)), _) => values_out.write_u16_rows(c)?,
                (Some(BinValues::Features(f)), _) => values_out.write_f32_rows(f)?,
                (None, BinKind::Counts) => values_out.write_u16_rows(&zeros)?,
                (None, BinKind::Features) => values_out.write_f32_rows(&zero_features)?,
            }
            if let Some(k) = kin_out.as_mut() {
                rt.kinematics(row, &mut kin_row);
                k.write_rows(&kin_row)?;
            }
            values.clear();
            values.extend(padded(&p.estimate, d_out));
            est_out.write_rows(&values)?;
            values.clear();
            values.extend(padded(&p.command, d_out));
            cmd_out.write_rows(&values)?;
            row += 1;
            Ok(())
        },
    )?;
    values_out.finish()?;
    if let Some(k) = kin_out {
        k.finish()?;
    }
    est_out.finish()?;
    cmd_out.finish()?;
    if rt.dims.is_some() {
        let trials = trials_from_task(rows, |r| rt.of(r).copied());
        summary.trials = trials.len();
        write_trials(dir, &trials)?;
    }
    let mut v = Vec::new();
    ndarray::Array1::from_vec(valid)
        .write_npy(&mut v)
        .expect("in-memory npy write");
    write_atomic(&dir.join(VALID_FILE), &v)?;
    if let Some(click) = rt.clicks(rows) {
        crate::formats::block::write_flags(&dir.join(crate::formats::block::CLICK_FILE), &click)?;
    }
    Ok(summary)
}

/// For each row's seq s, the latest-arrived task state with `bin_seq < s`.
#[cfg(test)]
fn task_state_per_row(seqs: &[u64], tasks: &[TaskState]) -> Vec<Option<TaskState>> {
    task_index_per_row(seqs, tasks)
        .into_iter()
        .map(|i| i.map(|i| tasks[i as usize]))
        .collect()
}

/// For each row's seq s, the index of the latest-arrived task state with
/// `bin_seq < s`.
fn task_index_per_row(seqs: &[u64], tasks: &[TaskState]) -> Vec<Option<u32>> {
    // Task packets sorted by bin_seq, swept against the rows sorted by
    // seq; among those admitted so far, the one that arrived last wins.
    let mut by_seq: Vec<usize> = (0..tasks.len()).collect();
    by_seq.sort_by_key(|&i| (tasks[i].bin_seq, i));
    let mut rows: Vec<usize> = (0..seqs.len()).collect();
    rows.sort_by_key(|&r| (seqs[r], r));
    let mut out = vec![None; seqs.len()];
    let mut next = 0;
    let mut latest: Option<usize> = None;
    for r in rows {
        while next < by_seq.len() && tasks[by_seq[next]].bin_seq < seqs[r] {
            latest = Some(latest.map_or(by_seq[next], |l| l.max(by_seq[next])));
            next += 1;
        }
        out[r] = latest.map(|i| i as u32);
    }
    out
}

/// Trials: runs of rows under one trial number in a phase inside a trial;
/// the target is the first valid one the run showed.
fn trials_from_task(rows: usize, task_of: impl Fn(usize) -> Option<TaskState>) -> Vec<Trial> {
    let mut trials: Vec<Trial> = Vec::new();
    let mut open: Option<(u32, usize, Option<[f64; 2]>)> = None;
    let close =
        |open: &mut Option<(u32, usize, Option<[f64; 2]>)>, end: usize, out: &mut Vec<Trial>| {
            if let Some((trial, start, target)) = open.take() {
                let target = target.unwrap_or([0.0, 0.0]);
                out.push(Trial {
                    trial,
                    start_bin: start,
                    end_bin: end,
                    target_x: target[0],
                    target_y: target[1],
                });
            }
        };
    for r in 0..rows {
        let here = task_of(r).filter(|t| t.phase != Phase::Between);
        match (here, open.as_mut()) {
            (Some(t), Some(o)) if o.0 == t.trial => {
                if o.2.is_none() && t.target_valid() {
                    o.2 = Some(target_xy(&t));
                }
            }
            (Some(t), _) => {
                close(&mut open, r, &mut trials);
                open = Some((t.trial, r, t.target_valid().then(|| target_xy(&t))));
            }
            (None, _) => close(&mut open, r, &mut trials),
        }
    }
    close(&mut open, rows, &mut trials);
    trials
}

fn target_xy(t: &TaskState) -> [f64; 2] {
    [
        t.target_pos[0],
        if t.dims() > 1 { t.target_pos[1] } else { 0.0 },
    ]
}

/// The radius most task packets with a valid target gave.
fn typical_radius(tasks: &[TaskState]) -> Option<f64> {
    let mut radii: Vec<f64> = tasks
        .iter()
        .filter(|t| t.target_valid())
        .map(|t| t.target_radius)
        .collect();
    if radii.is_empty() {
        return None;
    }
    radii.sort_by(f64::total_cmp);
    Some(radii[radii.len() / 2])
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::wire::task_packet::TASK_FLAG_TARGET_VALID;

    fn state(bin_seq: u64, trial: u32, phase: Phase, x: f64) -> TaskState {
        let mut t = TaskState::new(2);
        t.bin_seq = bin_seq;
        t.trial = trial;
        t.phase = phase;
        t.cursor_pos[0] = x;
        t.flags = TASK_FLAG_TARGET_VALID;
        t.target_pos[0] = 10.0 + f64::from(trial);
        t
    }

    #[test]
    fn a_bin_is_paired_with_the_screen_shown_while_it_was_counted() {
        // PROTOCOL.md §6: for seq s, the latest task packet with bin_seq < s.
        let tasks = [
            state(0, 0, Phase::Reach, 1.0),
            state(1, 0, Phase::Reach, 2.0),
            // Arrives late, drawn after bin 0: it is still the latest with
            // bin_seq < s for every later s.
            state(0, 0, Phase::Reach, 3.0),
            state(5, 0, Phase::Reach, 4.0),
        ];
        let rows = task_state_per_row(&[0, 1, 2, 3, 6], &tasks);
        let x: Vec<Option<f64>> = rows.iter().map(|t| t.map(|t| t.cursor_pos[0])).collect();
        assert_eq!(x, [None, Some(3.0), Some(3.0), Some(3.0), Some(4.0)]);
    }

    #[test]
    fn trials_run_while_the_task_is_inside_one() {
        let t = |trial, phase| Some(state(0, trial, phase, 0.0));
        let rows = [
            None,
            t(0, Phase::Between),
            t(1, Phase::Reach),
            t(1, Phase::Hold),
            t(1, Phase::Success),
            t(1, Phase::Between),
            t(2, Phase::Reach),
            t(3, Phase::Reach),
        ];
        let trials = trials_from_task(rows.len(), |r| rows[r]);
        let spans: Vec<(u32, usize, usize, f64)> = trials
            .iter()
            .map(|t| (t.trial, t.start_bin, t.end_bin, t.target_x))
            .collect();
        assert_eq!(spans, [(1, 2, 5, 11.0), (2, 6, 7, 12.0), (3, 7, 8, 13.0)]);
    }

    #[test]
    fn column_names_follow_the_protocol() {
        assert_eq!(
            kinematic_names(3),
            ["pos_x", "pos_y", "pos_z", "vel_x", "vel_y", "vel_z"]
        );
        assert_eq!(kinematic_names(4)[3], "pos_4");
    }
}
