//! The session directory: how a calibration or replay block arrives from a
//! user's own rig (counts and kinematics as NumPy files, a TOML manifest and an
//! optional trial table), and how the simulator writes one.
//!
//! Everything a user can get wrong here gets a [`BlockError`] that names the
//! file and the problem, because the person reading it is usually at a rig
//! with a block exported minutes ago and needs to know which array to fix.
//! The directory's names, manifest and error live in
//! [`crate::formats::block_dir`]; they are named again here for the
//! block's users.

use std::path::Path;

use ndarray::Array2;
use ndarray_npy::{ReadNpyError, ReadNpyExt, WriteNpyExt};

use crate::bin_width::BinWidth;
pub use crate::formats::block_dir::{
    BlockError, BlockManifest, CLICK_FILE, COUNTS_FILE, FEATURES_FILE, KINEMATICS_FILE,
    MANIFEST_FILE, SESSION_FORMAT_VERSION, TRIALS_FILE, Trial, VALID_FILE, write_atomic,
    write_manifest, write_manifest_naming, write_trials,
};
use crate::formats::block_dir::{
    check_kinematics_shape, npy_problem, read_bytes, read_manifest, read_trials,
};
use crate::formats::npy_stream::NpyRows;
use crate::linalg::Mat;
use crate::wire::packet::{BinKind, BinValues};

/// A block of binned spike counts, with the kinematics recorded in the same
/// bins when the block is meant for training.
#[derive(Clone, Debug, PartialEq)]
pub struct Block {
    pub bin_width: BinWidth,
    pub n_bins: usize,
    pub n_channels: usize,
    /// What the block holds per channel and bin: spike counts
    /// (`counts.npy`) or continuous features (`features.npy`).
    pub input: BinKind,
    /// `n_bins × n_channels` counts, bin after bin (the bin packet's
    /// layout); empty in a block of features.
    pub counts: Vec<u16>,
    /// `n_bins × n_channels` features as f32 (the bin packet's precision),
    /// bin after bin; empty in a block of counts.
    pub features: Vec<f32>,
    /// Names of the kinematics columns, from the manifest.
    pub kinematic_names: Vec<String>,
    /// `n_bins × kinematic_names.len()`, or `None` for a block without
    /// kinematics (replay only).
    pub kinematics: Option<Mat>,
    pub trials: Option<Vec<Trial>>,
    pub channel_labels: Option<Vec<String>>,
    pub notes: Option<String>,
    /// Per bin, whether it is used for training and scoring (`valid.npy`);
    /// `None` means every bin is valid.
    pub valid: Option<Vec<bool>>,
    /// Per bin, whether the task cued a click in it (`click.npy`), for
    /// training a click decoder; `None` when the block has no click cues.
    pub click: Option<Vec<bool>>,
}

impl Block {
    /// Reads a session directory (PROTOCOL.md §3). `kinematics.npy` may be absent;
    /// training then refuses the block with its own error.
    pub fn read(dir: &Path) -> Result<Block, BlockError> {
        if !dir.is_dir() {
            return Err(BlockError::Missing {
                path: dir.to_path_buf(),
                what: "the session directory",
            });
        }
        let manifest_path = dir.join(MANIFEST_FILE);
        let manifest = read_manifest(&manifest_path)?;
        let (input, values_path) = values_file(dir)?;
        let (n_bins, n_channels, counts, features) = match input {
            BinKind::Counts => {
                let (t, n, c) = read_counts(&values_path)?;
                (t, n, c, Vec::new())
            }
            BinKind::Features => {
                let (t, n, f) = read_features(&values_path)?;
                (t, n, Vec::new(), f)
            }
        };
        if let Some(labels) = &manifest.channel_labels
            && labels.len() != n_channels
        {
            return Err(BlockError::Manifest {
                path: manifest_path,
                problem: format!(
                    "key channel_labels has {} labels but {} has {n_channels} channels",
                    labels.len(),
                    values_file_name(input)
                ),
            });
        }
        let kin_path = dir.join(KINEMATICS_FILE);
        let kinematics = if kin_path.exists() {
            Some(read_kinematics(&kin_path, &manifest.kinematics, n_bins)?)
        } else {
            None
        };
        let trials_path = dir.join(TRIALS_FILE);
        let trials = if trials_path.exists() {
            Some(read_trials(&trials_path, n_bins)?)
        } else {
            None
        };
        let valid_path = dir.join(VALID_FILE);
        let valid = if valid_path.exists() {
            Some(read_flags(&valid_path, "valid.npy", n_bins)?)
        } else {
            None
        };
        let click_path = dir.join(CLICK_FILE);
        let click = if click_path.exists() {
            Some(read_flags(&click_path, "click.npy", n_bins)?)
        } else {
            None
        };
        Ok(Block {
            bin_width: BinWidth::from_ms(manifest.bin_ms).expect("checked with the manifest"),
            n_bins,
            n_channels,
            input,
            counts,
            features,
            kinematic_names: manifest.kinematics,
            kinematics,
            trials,
            channel_labels: manifest.channel_labels,
            notes: manifest.notes,
            valid,
            click,
        })
    }

    /// Writes the block as a session directory, each file through a temporary
    /// name and a rename so an interrupted write never leaves half a file.
    pub fn write(&self, dir: &Path) -> Result<(), BlockError> {
        write_manifest(
            dir,
            self.bin_width,
            &self.kinematic_names,
            self.channel_labels.clone(),
            self.notes.clone(),
        )?;

        match self.input {
            BinKind::Counts => {
                let counts =
                    Array2::from_shape_vec((self.n_bins, self.n_channels), self.counts.clone())
                        .expect("counts length matches shape");
                write_atomic(&dir.join(COUNTS_FILE), &npy_bytes(&counts))?;
            }
            BinKind::Features => {
                let features =
                    Array2::from_shape_vec((self.n_bins, self.n_channels), self.features.clone())
                        .expect("features length matches shape");
                write_atomic(&dir.join(FEATURES_FILE), &npy_bytes(&features))?;
            }
        }
        if let Some(kin) = &self.kinematics {
            let arr =
                Array2::from_shape_vec((kin.rows, kin.cols), kin.data.clone()).expect("shape");
            write_atomic(&dir.join(KINEMATICS_FILE), &npy_bytes(&arr))?;
        }
        if let Some(trials) = &self.trials {
            write_trials(dir, trials)?;
        }
        if let Some(valid) = &self.valid {
            write_flags(&dir.join(VALID_FILE), valid)?;
        }
        if let Some(click) = &self.click {
            write_flags(&dir.join(CLICK_FILE), click)?;
        }
        Ok(())
    }

    /// Bins marked valid (all of them without `valid.npy`).
    pub fn n_valid(&self) -> usize {
        self.valid
            .as_ref()
            .map_or(self.n_bins, |v| v.iter().filter(|b| **b).count())
    }

    /// The runs of consecutive valid bins, in order.
    pub fn valid_runs(&self) -> Vec<std::ops::Range<usize>> {
        let Some(valid) = &self.valid else {
            return std::iter::once(0..self.n_bins).collect();
        };
        let mut runs = Vec::new();
        let mut start = None;
        for (b, &ok) in valid.iter().enumerate() {
            match (ok, start) {
                (true, None) => start = Some(b),
                (false, Some(s)) => {
                    runs.push(s..b);
                    start = None;
                }
                _ => {}
            }
        }
        if let Some(s) = start {
            runs.push(s..valid.len());
        }
        runs
    }

    /// The block with its bins that are not valid left out, runs joined
    /// end to end and trials renumbered onto the kept bins (a trial left
    /// with no bin goes). The block itself when every bin is valid.
    pub fn valid_only(&self) -> Block {
        let Some(valid) = &self.valid else {
            return self.clone();
        };
        if valid.iter().all(|v| *v) {
            return Block {
                valid: None,
                ..self.clone()
            };
        }
        let n = self.n_channels;
        // kept_before[b]: valid bins before bin b.
        let mut kept_before = Vec::with_capacity(self.n_bins + 1);
        let mut k = 0usize;
        for &ok in valid {
            kept_before.push(k);
            k += usize::from(ok);
        }
        kept_before.push(k);
        let mut counts = Vec::with_capacity(if self.input == BinKind::Counts {
            k * n
        } else {
            0
        });
        let mut features = Vec::with_capacity(if self.input == BinKind::Features {
            k * n
        } else {
            0
        });
        let cols = self.kinematic_names.len();
        let mut kin = Vec::with_capacity(if self.kinematics.is_some() {
            k * cols
        } else {
            0
        });
        for (b, _) in valid.iter().enumerate().filter(|(_, ok)| **ok) {
            match self.bin_values(b) {
                BinValues::Counts(c) => counts.extend_from_slice(c),
                BinValues::Features(f) => features.extend_from_slice(f),
            }
            if let Some(m) = &self.kinematics {
                kin.extend_from_slice(m.row(b));
            }
        }
        let trials = self
            .trials
            .as_ref()
            .map(|ts| crate::formats::block_dir::renumber_trials(ts, |b| kept_before[b]));
        Block {
            bin_width: self.bin_width,
            n_bins: k,
            n_channels: n,
            input: self.input,
            counts,
            features,
            kinematic_names: self.kinematic_names.clone(),
            kinematics: self.kinematics.as_ref().map(|_| Mat {
                rows: k,
                cols,
                data: kin,
            }),
            trials,
            channel_labels: self.channel_labels.clone(),
            notes: self.notes.clone(),
            valid: None,
            click: self.click.as_ref().map(|c| {
                c.iter()
                    .zip(valid)
                    .filter(|(_, ok)| **ok)
                    .map(|(c, _)| *c)
                    .collect()
            }),
        }
    }

    /// The counts of one bin (of a block of counts).
    pub fn bin_counts(&self, bin: usize) -> &[u16] {
        &self.counts[bin * self.n_channels..(bin + 1) * self.n_channels]
    }

    /// The values of one bin, of the block's kind.
    pub fn bin_values(&self, bin: usize) -> BinValues<'_> {
        let (a, b) = (bin * self.n_channels, (bin + 1) * self.n_channels);
        match self.input {
            BinKind::Counts => BinValues::Counts(&self.counts[a..b]),
            BinKind::Features => BinValues::Features(&self.features[a..b]),
        }
    }

    /// Index of a kinematics column by name.
    pub fn kinematic_index(&self, name: &str) -> Option<usize> {
        self.kinematic_names.iter().position(|n| n == name)
    }
}

/// Opens counts.npy for reading by rows, its shape checked: two
/// dimensions, at least one bin and one channel, at most the 16384
/// channels a bin packet carries.
pub(crate) fn open_counts(path: &Path) -> Result<NpyRows, BlockError> {
    open_values(path, BinKind::Counts)
}

/// Opens a block's counts.npy or features.npy, its shape checked.
pub(crate) fn open_values(path: &Path, kind: BinKind) -> Result<NpyRows, BlockError> {
    let rows = NpyRows::open(path, values_file_name(kind))?;
    if rows.ndim != 2 {
        return Err(BlockError::Npy {
            path: path.to_path_buf(),
            problem: format!(
                "array has {} dimensions; expected 2 (bins × channels)",
                rows.ndim
            ),
        });
    }
    let shape = |problem: String| BlockError::Shape {
        path: path.to_path_buf(),
        problem,
    };
    let (n_bins, n_channels) = (rows.rows, rows.cols);
    if n_bins == 0 || n_channels == 0 {
        return Err(shape(format!(
            "the block is empty (shape ({n_bins}, {n_channels})); it needs at least one bin and one channel"
        )));
    }
    if n_channels > 16384 {
        return Err(shape(format!(
            "{n_channels} channels; a bin packet carries at most 16384"
        )));
    }
    Ok(rows)
}

/// The file of a session directory that holds its bins' values, and its
/// kind: `counts.npy` or `features.npy`, exactly one of them.
pub(crate) fn values_file(dir: &Path) -> Result<(BinKind, std::path::PathBuf), BlockError> {
    let (counts, features) = (dir.join(COUNTS_FILE), dir.join(FEATURES_FILE));
    match (counts.exists(), features.exists()) {
        (true, true) => Err(BlockError::Shape {
            path: dir.to_path_buf(),
            problem: "holds both counts.npy and features.npy; a block holds exactly one of them (move one into a block of its own)".into(),
        }),
        (false, true) => Ok((BinKind::Features, features)),
        _ => Ok((BinKind::Counts, counts)),
    }
}

/// The file name of a block's values of `kind`.
pub fn values_file_name(kind: BinKind) -> &'static str {
    match kind {
        BinKind::Counts => COUNTS_FILE,
        BinKind::Features => FEATURES_FILE,
    }
}

/// Reads features.npy into f32, a chunk of rows at a time.
fn read_features(path: &Path) -> Result<(usize, usize, Vec<f32>), BlockError> {
    let mut rows = open_values(path, BinKind::Features)?;
    let (n_bins, n_channels) = (rows.rows, rows.cols);
    let mut features = Vec::with_capacity(n_bins * n_channels);
    let mut chunk = Vec::new();
    while rows.read_features(4096, &mut chunk)? > 0 {
        features.extend_from_slice(&chunk);
    }
    Ok((n_bins, n_channels, features))
}

/// Reads counts.npy straight into u16, a chunk of rows at a time, so the
/// block costs its counts' size in memory and no wider copy.
fn read_counts(path: &Path) -> Result<(usize, usize, Vec<u16>), BlockError> {
    let mut rows = open_counts(path)?;
    let (n_bins, n_channels) = (rows.rows, rows.cols);
    let mut counts = Vec::with_capacity(n_bins * n_channels);
    let mut chunk = Vec::new();
    while rows.read_counts(4096, &mut chunk)? > 0 {
        counts.extend_from_slice(&chunk);
    }
    Ok((n_bins, n_channels, counts))
}

fn read_kinematics(path: &Path, names: &[String], n_bins: usize) -> Result<Mat, BlockError> {
    let bytes = read_bytes(path, "kinematics.npy")?;
    let arr = match Array2::<f64>::read_npy(&bytes[..]) {
        Ok(a) => a,
        Err(ReadNpyError::WrongDescriptor(_)) => match Array2::<f32>::read_npy(&bytes[..]) {
            Ok(a) => a.mapv(f64::from),
            Err(ReadNpyError::WrongDescriptor(d)) => {
                return Err(BlockError::Npy {
                    path: path.to_path_buf(),
                    problem: format!("dtype {d} is not float64 or float32"),
                });
            }
            Err(e) => {
                return Err(BlockError::Npy {
                    path: path.to_path_buf(),
                    problem: npy_problem(&e),
                });
            }
        },
        Err(e) => {
            return Err(BlockError::Npy {
                path: path.to_path_buf(),
                problem: npy_problem(&e),
            });
        }
    };
    let (rows, cols) = arr.dim();
    check_kinematics_shape(path, rows, cols, names, n_bins)?;
    let mut data = Vec::with_capacity(rows * cols);
    for ((bin, column), &value) in arr.indexed_iter() {
        if !value.is_finite() {
            return Err(BlockError::NonFinite {
                path: path.to_path_buf(),
                bin,
                column,
                name: names[column].clone(),
                value,
            });
        }
        data.push(value);
    }
    Ok(Mat { rows, cols, data })
}

/// A per-bin flag file (`valid.npy`, `click.npy`): 1-D bool, one a bin.
fn read_flags(path: &Path, what: &'static str, n_bins: usize) -> Result<Vec<bool>, BlockError> {
    let bytes = read_bytes(path, what)?;
    let arr = ndarray::Array1::<bool>::read_npy(&bytes[..]).map_err(|e| BlockError::Npy {
        path: path.to_path_buf(),
        problem: format!(
            "{}; {what} must be a 1-D bool array, one entry per bin",
            npy_problem(&e)
        ),
    })?;
    if arr.len() != n_bins {
        return Err(BlockError::Shape {
            path: path.to_path_buf(),
            problem: format!(
                "{what} has {} entries but counts.npy has {n_bins} bins",
                arr.len()
            ),
        });
    }
    Ok(arr.to_vec())
}

/// Writes a per-bin flag file.
pub fn write_flags(path: &Path, flags: &[bool]) -> Result<(), BlockError> {
    let mut out = Vec::new();
    ndarray::Array1::from_vec(flags.to_vec())
        .write_npy(&mut out)
        .expect("in-memory npy write");
    write_atomic(path, &out)
}

fn npy_bytes<T: ndarray_npy::WritableElement>(arr: &Array2<T>) -> Vec<u8> {
    let mut out = Vec::new();
    arr.write_npy(&mut out).expect("in-memory npy write");
    out
}
