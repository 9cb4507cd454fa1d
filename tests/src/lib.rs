//! Helpers for the cross-crate tests: where the reference fixtures are, how
//! to read them, and one comparison rule used by every check.
//!
//! The fixtures are made by `tests/reference/make_fixtures.py` with the
//! pinned versions in `tests/reference/requirements.txt`. `cargo test` reads
//! the committed copy in `tests/data/reference`; CI regenerates them into a
//! fresh directory and points `VDEC_REFERENCE_DIR` at it, so the check runs
//! against the reference libraries live.

use std::path::PathBuf;

use ndarray::ArrayD;
use ndarray_npy::ReadNpyExt;

pub fn reference_dir() -> PathBuf {
    match std::env::var_os("VDEC_REFERENCE_DIR") {
        Some(dir) => PathBuf::from(dir),
        None => PathBuf::from(env!("CARGO_MANIFEST_DIR"))
            .join("data")
            .join("reference"),
    }
}

/// A float64 array from the fixture directory: its shape and row-major data.
pub fn fixture(name: &str) -> (Vec<usize>, Vec<f64>) {
    let path = reference_dir().join(name);
    let file = std::fs::File::open(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let arr = ArrayD::<f64>::read_npy(file).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let shape = arr.shape().to_vec();
    let flat: Vec<f64> = arr.as_standard_layout().iter().copied().collect();
    (shape, flat)
}

/// An int16 array of counts from the fixture directory, as u16.
pub fn fixture_counts(name: &str) -> (Vec<usize>, Vec<u16>) {
    let path = reference_dir().join(name);
    let file = std::fs::File::open(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let arr = ArrayD::<i16>::read_npy(file).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let shape = arr.shape().to_vec();
    let flat = arr
        .as_standard_layout()
        .iter()
        .map(|&c| u16::try_from(c).expect("counts are not negative"))
        .collect();
    (shape, flat)
}

pub fn fixture_json(name: &str) -> serde_json::Value {
    let path = reference_dir().join(name);
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    serde_json::from_str(&text).expect("fixture json")
}

/// Asserts, element by element, |got − want| ≤ atol + rtol·|want| (the rule
/// of `numpy.allclose`), naming what was compared and the worst element.
pub fn assert_close(what: &str, got: &[f64], want: &[f64], rtol: f64, atol: f64) {
    assert_eq!(got.len(), want.len(), "{what}: length differs");
    let mut worst = (0usize, 0.0f64);
    for (i, (g, w)) in got.iter().zip(want).enumerate() {
        let diff = (g - w).abs();
        let excess = if diff == 0.0 {
            0.0
        } else {
            diff / (atol + rtol * w.abs())
        };
        // A NaN difference is the worst there is.
        if excess.is_nan() || excess > worst.1 {
            worst = (i, excess);
        }
    }
    let (i, excess) = worst;
    let (g, w) = (
        got.get(i).copied().unwrap_or(0.0),
        want.get(i).copied().unwrap_or(0.0),
    );
    eprintln!(
        "{what}: worst element {i}: {g:e} vs {w:e} (|diff| {:.2e}, {:.2} of the allowed rtol {rtol:.0e} + atol {atol:.0e})",
        (g - w).abs(),
        excess
    );
    assert!(
        excess <= 1.0,
        "{what}: element {i} is {g:e}, reference {w:e}: |diff| {:.3e} exceeds atol {atol:.1e} + rtol {rtol:.1e}·|ref|",
        (g - w).abs()
    );
}
