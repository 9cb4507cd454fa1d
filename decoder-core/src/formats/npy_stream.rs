//! NumPy files read and written a chunk of rows at a time, so a block of
//! any length is replayed, verified or simulated in bounded memory
//! (PROTOCOL.md §3): never the whole (T, N) array at once, let alone a
//! wider copy of it. The header is parsed and written by `ndarray-npy`'s
//! header module; only the row data passes through here, converted from
//! the file's dtype into the caller's buffer with each value checked. A
//! Fortran-order file cannot be read by rows; it is read whole and put in
//! C order once (memory: the file's size).

use std::fs::File;
use std::io::{BufReader, BufWriter, Read, Write};
use std::path::{Path, PathBuf};

use ndarray_npy::npy::header::{Header, Layout};

use crate::formats::block_dir::BlockError;

/// The element types a block's arrays may have.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Elem {
    I(u8),
    U(u8),
    F(u8),
    /// NumPy's bool, one byte: 0 or 1.
    B,
}

/// Rows of a 2-D (or 1-D, as one column) C-order NumPy array, read in
/// chunks.
pub struct NpyRows {
    path: PathBuf,
    input: BufReader<File>,
    elem: Elem,
    big_endian: bool,
    pub rows: usize,
    pub cols: usize,
    /// Dimensions in the file (1 is read as one column).
    pub ndim: usize,
    rows_read: usize,
    raw: Vec<u8>,
    /// A Fortran-order file, read whole and reordered into C order.
    whole: Option<Vec<u8>>,
}

fn npy_err(path: &Path, problem: impl Into<String>) -> BlockError {
    BlockError::Npy {
        path: path.to_path_buf(),
        problem: problem.into(),
    }
}

impl NpyRows {
    /// Opens `path` and reads its header. `what` names the file in a
    /// missing-file error.
    pub fn open(path: &Path, what: &'static str) -> Result<NpyRows, BlockError> {
        let file = match File::open(path) {
            Ok(f) => f,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
                return Err(BlockError::Missing {
                    path: path.to_path_buf(),
                    what,
                });
            }
            Err(source) => {
                return Err(BlockError::Io {
                    path: path.to_path_buf(),
                    source,
                });
            }
        };
        let mut input = BufReader::with_capacity(1 << 20, file);
        let header = Header::from_reader(&mut input).map_err(|e| npy_err(path, format!("{e}")))?;
        let (rows, cols) = match header.shape.as_slice() {
            [r] => (*r, 1),
            [r, c] => (*r, *c),
            other => {
                return Err(npy_err(
                    path,
                    format!("shape {other:?}; expected 2 dimensions (bins, columns)"),
                ));
            }
        };
        let descr = header.type_descriptor.to_string();
        let descr = descr.trim_matches(|c| c == '\'' || c == '"');
        let (order, kind) = descr.split_at(1.min(descr.len()));
        let big_endian = order == ">";
        if !matches!(order, "<" | ">" | "|" | "=") {
            return Err(npy_err(
                path,
                format!("dtype {descr:?} is not a plain number"),
            ));
        }
        let size: u8 = kind.get(1..).and_then(|s| s.parse().ok()).unwrap_or(0);
        let elem = match (kind.chars().next(), size) {
            (Some('i'), 1 | 2 | 4 | 8) => Elem::I(size),
            (Some('u'), 1 | 2 | 4 | 8) => Elem::U(size),
            (Some('f'), 4 | 8) => Elem::F(size),
            (Some('b'), 1) => Elem::B,
            _ => return Err(npy_err(path, format!("dtype {descr:?} is not supported"))),
        };
        let mut r = NpyRows {
            path: path.to_path_buf(),
            input,
            elem,
            big_endian,
            rows,
            cols,
            ndim: header.shape.len(),
            rows_read: 0,
            raw: Vec::new(),
            whole: None,
        };
        if header.layout == Layout::Fortran && rows > 1 && cols > 1 {
            let s = r.elem_size();
            let mut column_major = vec![0u8; rows * cols * s];
            r.input.read_exact(&mut column_major).map_err(|_| {
                npy_err(
                    path,
                    format!("the file ends before its {rows} × {cols} values"),
                )
            })?;
            let mut row_major = vec![0u8; column_major.len()];
            for c in 0..cols {
                for t in 0..rows {
                    let from = (c * rows + t) * s;
                    let to = (t * cols + c) * s;
                    row_major[to..to + s].copy_from_slice(&column_major[from..from + s]);
                }
            }
            r.whole = Some(row_major);
        }
        Ok(r)
    }

    pub fn is_integer(&self) -> bool {
        !matches!(self.elem, Elem::F(_))
    }

    pub fn dtype_name(&self) -> String {
        match self.elem {
            Elem::I(s) => format!("int{}", 8 * s),
            Elem::U(s) => format!("uint{}", 8 * s),
            Elem::F(s) => format!("float{}", 8 * s),
            Elem::B => "bool".into(),
        }
    }

    fn elem_size(&self) -> usize {
        match self.elem {
            Elem::I(s) | Elem::U(s) | Elem::F(s) => usize::from(s),
            Elem::B => 1,
        }
    }

    /// Reads the raw bytes of up to `max_rows` rows; returns how many.
    fn fill(&mut self, max_rows: usize) -> Result<usize, BlockError> {
        let n = max_rows.min(self.rows - self.rows_read);
        let len = n * self.cols * self.elem_size();
        self.raw.resize(len, 0);
        if let Some(whole) = &self.whole {
            let at = self.rows_read * self.cols * self.elem_size();
            self.raw.copy_from_slice(&whole[at..at + len]);
            return Ok(n);
        }
        self.input.read_exact(&mut self.raw).map_err(|_| {
            npy_err(
                &self.path,
                format!(
                    "the file ends before its {} rows (cut short at row {})",
                    self.rows, self.rows_read
                ),
            )
        })?;
        Ok(n)
    }

    /// The value at element `i` of the raw buffer, as i128 (integers) or
    /// f64 (floats).
    fn int_at(&self, i: usize) -> i128 {
        let s = self.elem_size();
        let b = &self.raw[i * s..(i + 1) * s];
        let mut le = [0u8; 8];
        if self.big_endian {
            for (k, v) in b.iter().rev().enumerate() {
                le[k] = *v;
            }
        } else {
            le[..s].copy_from_slice(b);
        }
        match self.elem {
            Elem::U(_) | Elem::B => i128::from(u64::from_le_bytes(le)),
            Elem::I(_) => {
                // Sign-extend from s bytes.
                let v = u64::from_le_bytes(le);
                let shift = 64 - 8 * s as u32;
                i128::from(((v << shift) as i64) >> shift)
            }
            Elem::F(_) => 0,
        }
    }

    fn float_at(&self, i: usize) -> f64 {
        let s = self.elem_size();
        let b = &self.raw[i * s..(i + 1) * s];
        match (s, self.big_endian) {
            (4, false) => f64::from(f32::from_le_bytes(b.try_into().expect("4"))),
            (4, true) => f64::from(f32::from_be_bytes(b.try_into().expect("4"))),
            (_, false) => f64::from_le_bytes(b.try_into().expect("8")),
            (_, true) => f64::from_be_bytes(b.try_into().expect("8")),
        }
    }

    /// Appends up to `max_rows` rows of counts to `out` (cleared first);
    /// returns how many rows. Every count is checked: an integer from 0 to
    /// 65535.
    pub fn read_counts(
        &mut self,
        max_rows: usize,
        out: &mut Vec<u16>,
    ) -> Result<usize, BlockError> {
        out.clear();
        if !self.is_integer() {
            return Err(npy_err(
                &self.path,
                format!(
                    "counts have dtype {}; spike counts must be an integer dtype (save with counts.astype(np.uint16))",
                    self.dtype_name()
                ),
            ));
        }
        let first = self.rows_read;
        let n = self.fill(max_rows)?;
        out.reserve(n * self.cols);
        if self.elem == Elem::U(2) && !self.big_endian {
            // The common case, and the fast one: already u16.
            out.extend(
                self.raw
                    .chunks_exact(2)
                    .map(|b| u16::from_le_bytes([b[0], b[1]])),
            );
        } else {
            for i in 0..n * self.cols {
                let value = self.int_at(i);
                let (bin, channel) = (first + i / self.cols, i % self.cols);
                if value < 0 {
                    return Err(BlockError::NegativeCount {
                        path: self.path.clone(),
                        bin,
                        channel,
                        value,
                    });
                }
                if value > i128::from(u16::MAX) {
                    return Err(BlockError::CountTooLarge {
                        path: self.path.clone(),
                        bin,
                        channel,
                        value,
                    });
                }
                out.push(value as u16);
            }
        }
        self.rows_read += n;
        Ok(n)
    }

    /// Appends up to `max_rows` rows of features to `out` (cleared first)
    /// as f32, the precision the bin packet carries them in; returns how
    /// many rows. The file must hold floats, every one finite and within
    /// f32's range.
    pub fn read_features(
        &mut self,
        max_rows: usize,
        out: &mut Vec<f32>,
    ) -> Result<usize, BlockError> {
        out.clear();
        if self.is_integer() {
            return Err(npy_err(
                &self.path,
                format!(
                    "features have dtype {}; continuous features must be float32 or float64 (counts go in counts.npy)",
                    self.dtype_name()
                ),
            ));
        }
        let first = self.rows_read;
        let n = self.fill(max_rows)?;
        out.reserve(n * self.cols);
        for i in 0..n * self.cols {
            let wide = self.float_at(i);
            let value = wide as f32;
            if !value.is_finite() {
                return Err(BlockError::NonFinite {
                    path: self.path.clone(),
                    bin: first + i / self.cols,
                    column: i % self.cols,
                    name: format!("channel {}", i % self.cols),
                    value: wide,
                });
            }
            out.push(value);
        }
        self.rows_read += n;
        Ok(n)
    }

    /// Appends up to `max_rows` rows of floats to `out` (cleared first);
    /// returns how many rows. Every value must be finite; `names` names the
    /// columns in the error.
    pub fn read_f64(
        &mut self,
        max_rows: usize,
        names: &[String],
        out: &mut Vec<f64>,
    ) -> Result<usize, BlockError> {
        out.clear();
        let first = self.rows_read;
        let n = self.fill(max_rows)?;
        for i in 0..n * self.cols {
            let value = if self.is_integer() {
                self.int_at(i) as f64
            } else {
                self.float_at(i)
            };
            if !value.is_finite() {
                let column = i % self.cols;
                return Err(BlockError::NonFinite {
                    path: self.path.clone(),
                    bin: first + i / self.cols,
                    column,
                    name: names.get(column).cloned().unwrap_or_default(),
                    value,
                });
            }
            out.push(value);
        }
        self.rows_read += n;
        Ok(n)
    }
}

/// A (rows, cols) C-order `.npy` of float64 (or uint16, for counts)
/// written a row at a time, through a temporary name and a rename, so an
/// interrupted run never leaves half a file under the final name.
pub struct NpyWriter {
    path: PathBuf,
    tmp: PathBuf,
    out: BufWriter<File>,
    rows: usize,
    cols: usize,
    written: usize,
}

impl NpyWriter {
    /// A float64 file.
    pub fn create(path: &Path, rows: usize, cols: usize) -> Result<NpyWriter, BlockError> {
        Self::create_typed(path, rows, cols, "<f8")
    }

    /// A uint16 file (counts).
    pub fn create_u16(path: &Path, rows: usize, cols: usize) -> Result<NpyWriter, BlockError> {
        Self::create_typed(path, rows, cols, "<u2")
    }

    /// A float32 file (features).
    pub fn create_f32(path: &Path, rows: usize, cols: usize) -> Result<NpyWriter, BlockError> {
        Self::create_typed(path, rows, cols, "<f4")
    }

    fn create_typed(
        path: &Path,
        rows: usize,
        cols: usize,
        descr: &str,
    ) -> Result<NpyWriter, BlockError> {
        let err = |source| BlockError::Write {
            path: path.to_path_buf(),
            source,
        };
        let name = path
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        let tmp = path.with_file_name(format!(".{name}.partial"));
        let mut out = BufWriter::with_capacity(1 << 20, File::create(&tmp).map_err(err)?);
        let header = Header {
            type_descriptor: py_literal::Value::String(descr.into()),
            layout: Layout::Standard,
            shape: vec![rows, cols],
        };
        header
            .write(&mut out)
            .map_err(|e| err(std::io::Error::other(e.to_string())))?;
        Ok(NpyWriter {
            path: path.to_path_buf(),
            tmp,
            out,
            rows,
            cols,
            written: 0,
        })
    }

    /// Writes rows (a whole number of them, `cols` values each).
    pub fn write_rows(&mut self, values: &[f64]) -> Result<(), BlockError> {
        self.write_le(values.len(), values.iter().map(|v| v.to_le_bytes()))
    }

    /// Writes whole rows of counts (a file made by [`NpyWriter::create_u16`]).
    pub fn write_u16_rows(&mut self, values: &[u16]) -> Result<(), BlockError> {
        self.write_le(values.len(), values.iter().map(|v| v.to_le_bytes()))
    }

    /// Writes whole rows of features (a file made by
    /// [`NpyWriter::create_f32`]).
    pub fn write_f32_rows(&mut self, values: &[f32]) -> Result<(), BlockError> {
        self.write_le(values.len(), values.iter().map(|v| v.to_le_bytes()))
    }

    fn write_le<const W: usize>(
        &mut self,
        len: usize,
        bytes: impl Iterator<Item = [u8; W]>,
    ) -> Result<(), BlockError> {
        debug_assert_eq!(len % self.cols.max(1), 0);
        for b in bytes {
            self.out.write_all(&b).map_err(|source| BlockError::Write {
                path: self.path.clone(),
                source,
            })?;
        }
        self.written += len / self.cols.max(1);
        Ok(())
    }

    /// Flushes, checks the row count the header promised, and renames the
    /// file into place.
    pub fn finish(self) -> Result<(), BlockError> {
        let err = |source| BlockError::Write {
            path: self.path.clone(),
            source,
        };
        if self.written != self.rows {
            return Err(err(std::io::Error::other(format!(
                "{} rows written where the header says {}",
                self.written, self.rows
            ))));
        }
        let file = self
            .out
            .into_inner()
            .map_err(|e| err(std::io::Error::other(e.to_string())))?;
        file.sync_all().map_err(err)?;
        drop(file);
        std::fs::rename(&self.tmp, &self.path).map_err(err)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;
    use ndarray_npy::{ReadNpyExt, write_npy};

    #[test]
    fn every_integer_dtype_reads_as_the_same_counts_in_chunks() {
        let dir = tempfile::tempdir().unwrap();
        let want: Vec<u16> = (0..35u16).map(|v| v * 7 % 50).collect();
        let arr = Array2::from_shape_vec((7, 5), want.clone()).unwrap();
        macro_rules! each {
            ($($t:ty),*) => {$(
                let p = dir.path().join(format!("c-{}.npy", stringify!($t)));
                write_npy(&p, &arr.mapv(|v| v as $t)).unwrap();
                let mut r = NpyRows::open(&p, "counts.npy").unwrap();
                assert_eq!((r.rows, r.cols), (7, 5));
                let (mut all, mut chunk) = (Vec::new(), Vec::new());
                while r.read_counts(3, &mut chunk).unwrap() > 0 {
                    all.extend_from_slice(&chunk);
                }
                assert_eq!(all, want, "{}", stringify!($t));
            )*};
        }
        each!(u8, u16, u32, u64, i8, i16, i32, i64);
    }

    #[test]
    fn a_fortran_order_file_reads_as_the_same_rows() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("f.npy");
        let arr = Array2::from_shape_vec((4, 3), (0..12u16).collect()).unwrap();
        write_npy(&p, &arr.t().as_standard_layout().t()).unwrap();
        let mut r = NpyRows::open(&p, "counts.npy").unwrap();
        let mut out = Vec::new();
        assert_eq!(r.read_counts(10, &mut out).unwrap(), 4);
        assert_eq!(out, (0..12u16).collect::<Vec<_>>());
    }

    #[test]
    fn a_negative_count_is_named_by_bin_and_channel() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("counts.npy");
        let mut arr = Array2::<i32>::zeros((4, 3));
        arr[[2, 1]] = -3;
        write_npy(&p, &arr).unwrap();
        let mut r = NpyRows::open(&p, "counts.npy").unwrap();
        let mut out = Vec::new();
        r.read_counts(2, &mut out).unwrap();
        let e = r.read_counts(2, &mut out).unwrap_err().to_string();
        assert!(e.contains("bin 2, channel 1") && e.contains("-3"), "{e}");
    }

    #[test]
    fn the_writer_writes_what_numpy_reads() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("est.npy");
        let mut w = NpyWriter::create(&p, 3, 2).unwrap();
        w.write_rows(&[1.0, 2.0, 3.0, 4.0]).unwrap();
        w.write_rows(&[5.0, -6.5]).unwrap();
        w.finish().unwrap();
        let got = Array2::<f64>::read_npy(File::open(&p).unwrap()).unwrap();
        assert_eq!(
            got.into_raw_vec_and_offset().0,
            [1.0, 2.0, 3.0, 4.0, 5.0, -6.5]
        );
        // A writer that wrote fewer rows than promised leaves no file.
        let q = dir.path().join("short.npy");
        let mut w = NpyWriter::create(&q, 3, 2).unwrap();
        w.write_rows(&[1.0, 2.0]).unwrap();
        assert!(w.finish().is_err());
        assert!(!q.exists());
    }
}
