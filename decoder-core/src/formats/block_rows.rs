//! A block seen as passes over its rows, a chunk at a time, so that fitting
//! and cross-validation cost the same memory for a one-minute block and a
//! four-hour one. A block in memory ([`Block`]) and a session directory
//! read from disk chunk by chunk ([`BlockFiles`]) offer the same passes and
//! give the same rows, so evaluation run either way gives the same bits.
//!
//! Rows not marked valid (`valid.npy`, PROTOCOL.md §3) are left out of a
//! pass, the kept rows numbered end to end as [`Block::valid_only`] numbers
//! them, with the trials renumbered onto them.

use std::path::{Path, PathBuf};

use crate::bin_width::BinWidth;
use crate::formats::block::{Block, open_values, values_file, values_file_name};
use crate::formats::block_dir::{
    BlockError, BlockManifest, KINEMATICS_FILE, TRIALS_FILE, Trial, VALID_FILE,
    check_kinematics_shape, read_trials, renumber_trials,
};
use crate::formats::npy_stream::NpyRows;
use crate::wire::packet::{BinKind, BinValues};

/// What a block is, without its rows: enough to plan folds and check
/// options before the first pass.
#[derive(Clone, Debug, PartialEq)]
pub struct BlockInfo {
    pub bin_width: BinWidth,
    /// What the rows hold per channel: counts or continuous features.
    pub input: BinKind,
    /// Valid rows, the ones a pass visits.
    pub n_bins: usize,
    pub n_channels: usize,
    pub kinematic_names: Vec<String>,
    pub has_kinematics: bool,
    /// Trials on the valid rows' numbering.
    pub trials: Option<Vec<Trial>>,
    /// Valid rows at which another block starts, in increasing order
    /// (several blocks trained as one, [`Joined`]): no fit pairs a row with
    /// one before its edge, and no history reaches across it.
    pub edges: Vec<usize>,
    /// Valid rows at which each joined block after the first starts (a
    /// subset of `edges`): where per-block normalisation keeps each block's
    /// statistics apart.
    pub block_starts: Vec<usize>,
}

impl BlockInfo {
    /// `0..n_bins` cut at the edges: the runs within which rows pair.
    pub fn runs(&self) -> Vec<std::ops::Range<usize>> {
        let mut cuts = vec![0];
        cuts.extend(
            self.edges
                .iter()
                .copied()
                .filter(|&e| e > 0 && e < self.n_bins),
        );
        cuts.push(self.n_bins);
        cuts.windows(2)
            .filter(|w| w[1] > w[0])
            .map(|w| w[0]..w[1])
            .collect()
    }

    /// `segments` split by block: one group per block, in order (a group
    /// may be empty), each segment cut where a block starts.
    pub fn by_block(
        &self,
        segments: &[std::ops::Range<usize>],
    ) -> Vec<Vec<std::ops::Range<usize>>> {
        let mut cuts = vec![0];
        cuts.extend(self.block_starts.iter().copied());
        cuts.push(usize::MAX);
        cuts.windows(2)
            .map(|w| {
                segments
                    .iter()
                    .map(|s| s.start.max(w[0])..s.end.min(w[1]))
                    .filter(|s| s.start < s.end)
                    .collect()
            })
            .collect()
    }

    /// Index of a kinematics column by name.
    pub fn kinematic_index(&self, name: &str) -> Option<usize> {
        self.kinematic_names.iter().position(|n| n == name)
    }
}

/// Consecutive valid rows: `rows` of them from row `first`, their counts
/// or features (`rows × n_channels`, the other empty) and kinematics
/// (`rows × kinematic_names.len()`, empty for a block without kinematics).
#[derive(Clone, Copy, Debug)]
pub struct RowChunk<'a> {
    pub first: usize,
    pub rows: usize,
    pub counts: &'a [u16],
    pub features: &'a [f32],
    pub kinematics: &'a [f64],
}

impl<'a> RowChunk<'a> {
    /// Row `r`'s values (`n` channels), of whichever kind the chunk holds.
    pub fn values(&self, r: usize, n: usize) -> BinValues<'a> {
        if self.features.is_empty() {
            BinValues::Counts(&self.counts[r * n..(r + 1) * n])
        } else {
            BinValues::Features(&self.features[r * n..(r + 1) * n])
        }
    }
}

/// Consecutive rows, valid or not, as a replay decodes them: `rows` of
/// them from row `first`, their counts, kinematics (empty without) and
/// whether each is valid.
#[derive(Clone, Copy, Debug)]
pub struct AllRowsChunk<'a> {
    pub first: usize,
    pub rows: usize,
    pub counts: &'a [u16],
    pub features: &'a [f32],
    pub kinematics: &'a [f64],
    /// One per row; empty when every row is valid.
    pub valid: &'a [bool],
}

impl<'a> AllRowsChunk<'a> {
    /// Row `r`'s values (`n` channels), of whichever kind the chunk holds.
    pub fn values(&self, r: usize, n: usize) -> BinValues<'a> {
        if self.features.is_empty() {
            BinValues::Counts(&self.counts[r * n..(r + 1) * n])
        } else {
            BinValues::Features(&self.features[r * n..(r + 1) * n])
        }
    }

    pub fn is_valid(&self, row: usize) -> bool {
        self.valid.is_empty() || self.valid[row]
    }
}

/// A block that can be read from its first valid row to its last, as many
/// times as a fit needs.
pub trait BlockRows {
    fn info(&self) -> BlockInfo;
    /// Visits every valid row once, in order, a chunk at a time.
    fn pass(&self, visit: &mut dyn FnMut(RowChunk<'_>)) -> Result<(), BlockError>;
}

/// A whole block (not a fold's subset), read from its first row to its
/// last as a replay decodes it: a bin that never came still had its slot.
pub trait AllRows: BlockRows {
    /// Every row, valid or not.
    fn all_bins(&self) -> usize;
    /// Visits every row once, in order, a chunk at a time.
    fn pass_all(&self, visit: &mut dyn FnMut(AllRowsChunk<'_>)) -> Result<(), BlockError>;
}

impl Block {
    /// SHA-256 over the block's valid rows as decoded (see
    /// [`data_sha256`]).
    pub fn data_sha256(&self) -> String {
        data_sha256(self).expect("a block in memory reads")
    }

    /// The counts and the features of bins `a..b`, one of them empty
    /// (whichever the block does not hold).
    fn values_of(&self, a: usize, b: usize) -> (&[u16], &[f32]) {
        let n = self.n_channels;
        match self.input {
            BinKind::Counts => (&self.counts[a * n..b * n], &[]),
            BinKind::Features => (&[], &self.features[a * n..b * n]),
        }
    }
}

impl BlockRows for Block {
    fn info(&self) -> BlockInfo {
        let runs = self.valid_runs();
        // Kept rows before bin b, from the runs of valid bins.
        let kept = |b: usize| {
            runs.iter()
                .map(|r| r.end.min(b).saturating_sub(r.start))
                .sum()
        };
        BlockInfo {
            bin_width: self.bin_width,
            input: self.input,
            n_bins: self.n_valid(),
            n_channels: self.n_channels,
            kinematic_names: self.kinematic_names.clone(),
            has_kinematics: self.kinematics.is_some(),
            trials: match (&self.trials, &self.valid) {
                (Some(t), Some(_)) => Some(renumber_trials(t, kept)),
                (t, _) => t.clone(),
            },
            edges: Vec::new(),
            block_starts: Vec::new(),
        }
    }

    fn pass(&self, visit: &mut dyn FnMut(RowChunk<'_>)) -> Result<(), BlockError> {
        let k = self.kinematic_names.len();
        let mut first = 0;
        // Each run of valid bins is contiguous in memory: no copy.
        for run in self.valid_runs() {
            let (counts, features) = self.values_of(run.start, run.end);
            visit(RowChunk {
                first,
                rows: run.len(),
                counts,
                features,
                kinematics: self
                    .kinematics
                    .as_ref()
                    .map_or(&[][..], |m| &m.data[run.start * k..run.end * k]),
            });
            first += run.len();
        }
        Ok(())
    }
}

impl AllRows for Block {
    fn all_bins(&self) -> usize {
        self.n_bins
    }

    fn pass_all(&self, visit: &mut dyn FnMut(AllRowsChunk<'_>)) -> Result<(), BlockError> {
        let k = self.kinematic_names.len();
        let mut first = 0;
        while first < self.n_bins {
            let end = (first + CHUNK_ROWS).min(self.n_bins);
            let (counts, features) = self.values_of(first, end);
            visit(AllRowsChunk {
                first,
                rows: end - first,
                counts,
                features,
                kinematics: self
                    .kinematics
                    .as_ref()
                    .map_or(&[][..], |m| &m.data[first * k..end * k]),
                valid: self.valid.as_ref().map_or(&[][..], |v| &v[first..end]),
            });
            first = end;
        }
        Ok(())
    }
}

/// SHA-256 over the valid rows as decoded: counts as u16 little-endian
/// (features as f32 little-endian), row after row, then kinematics as f64 little-endian when present (two
/// passes). The same data stored with another integer dtype hashes the
/// same, so a model's `data_sha256` identifies the numbers it was trained
/// on.
pub fn data_sha256(rows: &dyn BlockRows) -> Result<String, BlockError> {
    use sha2::{Digest, Sha256};
    let mut hasher = Sha256::new();
    rows.pass(&mut |chunk| {
        for c in chunk.counts {
            hasher.update(c.to_le_bytes());
        }
        for f in chunk.features {
            hasher.update(f.to_le_bytes());
        }
    })?;
    if rows.info().has_kinematics {
        rows.pass(&mut |chunk| {
            for v in chunk.kinematics {
                hasher.update(v.to_le_bytes());
            }
        })?;
    }
    Ok(hasher
        .finalize()
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect())
}

/// Rows read per chunk from disk: large enough to amortise the reads,
/// small enough that a pass holds a few MB whatever the block's length.
pub const CHUNK_ROWS: usize = 4096;

/// A session directory read a chunk at a time: its files are checked
/// (shapes, dtypes, trials, `valid.npy`) when it is opened and every value
/// as a pass reads it.
#[derive(Clone, Debug)]
pub struct BlockFiles {
    dir: PathBuf,
    info: BlockInfo,
    /// Bins in the files, valid or not.
    file_bins: usize,
    has_valid: bool,
    chunk_rows: usize,
}

impl BlockFiles {
    pub fn open(dir: &Path) -> Result<BlockFiles, BlockError> {
        BlockFiles::open_with_chunk(dir, CHUNK_ROWS)
    }

    /// [`BlockFiles::open`] reading `chunk_rows` rows at a time (tests use
    /// tiny chunks to cross every boundary).
    pub fn open_with_chunk(dir: &Path, chunk_rows: usize) -> Result<BlockFiles, BlockError> {
        let manifest = BlockManifest::read(dir)?;
        let (input, values_path) = values_file(dir)?;
        let values = open_values(&values_path, input)?;
        let (file_bins, n_channels) = (values.rows, values.cols);
        if let Some(labels) = &manifest.channel_labels
            && labels.len() != n_channels
        {
            return Err(BlockError::Manifest {
                path: dir.join(crate::formats::block_dir::MANIFEST_FILE),
                problem: format!(
                    "key channel_labels has {} labels but {} has {n_channels} channels",
                    labels.len(),
                    values_file_name(input)
                ),
            });
        }
        let dtype_problem = match input {
            BinKind::Counts if !values.is_integer() => Some(format!(
                "counts have dtype {}; spike counts must be an integer dtype (save with counts.astype(np.uint16))",
                values.dtype_name()
            )),
            BinKind::Features if values.is_integer() => Some(format!(
                "features have dtype {}; continuous features must be float32 or float64 (counts go in counts.npy)",
                values.dtype_name()
            )),
            _ => None,
        };
        if let Some(problem) = dtype_problem {
            return Err(BlockError::Npy {
                path: values_path.clone(),
                problem,
            });
        }
        let kin_path = dir.join(KINEMATICS_FILE);
        let has_kinematics = kin_path.exists();
        if has_kinematics {
            let kin = NpyRows::open(&kin_path, "kinematics.npy")?;
            let problem = if kin.ndim != 2 {
                Some(format!(
                    "array has {} dimensions; expected 2 (bins × columns)",
                    kin.ndim
                ))
            } else if kin.is_integer() {
                Some(format!(
                    "dtype {} is not float64 or float32",
                    kin.dtype_name()
                ))
            } else {
                None
            };
            if let Some(problem) = problem {
                return Err(BlockError::Npy {
                    path: kin_path,
                    problem,
                });
            }
            check_kinematics_shape(
                &kin_path,
                kin.rows,
                kin.cols,
                &manifest.kinematic_names,
                file_bins,
            )?;
        }
        let trials_path = dir.join(TRIALS_FILE);
        let trials = if trials_path.exists() {
            Some(read_trials(&trials_path, file_bins)?)
        } else {
            None
        };
        let valid_path = dir.join(VALID_FILE);
        let has_valid = valid_path.exists();
        let (n_bins, trials) = if has_valid {
            let mut valid = open_valid(&valid_path, file_bins)?;
            // One pass over valid.npy: the kept rows before every trial
            // boundary, in order.
            let mut edges: Vec<usize> = trials
                .iter()
                .flatten()
                .flat_map(|t| [t.start_bin, t.end_bin])
                .collect();
            edges.sort_unstable();
            edges.dedup();
            let mut kept_at = Vec::with_capacity(edges.len());
            let (mut bin, mut kept, mut next) = (0usize, 0usize, 0usize);
            let mut chunk = Vec::new();
            loop {
                let got = valid.read_counts(chunk_rows.max(1), &mut chunk)?;
                for &v in &chunk[..got] {
                    while next < edges.len() && edges[next] == bin {
                        kept_at.push(kept);
                        next += 1;
                    }
                    kept += usize::from(v != 0);
                    bin += 1;
                }
                if got == 0 {
                    break;
                }
            }
            kept_at.resize(edges.len(), kept);
            let lookup = |b: usize| kept_at[edges.binary_search(&b).expect("an edge")];
            let trials = trials.map(|t| renumber_trials(&t, lookup));
            (kept, trials)
        } else {
            (file_bins, trials)
        };
        Ok(BlockFiles {
            dir: dir.to_path_buf(),
            info: BlockInfo {
                bin_width: manifest.bin_width,
                input,
                n_bins,
                n_channels,
                kinematic_names: manifest.kinematic_names,
                has_kinematics,
                trials,
                edges: Vec::new(),
                block_starts: Vec::new(),
            },
            file_bins,
            has_valid,
            chunk_rows: chunk_rows.max(1),
        })
    }

    pub fn dir(&self) -> &Path {
        &self.dir
    }
}

fn open_valid(path: &Path, file_bins: usize) -> Result<NpyRows, BlockError> {
    let valid = NpyRows::open(path, "valid.npy")?;
    if valid.ndim != 1 || valid.dtype_name() != "bool" {
        return Err(BlockError::Npy {
            path: path.to_path_buf(),
            problem: "valid.npy must be a 1-D bool array, one entry per bin".into(),
        });
    }
    if valid.rows != file_bins {
        return Err(BlockError::Shape {
            path: path.to_path_buf(),
            problem: format!(
                "valid.npy has {} entries but counts.npy has {file_bins} bins",
                valid.rows
            ),
        });
    }
    Ok(valid)
}

impl BlockRows for BlockFiles {
    fn info(&self) -> BlockInfo {
        self.info.clone()
    }

    fn pass(&self, visit: &mut dyn FnMut(RowChunk<'_>)) -> Result<(), BlockError> {
        let (n, k) = (self.info.n_channels, self.info.kinematic_names.len());
        let mut first = 0;
        self.read_chunks(&mut |c, f, x, valid| {
            let rows = match valid {
                Some(v) => {
                    // Keep the valid rows, moved down in place.
                    let mut kept = 0;
                    for (r, &ok) in v.iter().enumerate() {
                        if ok == 0 {
                            continue;
                        }
                        if kept != r {
                            if !c.is_empty() {
                                c.copy_within(r * n..(r + 1) * n, kept * n);
                            }
                            if !f.is_empty() {
                                f.copy_within(r * n..(r + 1) * n, kept * n);
                            }
                            if !x.is_empty() {
                                x.copy_within(r * k..(r + 1) * k, kept * k);
                            }
                        }
                        kept += 1;
                    }
                    kept
                }
                None => (c.len() + f.len()) / n.max(1),
            };
            if rows > 0 {
                visit(RowChunk {
                    first,
                    rows,
                    counts: if c.is_empty() { &[] } else { &c[..rows * n] },
                    features: if f.is_empty() { &[] } else { &f[..rows * n] },
                    kinematics: if x.is_empty() { &[] } else { &x[..rows * k] },
                });
            }
            first += rows;
        })
    }
}

impl AllRows for BlockFiles {
    fn all_bins(&self) -> usize {
        self.file_bins
    }

    fn pass_all(&self, visit: &mut dyn FnMut(AllRowsChunk<'_>)) -> Result<(), BlockError> {
        let n = self.info.n_channels;
        let (mut first, mut ok) = (0, Vec::new());
        self.read_chunks(&mut |c, f, x, valid| {
            let rows = (c.len() + f.len()) / n.max(1);
            ok.clear();
            ok.extend(valid.into_iter().flatten().map(|&b| b != 0));
            visit(AllRowsChunk {
                first,
                rows,
                counts: c,
                features: f,
                kinematics: x,
                valid: &ok,
            });
            first += rows;
        })
    }
}

/// What [`BlockFiles::read_chunks`] hands over per chunk: the counts (or
/// the features; the other empty) and kinematics, mutable so a pass can
/// compact them in place, and the valid flags.
type ChunkVisit<'v> = dyn FnMut(&mut Vec<u16>, &mut Vec<f32>, &mut Vec<f64>, Option<&[u16]>) + 'v;

impl BlockFiles {
    /// Reads the files a chunk of rows at a time, in step: the counts, the
    /// kinematics (empty without) and `valid.npy` as 0 or 1 (`None`
    /// without), for `visit` to use or compact in place.
    fn read_chunks(&self, visit: &mut ChunkVisit<'_>) -> Result<(), BlockError> {
        let (input, values_path) = values_file(&self.dir)?;
        let mut values = NpyRows::open(&values_path, values_file_name(input))?;
        let mut kin = if self.info.has_kinematics {
            Some(NpyRows::open(
                &self.dir.join(KINEMATICS_FILE),
                "kinematics.npy",
            )?)
        } else {
            None
        };
        let mut valid = if self.has_valid {
            Some(open_valid(&self.dir.join(VALID_FILE), self.file_bins)?)
        } else {
            None
        };
        let (mut c, mut f, mut x, mut v) = (Vec::new(), Vec::new(), Vec::new(), Vec::new());
        loop {
            let got = match input {
                BinKind::Counts => values.read_counts(self.chunk_rows, &mut c)?,
                BinKind::Features => values.read_features(self.chunk_rows, &mut f)?,
            };
            if got == 0 {
                return Ok(());
            }
            if let Some(kin) = kin.as_mut() {
                kin.read_f64(got, &self.info.kinematic_names, &mut x)?;
            }
            let flags = match valid.as_mut() {
                Some(valid) => {
                    valid.read_counts(got, &mut v)?;
                    Some(&v[..got])
                }
                None => None,
            };
            visit(&mut c, &mut f, &mut x, flags);
        }
    }
}

/// Several blocks trained as one calibration set (`train --session A
/// --session B …`): their valid rows numbered end to end, each block's
/// first row an edge ([`BlockInfo::edges`]) so no row is paired across
/// it, trials carried over on the joined numbering.
pub struct Joined<'a> {
    parts: Vec<&'a (dyn BlockRows + Sync)>,
    infos: Vec<BlockInfo>,
}

/// Why blocks cannot be trained as one: the first one that differs.
#[derive(Debug, thiserror::Error)]
#[error("block {index} ({what}) differs from the first block: {problem}")]
pub struct JoinError {
    pub index: usize,
    pub what: String,
    pub problem: String,
}

impl<'a> Joined<'a> {
    /// `parts` with a name each (for the error), in order.
    pub fn new(parts: Vec<(String, &'a (dyn BlockRows + Sync))>) -> Result<Joined<'a>, JoinError> {
        let infos: Vec<BlockInfo> = parts.iter().map(|(_, p)| p.info()).collect();
        for (i, ((name, _), info)) in parts.iter().zip(&infos).enumerate().skip(1) {
            let first = &infos[0];
            let problem = if info.n_channels != first.n_channels {
                Some(format!(
                    "{} channels, not {}",
                    info.n_channels, first.n_channels
                ))
            } else if info.bin_width != first.bin_width {
                Some(format!(
                    "{} ms bins, not {} ms",
                    info.bin_width.ms(),
                    first.bin_width.ms()
                ))
            } else if info.kinematic_names != first.kinematic_names {
                Some(format!(
                    "kinematics {:?}, not {:?}",
                    info.kinematic_names, first.kinematic_names
                ))
            } else if info.has_kinematics != first.has_kinematics {
                Some("one has kinematics and the other not".into())
            } else {
                None
            };
            if let Some(problem) = problem {
                return Err(JoinError {
                    index: i + 1,
                    what: name.clone(),
                    problem,
                });
            }
        }
        Ok(Joined {
            parts: parts.into_iter().map(|(_, p)| p).collect(),
            infos,
        })
    }

    /// The first valid row of each block.
    pub fn starts(&self) -> Vec<usize> {
        self.infos
            .iter()
            .scan(0, |at, i| {
                let s = *at;
                *at += i.n_bins;
                Some(s)
            })
            .collect()
    }
}

impl BlockRows for Joined<'_> {
    fn info(&self) -> BlockInfo {
        let starts = self.starts();
        let mut info = self.infos[0].clone();
        info.n_bins = self.infos.iter().map(|i| i.n_bins).sum();
        info.trials = if self.infos.iter().all(|i| i.trials.is_some()) {
            Some(
                self.infos
                    .iter()
                    .zip(&starts)
                    .flat_map(|(i, &s)| {
                        i.trials.iter().flatten().map(move |t| Trial {
                            start_bin: t.start_bin + s,
                            end_bin: t.end_bin + s,
                            ..t.clone()
                        })
                    })
                    .collect(),
            )
        } else {
            None
        };
        info.edges = self
            .infos
            .iter()
            .zip(&starts)
            .flat_map(|(i, &s)| std::iter::once(s).chain(i.edges.iter().map(move |e| e + s)))
            .filter(|&e| e > 0)
            .collect();
        info.block_starts = starts.iter().copied().skip(1).collect();
        info
    }

    fn pass(&self, visit: &mut dyn FnMut(RowChunk<'_>)) -> Result<(), BlockError> {
        for (part, offset) in self.parts.iter().zip(self.starts()) {
            part.pass(&mut |chunk: RowChunk<'_>| {
                visit(RowChunk {
                    first: chunk.first + offset,
                    ..chunk
                })
            })?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn collect(rows: &dyn BlockRows) -> (Vec<u16>, Vec<f64>, Vec<usize>) {
        let (mut c, mut x, mut firsts) = (Vec::new(), Vec::new(), Vec::new());
        rows.pass(&mut |chunk| {
            assert_eq!(chunk.first, c.len() / rows.info().n_channels);
            firsts.push(chunk.first);
            c.extend_from_slice(chunk.counts);
            x.extend_from_slice(chunk.kinematics);
        })
        .unwrap();
        (c, x, firsts)
    }

    /// A block of made-up counts and kinematics with a trial every 100
    /// bins (the simulator lives above this module).
    fn block(n_bins: usize, n_channels: usize) -> Block {
        let names: Vec<String> = ["pos_x", "vel_x"].map(String::from).to_vec();
        Block {
            input: crate::wire::packet::BinKind::Counts,
            features: Vec::new(),
            bin_width: BinWidth::from_us(20_000).unwrap(),
            n_bins,
            n_channels,
            counts: (0..n_bins * n_channels)
                .map(|i| (i * 7 % 5) as u16)
                .collect(),
            kinematics: Some(crate::linalg::Mat {
                rows: n_bins,
                cols: 2,
                data: (0..n_bins * 2).map(|i| (i as f64 * 0.37).sin()).collect(),
            }),
            kinematic_names: names,
            trials: Some(
                (0..n_bins / 100)
                    .map(|k| Trial {
                        trial: k as u32,
                        start_bin: 100 * k + 10,
                        end_bin: 100 * k + 90,
                        target_x: 1.0,
                        target_y: -1.0,
                    })
                    .collect(),
            ),
            channel_labels: None,
            notes: None,
            valid: None,
            click: None,
        }
    }

    #[test]
    fn files_and_memory_give_the_same_valid_rows_and_trials() {
        let dir = tempfile::tempdir().unwrap();
        let mut block = block(1200, 5);
        let mut valid = vec![true; block.n_bins];
        for b in (3..block.n_bins).step_by(7) {
            valid[b] = false;
        }
        valid[..40].fill(false);
        block.valid = Some(valid);
        block.write(dir.path()).unwrap();
        let only = block.valid_only();
        let (mc, mx, _) = collect(&block);
        assert_eq!(
            (&mc, &mx),
            (&only.counts, &only.kinematics.as_ref().unwrap().data)
        );
        assert!(only.trials.as_ref().is_some_and(|t| t.len() > 3));
        for chunk in [1, 3, 64, 100_000] {
            let files = BlockFiles::open_with_chunk(dir.path(), chunk).unwrap();
            assert_eq!(files.info(), block.info());
            assert_eq!(files.info().trials, only.trials);
            assert_eq!(files.info().n_bins, only.n_bins);
            let (fc, fx, _) = collect(&files);
            assert_eq!(fc, only.counts);
            assert_eq!(fx, only.kinematics.as_ref().unwrap().data);
        }
    }

    #[test]
    fn a_valid_file_of_the_wrong_length_is_named() {
        let dir = tempfile::tempdir().unwrap();
        let mut block = block(150, 3);
        block.valid = Some(vec![true; block.n_bins]);
        block.write(dir.path()).unwrap();
        let mut short = Vec::new();
        ndarray_npy::WriteNpyExt::write_npy(&ndarray::Array1::from_vec(vec![true; 5]), &mut short)
            .unwrap();
        std::fs::write(dir.path().join(VALID_FILE), short).unwrap();
        let e = BlockFiles::open(dir.path()).unwrap_err().to_string();
        assert!(e.contains("valid.npy has 5 entries"), "{e}");
    }
}
