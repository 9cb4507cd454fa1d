//! Additive sufficient statistics for the least-squares fits.
//!
//! Every fit in this crate (Kalman A, W, H, Q; the Wiener filter) needs only
//! sums of products over the training bins. Keeping them as sums lets
//! cross-validation compute each fold's sums once and form any training set
//! as "all folds minus the held-out one", and lets the count-by-count Gram
//! matrix be accumulated exactly in integers over the non-zero counts only:
//! at 20 ms bins most channels are silent in most bins, so this is several
//! times cheaper than a dense N × N product and has no rounding at all.

/// Σ c cᵀ and Σ c over bins of non-negative integer feature vectors, kept
/// exactly in u64. Only the upper triangle is accumulated.
#[derive(Clone, Debug, PartialEq)]
pub struct CountGram {
    pub dim: usize,
    /// Keep Σ c_i² only (for a diagonal observation noise); the off-diagonal
    /// sums then cost nothing.
    pub diagonal_only: bool,
    /// dim × dim, row-major; entries with column < row are unused until
    /// [`CountGram::to_f64_symmetric`].
    upper: Vec<u64>,
    pub sums: Vec<u64>,
    pub n_rows: u64,
}

impl CountGram {
    pub fn new(dim: usize) -> CountGram {
        CountGram {
            dim,
            diagonal_only: false,
            upper: vec![0; dim * dim],
            sums: vec![0; dim],
            n_rows: 0,
        }
    }

    pub fn new_diagonal(dim: usize) -> CountGram {
        CountGram {
            dim,
            diagonal_only: true,
            upper: vec![0; dim],
            sums: vec![0; dim],
            n_rows: 0,
        }
    }

    /// Adds one row given as its non-zero entries, in increasing index order.
    pub fn add_sparse(&mut self, nonzero: &[(usize, u16)]) {
        self.n_rows += 1;
        if self.diagonal_only {
            for &(i, ci) in nonzero {
                let ci = u64::from(ci);
                self.sums[i] += ci;
                self.upper[i] += ci * ci;
            }
            return;
        }
        for (a, &(i, ci)) in nonzero.iter().enumerate() {
            let ci = u64::from(ci);
            self.sums[i] += ci;
            let row = &mut self.upper[i * self.dim..(i + 1) * self.dim];
            for &(j, cj) in &nonzero[a..] {
                row[j] += ci * u64::from(cj);
            }
        }
    }

    pub fn add_assign(&mut self, other: &CountGram) {
        assert_eq!(self.dim, other.dim);
        for (a, b) in self.upper.iter_mut().zip(&other.upper) {
            *a += b;
        }
        for (a, b) in self.sums.iter_mut().zip(&other.sums) {
            *a += b;
        }
        self.n_rows += other.n_rows;
    }

    pub fn sub_assign(&mut self, other: &CountGram) {
        assert_eq!(self.dim, other.dim);
        for (a, b) in self.upper.iter_mut().zip(&other.upper) {
            *a -= b;
        }
        for (a, b) in self.sums.iter_mut().zip(&other.sums) {
            *a -= b;
        }
        self.n_rows -= other.n_rows;
    }

    /// The full symmetric Σ c cᵀ as f64, row-major.
    pub fn to_f64_symmetric(&self) -> Vec<f64> {
        assert!(
            !self.diagonal_only,
            "a diagonal-only gram has no off-diagonal sums"
        );
        let n = self.dim;
        let mut out = vec![0.0; n * n];
        for i in 0..n {
            for j in i..n {
                let v = self.upper[i * n + j] as f64;
                out[i * n + j] = v;
                out[j * n + i] = v;
            }
        }
        out
    }

    /// Σ c_i² alone, for the diagonal-Q fit.
    pub fn diagonal(&self) -> Vec<f64> {
        (0..self.dim).map(|i| self.square_sum(i) as f64).collect()
    }

    /// Σ c_i c_j, exact (either order of i and j).
    pub fn product_sum(&self, i: usize, j: usize) -> u64 {
        if i == j {
            return self.square_sum(i);
        }
        assert!(
            !self.diagonal_only,
            "a diagonal-only gram has no off-diagonal sums"
        );
        let (i, j) = (i.min(j), i.max(j));
        self.upper[i * self.dim + j]
    }

    /// n · Σ c_i c_j − Σ c_i · Σ c_j over the gram's n rows: n² times
    /// the covariance of entries i and j, exact.
    pub fn centred_product(&self, i: usize, j: usize) -> i128 {
        i128::from(self.n_rows) * i128::from(self.product_sum(i, j))
            - i128::from(self.sums[i]) * i128::from(self.sums[j])
    }

    /// Σ c_i², exact.
    pub fn square_sum(&self, i: usize) -> u64 {
        if self.diagonal_only {
            self.upper[i]
        } else {
            self.upper[i * self.dim + i]
        }
    }
}

/// Dense f64 sums: Σ a bᵀ with a of length `rows` and b of length `cols`.
#[derive(Clone, Debug, PartialEq)]
pub struct CrossSums {
    pub rows: usize,
    pub cols: usize,
    pub data: Vec<f64>,
}

impl CrossSums {
    pub fn new(rows: usize, cols: usize) -> CrossSums {
        CrossSums {
            rows,
            cols,
            data: vec![0.0; rows * cols],
        }
    }

    pub fn add_outer(&mut self, a: &[f64], b: &[f64]) {
        for (i, &ai) in a.iter().enumerate() {
            if ai == 0.0 {
                continue;
            }
            let row = &mut self.data[i * self.cols..(i + 1) * self.cols];
            for (r, &bj) in row.iter_mut().zip(b) {
                *r += ai * bj;
            }
        }
    }

    /// Adds c bᵀ for a sparse integer vector c.
    pub fn add_sparse_outer(&mut self, nonzero: &[(usize, u16)], b: &[f64]) {
        for &(i, c) in nonzero {
            let c = f64::from(c);
            let row = &mut self.data[i * self.cols..(i + 1) * self.cols];
            for (r, &bj) in row.iter_mut().zip(b) {
                *r += c * bj;
            }
        }
    }

    pub fn add_assign(&mut self, other: &CrossSums) {
        for (a, b) in self.data.iter_mut().zip(&other.data) {
            *a += b;
        }
    }

    pub fn sub_assign(&mut self, other: &CrossSums) {
        for (a, b) in self.data.iter_mut().zip(&other.data) {
            *a -= b;
        }
    }
}

/// The non-zero entries of one bin's counts, into a reused buffer.
pub fn nonzero_counts(counts: &[u16], offset: usize, out: &mut Vec<(usize, u16)>) {
    for (i, &c) in counts.iter().enumerate() {
        if c != 0 {
            out.push((offset + i, c));
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sparse_gram_equals_dense_outer_products() {
        let rows: [[u16; 4]; 3] = [[0, 2, 0, 1], [3, 0, 0, 0], [1, 1, 4, 0]];
        let mut gram = CountGram::new(4);
        let mut nz = Vec::new();
        for r in &rows {
            nz.clear();
            nonzero_counts(r, 0, &mut nz);
            gram.add_sparse(&nz);
        }
        let full = gram.to_f64_symmetric();
        for i in 0..4 {
            for j in 0..4 {
                let want: f64 = rows.iter().map(|r| f64::from(r[i]) * f64::from(r[j])).sum();
                assert_eq!(full[i * 4 + j], want);
            }
        }
        assert_eq!(gram.sums, vec![4, 3, 4, 1]);
    }

    #[test]
    fn subtracting_a_part_leaves_the_rest() {
        let mut a = CountGram::new(2);
        a.add_sparse(&[(0, 1), (1, 2)]);
        let mut b = CountGram::new(2);
        b.add_sparse(&[(1, 5)]);
        let mut total = a.clone();
        total.add_assign(&b);
        total.sub_assign(&b);
        assert_eq!(total, a);
    }
}
