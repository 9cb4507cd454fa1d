//! Blocks and models that several tests read and none changes, made once
//! per run of this test binary by the verbs a user runs (`simulate`,
//! `train`), in a folder under the build's temporary directory that each
//! run starts afresh.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex, OnceLock};

use super::{ok, p};

/// The folder every fixture of this run lives in.
fn root() -> &'static Path {
    static ROOT: OnceLock<PathBuf> = OnceLock::new();
    ROOT.get_or_init(|| {
        let root = Path::new(env!("CARGO_TARGET_TMPDIR")).join("cli-fixtures");
        let _ = std::fs::remove_dir_all(&root);
        std::fs::create_dir_all(&root).unwrap();
        root
    })
}

/// Makes the fixture called `name` once, with `make(path)`; later callers
/// wait for it and share the path.
fn cached(name: &str, make: impl FnOnce(&Path)) -> PathBuf {
    static MADE: OnceLock<Mutex<HashMap<String, Arc<OnceLock<PathBuf>>>>> = OnceLock::new();
    let slot = MADE
        .get_or_init(Default::default)
        .lock()
        .unwrap()
        .entry(name.to_string())
        .or_default()
        .clone();
    slot.get_or_init(|| {
        let path = root().join(name);
        make(&path);
        path
    })
    .clone()
}

/// A simulated calibration block: `replay-tool simulate --minutes M
/// --channels N` and any further flags.
pub fn block(minutes: &str, channels: &str, more: &[&str]) -> PathBuf {
    let name = format!("block-{minutes}m-{channels}ch{}", more.join(""));
    cached(&name, |out| {
        let mut args = vec![
            "simulate",
            "--out",
            p(out),
            "--minutes",
            minutes,
            "--channels",
            channels,
        ];
        args.extend_from_slice(more);
        ok(&args);
    })
}

/// A Kalman model trained on `block` without cross-validation.
pub fn kalman(block: &Path) -> PathBuf {
    let name = format!(
        "{}.kalman.model",
        block.file_name().unwrap().to_string_lossy()
    );
    cached(&name, |out| {
        ok(&[
            "train",
            "--session",
            p(block),
            "--decoder",
            "kalman",
            "--out",
            p(out),
            "--no-cv",
        ]);
    })
}

/// A Kalman model with a click decoder (`train --click`, no
/// cross-validation) trained on `block`, which must have click cues.
pub fn kalman_with_click(block: &Path) -> PathBuf {
    let name = format!(
        "{}.kalman-click.model",
        block.file_name().unwrap().to_string_lossy()
    );
    cached(&name, |out| {
        ok(&[
            "train",
            "--session",
            p(block),
            "--decoder",
            "kalman",
            "--click",
            "--out",
            p(out),
            "--no-cv",
        ]);
    })
}

/// The calibration most live tests share: one minute of 16 channels, and
/// its Kalman model.
pub fn calibration_16() -> (PathBuf, PathBuf) {
    let cal = block("1", "16", &[]);
    let model = kalman(&cal);
    (cal, model)
}
