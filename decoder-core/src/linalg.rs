//! Small dense linear algebra for the per-bin path, and the row-major matrix
//! type that models are stored in.
//!
//! The decode step works on state-sized (d × d, d ≤ 16) matrices and on d × N
//! gain rows. nalgebra's dynamic matrices allocate on most operations, so the
//! hot path uses these slice routines on buffers allocated once when a model is
//! loaded. Training, which runs offline, uses nalgebra directly.

use serde::{Deserialize, Serialize};

/// A row-major matrix as stored in model files and exported as JSON.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Mat {
    pub rows: usize,
    pub cols: usize,
    /// `rows * cols` values, row after row.
    pub data: Vec<f64>,
}

impl Mat {
    pub fn zeros(rows: usize, cols: usize) -> Mat {
        Mat {
            rows,
            cols,
            data: vec![0.0; rows * cols],
        }
    }

    pub fn identity(n: usize) -> Mat {
        let mut m = Mat::zeros(n, n);
        for i in 0..n {
            m.data[i * n + i] = 1.0;
        }
        m
    }

    pub fn from_rows(rows: &[Vec<f64>]) -> Mat {
        let cols = rows.first().map_or(0, Vec::len);
        let mut data = Vec::with_capacity(rows.len() * cols);
        for row in rows {
            assert_eq!(row.len(), cols, "ragged rows");
            data.extend_from_slice(row);
        }
        Mat {
            rows: rows.len(),
            cols,
            data,
        }
    }

    pub fn get(&self, row: usize, col: usize) -> f64 {
        self.data[row * self.cols + col]
    }

    pub fn set(&mut self, row: usize, col: usize, value: f64) {
        self.data[row * self.cols + col] = value;
    }

    pub fn row(&self, row: usize) -> &[f64] {
        &self.data[row * self.cols..(row + 1) * self.cols]
    }

    /// Nested rows, the JSON export layout.
    pub fn to_nested(&self) -> Vec<Vec<f64>> {
        (0..self.rows).map(|r| self.row(r).to_vec()).collect()
    }

    pub fn is_finite(&self) -> bool {
        self.data.iter().all(|v| v.is_finite())
    }

    pub fn to_dmatrix(&self) -> nalgebra::DMatrix<f64> {
        nalgebra::DMatrix::from_row_slice(self.rows, self.cols, &self.data)
    }

    pub fn from_dmatrix(m: &nalgebra::DMatrix<f64>) -> Mat {
        let mut out = Mat::zeros(m.nrows(), m.ncols());
        for r in 0..m.nrows() {
            for c in 0..m.ncols() {
                out.data[r * m.ncols() + c] = m[(r, c)];
            }
        }
        out
    }
}

/// `out = a · x` for a row-major `rows × cols` matrix `a`.
#[inline]
pub fn mat_vec(a: &[f64], rows: usize, cols: usize, x: &[f64], out: &mut [f64]) {
    debug_assert_eq!(a.len(), rows * cols);
    for (r, o) in out.iter_mut().enumerate().take(rows) {
        *o = dot(&a[r * cols..(r + 1) * cols], x);
    }
}

/// Dot product written with four independent accumulators so the compiler
/// can keep several multiply-adds in flight; the summation order is fixed, so
/// the result is the same on every run of the same build.
#[inline]
pub fn dot(a: &[f64], b: &[f64]) -> f64 {
    debug_assert_eq!(a.len(), b.len());
    let n = a.len().min(b.len());
    let (a, b) = (&a[..n], &b[..n]);
    let mut acc = [0.0f64; 4];
    let chunks = n / 4;
    for i in 0..chunks {
        let j = 4 * i;
        acc[0] += a[j] * b[j];
        acc[1] += a[j + 1] * b[j + 1];
        acc[2] += a[j + 2] * b[j + 2];
        acc[3] += a[j + 3] * b[j + 3];
    }
    let mut tail = 0.0;
    for j in 4 * chunks..n {
        tail += a[j] * b[j];
    }
    (acc[0] + acc[2]) + (acc[1] + acc[3]) + tail
}

/// `out = a · b` for square `n × n` row-major matrices.
pub fn mat_mul(a: &[f64], b: &[f64], n: usize, out: &mut [f64]) {
    for i in 0..n {
        for j in 0..n {
            let mut s = 0.0;
            for k in 0..n {
                s += a[i * n + k] * b[k * n + j];
            }
            out[i * n + j] = s;
        }
    }
}

/// `out = a · b · aᵀ + c` for square `n × n` matrices; `tmp` is n × n scratch.
pub fn sandwich_add(a: &[f64], b: &[f64], c: &[f64], n: usize, tmp: &mut [f64], out: &mut [f64]) {
    mat_mul(a, b, n, tmp);
    for i in 0..n {
        for j in 0..n {
            let mut s = c[i * n + j];
            for k in 0..n {
                s += tmp[i * n + k] * a[j * n + k];
            }
            out[i * n + j] = s;
        }
    }
}

/// The time update shared by the state-space filters: `x⁻ = A x`,
/// `P⁻ = A P Aᵀ + W`, kept symmetric. `tmp` is d × d scratch.
#[allow(clippy::too_many_arguments)]
pub fn time_update(
    a: &[f64],
    w: &[f64],
    x: &[f64],
    p: &[f64],
    d: usize,
    tmp: &mut [f64],
    x_prior: &mut [f64],
    p_prior: &mut [f64],
) {
    mat_vec(a, d, d, x, x_prior);
    sandwich_add(a, p, w, d, tmp, p_prior);
    symmetrize(p_prior, d);
}

/// Replaces a square matrix by `(m + mᵀ) / 2`, which keeps covariances
/// symmetric despite rounding.
pub fn symmetrize(m: &mut [f64], n: usize) {
    for i in 0..n {
        for j in (i + 1)..n {
            let v = 0.5 * (m[i * n + j] + m[j * n + i]);
            m[i * n + j] = v;
            m[j * n + i] = v;
        }
    }
}

/// Solves `m · X = rhs` in place for `n × n` `m` and `n × n` `rhs` by LU with
/// partial pivoting. `m` is destroyed; `rhs` becomes X. Returns false when `m`
/// is singular to working precision.
pub fn lu_solve_in_place(m: &mut [f64], rhs: &mut [f64], n: usize) -> bool {
    for col in 0..n {
        let mut pivot = col;
        let mut best = m[col * n + col].abs();
        for r in (col + 1)..n {
            let v = m[r * n + col].abs();
            if v > best {
                best = v;
                pivot = r;
            }
        }
        if best == 0.0 || !best.is_finite() {
            return false;
        }
        if pivot != col {
            for k in 0..n {
                m.swap(col * n + k, pivot * n + k);
                rhs.swap(col * n + k, pivot * n + k);
            }
        }
        let diag = m[col * n + col];
        for r in (col + 1)..n {
            let factor = m[r * n + col] / diag;
            if factor == 0.0 {
                continue;
            }
            m[r * n + col] = 0.0;
            for k in (col + 1)..n {
                m[r * n + k] -= factor * m[col * n + k];
            }
            for k in 0..n {
                rhs[r * n + k] -= factor * rhs[col * n + k];
            }
        }
    }
    for col in (0..n).rev() {
        let diag = m[col * n + col];
        for k in 0..n {
            let mut s = rhs[col * n + k];
            for j in (col + 1)..n {
                s -= m[col * n + j] * rhs[j * n + k];
            }
            rhs[col * n + k] = s / diag;
        }
    }
    true
}

/// Whether a symmetric matrix is positive definite (Cholesky succeeds).
pub fn is_positive_definite(m: &[f64], n: usize) -> bool {
    let mut l = vec![0.0; n * n];
    for i in 0..n {
        for j in 0..=i {
            let mut s = m[i * n + j];
            for k in 0..j {
                s -= l[i * n + k] * l[j * n + k];
            }
            if i == j {
                if s <= 0.0 || !s.is_finite() {
                    return false;
                }
                l[i * n + i] = s.sqrt();
            } else {
                l[i * n + j] = s / l[j * n + j];
            }
        }
    }
    true
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lu_solve_recovers_inverse_of_a_pivoting_matrix() {
        // A matrix whose first pivot is zero, so pivoting is required.
        let m0 = [0.0, 2.0, 1.0, 1.0, 1.0, 0.0, 3.0, 0.0, 1.0];
        let mut m = m0;
        let mut x = Mat::identity(3).data;
        assert!(lu_solve_in_place(&mut m, &mut x, 3));
        let mut prod = [0.0; 9];
        mat_mul(&m0, &x, 3, &mut prod);
        for i in 0..3 {
            for j in 0..3 {
                let want = if i == j { 1.0 } else { 0.0 };
                assert!((prod[i * 3 + j] - want).abs() < 1e-12);
            }
        }
    }

    #[test]
    fn lu_solve_reports_a_singular_matrix() {
        let mut m = [1.0, 2.0, 2.0, 4.0];
        let mut x = [1.0, 0.0, 0.0, 1.0];
        assert!(!lu_solve_in_place(&mut m, &mut x, 2));
    }

    #[test]
    fn dot_matches_naive_sum_on_odd_lengths() {
        let a: Vec<f64> = (0..13).map(|i| i as f64 * 0.5).collect();
        let b: Vec<f64> = (0..13).map(|i| 1.0 - i as f64).collect();
        let naive: f64 = a.iter().zip(&b).map(|(x, y)| x * y).sum();
        assert!((dot(&a, &b) - naive).abs() < 1e-12);
    }

    #[test]
    fn positive_definite_check_rejects_semidefinite() {
        assert!(is_positive_definite(&[2.0, 1.0, 1.0, 2.0], 2));
        assert!(!is_positive_definite(&[1.0, 1.0, 1.0, 1.0], 2));
    }
}
