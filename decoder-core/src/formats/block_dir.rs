//! The session directory's contract, in one place: its file names, the
//! manifest, the trial table and the one error every reader of a block
//! gives ([`BlockError`], naming the file and the problem). The readers
//! stand on this file: [`crate::formats::npy_stream`] (arrays a chunk of
//! rows at a time), [`crate::formats::block`] (a block in memory) and
//! [`crate::formats::block_rows`] (a block as passes over its valid rows),
//! in that order, none importing one above it.

use std::fs;
use std::io::Write;
use std::path::{Path, PathBuf};

use ndarray_npy::ReadNpyError;
use serde::{Deserialize, Serialize};

use crate::bin_width::BinWidth;

pub const MANIFEST_FILE: &str = "manifest.toml";
pub const COUNTS_FILE: &str = "counts.npy";
pub const FEATURES_FILE: &str = "features.npy";
pub const KINEMATICS_FILE: &str = "kinematics.npy";
pub const TRIALS_FILE: &str = "trials.csv";
pub const VALID_FILE: &str = "valid.npy";
pub const CLICK_FILE: &str = "click.npy";
pub const SESSION_FORMAT_VERSION: u32 = 1;

/// One trial of a block: bins `start_bin..end_bin` (end exclusive) and the
/// target the participant was moving to.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Trial {
    pub trial: u32,
    pub start_bin: usize,
    pub end_bin: usize,
    pub target_x: f64,
    pub target_y: f64,
}

#[derive(Debug, thiserror::Error)]
pub enum BlockError {
    #[error("{}: {what} is missing; a session directory needs manifest.toml and counts.npy or features.npy (and kinematics.npy for training)", path.display())]
    Missing { path: PathBuf, what: &'static str },
    #[error("{}: cannot read: {source}", path.display())]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{}: {problem}", path.display())]
    Manifest { path: PathBuf, problem: String },
    #[error("{}: {problem}", path.display())]
    Npy { path: PathBuf, problem: String },
    #[error("{}: negative count {value} at bin {bin}, channel {channel}; counts must be zero or more", path.display())]
    NegativeCount {
        path: PathBuf,
        bin: usize,
        channel: usize,
        value: i128,
    },
    #[error("{}: count {value} at bin {bin}, channel {channel} exceeds 65535, the largest count a bin packet carries", path.display())]
    CountTooLarge {
        path: PathBuf,
        bin: usize,
        channel: usize,
        value: i128,
    },
    #[error("{}: {value} at bin {bin}, column {column} ({name}) is not finite; fill or cut the gap before training", path.display())]
    NonFinite {
        path: PathBuf,
        bin: usize,
        column: usize,
        name: String,
        value: f64,
    },
    #[error("{}: {problem}", path.display())]
    Shape { path: PathBuf, problem: String },
    #[error("{}: line {line}: {problem}", path.display())]
    Trials {
        path: PathBuf,
        line: usize,
        problem: String,
    },
    #[error("{}: cannot write: {source}", path.display())]
    Write {
        path: PathBuf,
        source: std::io::Error,
    },
}

#[derive(Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct ManifestFile {
    pub(crate) version: u32,
    pub(crate) bin_ms: f64,
    pub(crate) kinematics: Vec<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub(crate) channel_labels: Option<Vec<String>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub(crate) notes: Option<String>,
    /// What `features.npy` holds, for example "spike band power".
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub(crate) features: Option<String>,
}

pub(crate) fn read_bytes(path: &Path, what: &'static str) -> Result<Vec<u8>, BlockError> {
    match fs::read(path) {
        Ok(b) => Ok(b),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Err(BlockError::Missing {
            path: path.to_path_buf(),
            what,
        }),
        Err(source) => Err(BlockError::Io {
            path: path.to_path_buf(),
            source,
        }),
    }
}

/// Writes `dir/manifest.toml` (creating `dir`), for writers that stream
/// the arrays themselves.
pub fn write_manifest(
    dir: &Path,
    bin_width: BinWidth,
    kinematic_names: &[String],
    channel_labels: Option<Vec<String>>,
    notes: Option<String>,
) -> Result<(), BlockError> {
    write_manifest_naming(dir, bin_width, kinematic_names, channel_labels, notes, None)
}

/// [`write_manifest`] for a block of features: `features` says what they
/// are (the manifest's `features` key).
pub fn write_manifest_naming(
    dir: &Path,
    bin_width: BinWidth,
    kinematic_names: &[String],
    channel_labels: Option<Vec<String>>,
    notes: Option<String>,
    features: Option<String>,
) -> Result<(), BlockError> {
    fs::create_dir_all(dir).map_err(|source| BlockError::Write {
        path: dir.to_path_buf(),
        source,
    })?;
    let manifest = ManifestFile {
        version: SESSION_FORMAT_VERSION,
        bin_ms: bin_width.ms(),
        kinematics: kinematic_names.to_vec(),
        channel_labels,
        notes,
        features,
    };
    let text = toml::to_string(&manifest).expect("manifest serialises");
    write_atomic(&dir.join(MANIFEST_FILE), text.as_bytes())
}

/// Writes `dir/trials.csv`.
pub fn write_trials(dir: &Path, trials: &[Trial]) -> Result<(), BlockError> {
    let mut writer = csv::Writer::from_writer(Vec::new());
    for t in trials {
        writer.serialize(t).expect("trial serialises");
    }
    let bytes = writer.into_inner().expect("in-memory csv");
    write_atomic(&dir.join(TRIALS_FILE), &bytes)
}

/// What a session directory's manifest says, for readers that stream the
/// arrays rather than load them ([`crate::formats::npy_stream`]).
#[derive(Clone, Debug, PartialEq)]
pub struct BlockManifest {
    pub bin_width: BinWidth,
    pub kinematic_names: Vec<String>,
    pub channel_labels: Option<Vec<String>>,
}

impl BlockManifest {
    /// Reads `dir/manifest.toml`, checked as `Block::read` checks it.
    pub fn read(dir: &Path) -> Result<BlockManifest, BlockError> {
        if !dir.is_dir() {
            return Err(BlockError::Missing {
                path: dir.to_path_buf(),
                what: "the session directory",
            });
        }
        let m = read_manifest(&dir.join(MANIFEST_FILE))?;
        Ok(BlockManifest {
            bin_width: BinWidth::from_ms(m.bin_ms).expect("checked with the manifest"),
            kinematic_names: m.kinematics,
            channel_labels: m.channel_labels,
        })
    }
}

pub(crate) fn read_manifest(path: &Path) -> Result<ManifestFile, BlockError> {
    let bytes = read_bytes(path, "manifest.toml")?;
    let text = String::from_utf8(bytes).map_err(|_| BlockError::Manifest {
        path: path.to_path_buf(),
        problem: "not UTF-8 text".into(),
    })?;
    let manifest: ManifestFile = toml::from_str(&text).map_err(|e| BlockError::Manifest {
        path: path.to_path_buf(),
        problem: one_line(&e.to_string()),
    })?;
    let bad = |problem: String| BlockError::Manifest {
        path: path.to_path_buf(),
        problem,
    };
    if manifest.version != SESSION_FORMAT_VERSION {
        return Err(bad(format!(
            "key version is {}; this build reads session version {SESSION_FORMAT_VERSION}",
            manifest.version
        )));
    }
    if let Err(e) = BinWidth::from_ms(manifest.bin_ms) {
        return Err(bad(format!(
            "key bin_ms is {}: {e}; it must be the bin width in milliseconds, whole microseconds above zero",
            manifest.bin_ms
        )));
    }
    if manifest.kinematics.is_empty() {
        return Err(bad(
            "key kinematics is empty; name each column of kinematics.npy".into(),
        ));
    }
    for (i, name) in manifest.kinematics.iter().enumerate() {
        if name.trim().is_empty() {
            return Err(bad(format!("key kinematics: column {i} has an empty name")));
        }
        if manifest.kinematics[..i].contains(name) {
            return Err(bad(format!("key kinematics names column {name:?} twice")));
        }
    }
    Ok(manifest)
}

/// Turns a multi-line parser message into one line for a terminal.
pub(crate) fn one_line(s: &str) -> String {
    s.split('\n')
        .map(str::trim)
        .filter(|l| !l.is_empty())
        .collect::<Vec<_>>()
        .join(" ")
}

pub(crate) fn npy_problem(e: &ReadNpyError) -> String {
    match e {
        ReadNpyError::WrongNdim(_, got) => {
            format!("array has {got} dimensions; expected 2 (bins × columns)")
        }
        other => format!("not a readable NumPy file: {other}"),
    }
}

/// Checks kinematics.npy's shape: one column per name in the manifest, one
/// row per bin of counts.npy.
pub(crate) fn check_kinematics_shape(
    path: &Path,
    rows: usize,
    cols: usize,
    names: &[String],
    n_bins: usize,
) -> Result<(), BlockError> {
    let problem = if cols != names.len() {
        format!(
            "kinematics.npy has {cols} columns but manifest.toml key kinematics names {} ({})",
            names.len(),
            names.join(", ")
        )
    } else if rows != n_bins {
        format!(
            "kinematics.npy has {rows} rows but counts.npy has {n_bins}; row t of both must describe the same bin"
        )
    } else {
        return Ok(());
    };
    Err(BlockError::Shape {
        path: path.to_path_buf(),
        problem,
    })
}

pub(crate) fn read_trials(path: &Path, n_bins: usize) -> Result<Vec<Trial>, BlockError> {
    let bytes = read_bytes(path, "trials.csv")?;
    let mut reader = csv::ReaderBuilder::new()
        .trim(csv::Trim::All)
        .from_reader(&bytes[..]);
    let expected = ["trial", "start_bin", "end_bin", "target_x", "target_y"];
    let header = reader
        .headers()
        .map_err(|e| BlockError::Trials {
            path: path.to_path_buf(),
            line: 1,
            problem: e.to_string(),
        })?
        .clone();
    if header.iter().collect::<Vec<_>>() != expected {
        return Err(BlockError::Trials {
            path: path.to_path_buf(),
            line: 1,
            problem: format!(
                "header is {:?}; expected {}",
                header.iter().collect::<Vec<_>>(),
                expected.join(",")
            ),
        });
    }
    let mut trials = Vec::new();
    for (i, row) in reader.deserialize::<Trial>().enumerate() {
        let line = i + 2;
        let trial = row.map_err(|e| BlockError::Trials {
            path: path.to_path_buf(),
            line,
            problem: one_line(&e.to_string()),
        })?;
        if trial.start_bin >= trial.end_bin || trial.end_bin > n_bins {
            return Err(BlockError::Trials {
                path: path.to_path_buf(),
                line,
                problem: format!(
                    "trial {} spans bins {}..{} but the block has bins 0..{n_bins} (end is exclusive and must exceed start)",
                    trial.trial, trial.start_bin, trial.end_bin
                ),
            });
        }
        if !(trial.target_x.is_finite() && trial.target_y.is_finite()) {
            return Err(BlockError::Trials {
                path: path.to_path_buf(),
                line,
                problem: format!("trial {} has a target that is not finite", trial.trial),
            });
        }
        trials.push(trial);
    }
    Ok(trials)
}

/// Writes `bytes` to `path` through a temporary file in the same directory and
/// a rename, so readers see the old file or the whole new one, never a part.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<(), BlockError> {
    let err = |source| BlockError::Write {
        path: path.to_path_buf(),
        source,
    };
    let file_name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let tmp = path.with_file_name(format!(".{file_name}.partial"));
    let mut file = fs::File::create(&tmp).map_err(err)?;
    file.write_all(bytes).map_err(err)?;
    file.sync_all().map_err(err)?;
    drop(file);
    fs::rename(&tmp, path).map_err(err)?;
    Ok(())
}

/// The trials with their bins counted on the kept rows only (`kept(b)`:
/// kept rows before bin b); a trial left with no row goes.
pub fn renumber_trials(trials: &[Trial], mut kept: impl FnMut(usize) -> usize) -> Vec<Trial> {
    trials
        .iter()
        .filter_map(|t| {
            let (s, e) = (kept(t.start_bin), kept(t.end_bin));
            (s < e).then(|| Trial {
                start_bin: s,
                end_bin: e,
                ..t.clone()
            })
        })
        .collect()
}
