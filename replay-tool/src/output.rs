//! Writing results: every file goes through a temporary name and a rename,
//! so a failed or interrupted run never leaves half a file where a user
//! expects a whole one.

use std::path::Path;

use anyhow::{Context, Result, bail};
use ndarray::Array2;
use ndarray_npy::WriteNpyExt;

pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    if let Some(parent) = path.parent()
        && !parent.as_os_str().is_empty()
    {
        std::fs::create_dir_all(parent)
            .with_context(|| format!("cannot create {}", parent.display()))?;
    }
    decoder_core::formats::block::write_atomic(path, bytes)?;
    Ok(())
}

/// Writes a (rows × cols) f64 table as `.npy` or `.csv` by the path's
/// extension; `header` names the CSV columns.
pub fn write_table(path: &Path, header: &[String], rows: usize, data: &[f64]) -> Result<()> {
    let cols = header.len();
    let ext = path.extension().and_then(|e| e.to_str()).unwrap_or("");
    let bytes = match ext {
        "npy" => {
            let arr = Array2::from_shape_vec((rows, cols), data.to_vec()).context("table shape")?;
            let mut out = Vec::new();
            arr.write_npy(&mut out).context("encoding .npy")?;
            out
        }
        "csv" => {
            let mut s = header.join(",");
            s.push('\n');
            for r in 0..rows {
                let line: Vec<String> = data[r * cols..(r + 1) * cols]
                    .iter()
                    .map(|v| format!("{v:?}"))
                    .collect();
                s.push_str(&line.join(","));
                s.push('\n');
            }
            s.into_bytes()
        }
        _ => bail!("{}: output must end in .npy or .csv", path.display()),
    };
    write_atomic(path, &bytes)
}
