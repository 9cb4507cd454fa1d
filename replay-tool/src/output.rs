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

/// A (rows × cols) f64 table written as it is computed, `.npy` or `.csv`
/// by the extension, through a temporary name and a rename.
pub enum TableWriter {
    Npy(decoder_core::formats::npy_stream::NpyWriter),
    Csv {
        path: std::path::PathBuf,
        tmp: std::path::PathBuf,
        out: std::io::BufWriter<std::fs::File>,
        cols: usize,
    },
}

impl TableWriter {
    pub fn create(path: &Path, header: &[String], rows: usize, ext: &str) -> Result<TableWriter> {
        if let Some(parent) = path.parent()
            && !parent.as_os_str().is_empty()
        {
            std::fs::create_dir_all(parent)
                .with_context(|| format!("cannot create {}", parent.display()))?;
        }
        match ext {
            "npy" => Ok(TableWriter::Npy(
                decoder_core::formats::npy_stream::NpyWriter::create(path, rows, header.len())?,
            )),
            "csv" => {
                use std::io::Write;
                let name = path
                    .file_name()
                    .map(|n| n.to_string_lossy().into_owned())
                    .unwrap_or_default();
                let tmp = path.with_file_name(format!(".{name}.partial"));
                let file = std::fs::File::create(&tmp)
                    .with_context(|| format!("cannot write {}", path.display()))?;
                let mut out = std::io::BufWriter::with_capacity(1 << 20, file);
                writeln!(out, "{}", header.join(","))
                    .with_context(|| format!("cannot write {}", path.display()))?;
                Ok(TableWriter::Csv {
                    path: path.to_path_buf(),
                    tmp,
                    out,
                    cols: header.len(),
                })
            }
            _ => bail!("{}: output must end in .npy or .csv", path.display()),
        }
    }

    /// Writes whole rows.
    pub fn write_rows(&mut self, values: &[f64]) -> Result<()> {
        match self {
            TableWriter::Npy(w) => Ok(w.write_rows(values)?),
            TableWriter::Csv {
                path, out, cols, ..
            } => {
                use std::io::Write;
                for row in values.chunks(*cols) {
                    let line: Vec<String> = row.iter().map(|v| format!("{v:?}")).collect();
                    writeln!(out, "{}", line.join(","))
                        .with_context(|| format!("cannot write {}", path.display()))?;
                }
                Ok(())
            }
        }
    }

    pub fn finish(self) -> Result<()> {
        match self {
            TableWriter::Npy(w) => Ok(w.finish()?),
            TableWriter::Csv { path, tmp, out, .. } => {
                let file = out
                    .into_inner()
                    .map_err(|e| anyhow::anyhow!("cannot write {}: {e}", path.display()))?;
                file.sync_all()
                    .with_context(|| format!("cannot write {}", path.display()))?;
                drop(file);
                std::fs::rename(&tmp, &path)
                    .with_context(|| format!("cannot write {}", path.display()))?;
                Ok(())
            }
        }
    }
}
