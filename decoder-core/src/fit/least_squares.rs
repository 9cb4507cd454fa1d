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

/// Σ v vᵀ and Σ v over bins of real-valued feature vectors (continuous
/// features such as spike band power), in f64; only the upper triangle
/// is accumulated, every entry of it at each row (features are dense).
#[derive(Clone, Debug, PartialEq)]
pub struct ValueGram {
    pub dim: usize,
    pub diagonal_only: bool,
    upper: Vec<f64>,
    pub sums: Vec<f64>,
    pub n_rows: u64,
}

impl ValueGram {
    pub fn new(dim: usize, diagonal_only: bool) -> ValueGram {
        ValueGram {
            dim,
            diagonal_only,
            upper: vec![0.0; if diagonal_only { dim } else { dim * dim }],
            sums: vec![0.0; dim],
            n_rows: 0,
        }
    }

    /// Adds one row.
    pub fn add_dense(&mut self, v: &[f64]) {
        debug_assert_eq!(v.len(), self.dim);
        self.n_rows += 1;
        for (s, &x) in self.sums.iter_mut().zip(v) {
            *s += x;
        }
        if self.diagonal_only {
            for (u, &x) in self.upper.iter_mut().zip(v) {
                *u += x * x;
            }
            return;
        }
        for (i, &vi) in v.iter().enumerate() {
            let row = &mut self.upper[i * self.dim + i..(i + 1) * self.dim];
            for (r, &vj) in row.iter_mut().zip(&v[i..]) {
                *r += vi * vj;
            }
        }
    }

    fn product_sum(&self, i: usize, j: usize) -> f64 {
        if self.diagonal_only {
            assert_eq!(i, j, "a diagonal-only gram has no off-diagonal sums");
            return self.upper[i];
        }
        let (i, j) = (i.min(j), i.max(j));
        self.upper[i * self.dim + j]
    }
}

/// The sums of the observations a fit regresses: spike counts, exactly in
/// integers over their non-zero entries ([`CountGram`]), or continuous
/// features in f64 ([`ValueGram`]). The fits read both through the same
/// methods, which for counts give the very values the integer sums did.
#[derive(Clone, Debug, PartialEq)]
pub enum Gram {
    Counts(CountGram),
    Values(ValueGram),
}

impl Gram {
    /// Sums of `dim`-long rows of `input`, every product or (for a
    /// diagonal observation noise) the squares alone.
    pub fn new(input: crate::wire::packet::BinKind, dim: usize, diagonal_only: bool) -> Gram {
        match (input, diagonal_only) {
            (crate::wire::packet::BinKind::Counts, false) => Gram::Counts(CountGram::new(dim)),
            (crate::wire::packet::BinKind::Counts, true) => {
                Gram::Counts(CountGram::new_diagonal(dim))
            }
            (crate::wire::packet::BinKind::Features, d) => Gram::Values(ValueGram::new(dim, d)),
        }
    }

    pub fn n_rows(&self) -> u64 {
        match self {
            Gram::Counts(g) => g.n_rows,
            Gram::Values(g) => g.n_rows,
        }
    }

    pub fn dim(&self) -> usize {
        match self {
            Gram::Counts(g) => g.dim,
            Gram::Values(g) => g.dim,
        }
    }

    /// Σ v_i.
    pub fn sum(&self, i: usize) -> f64 {
        match self {
            Gram::Counts(g) => g.sums[i] as f64,
            Gram::Values(g) => g.sums[i],
        }
    }

    /// Σ v_i².
    pub fn square_sum(&self, i: usize) -> f64 {
        match self {
            Gram::Counts(g) => g.square_sum(i) as f64,
            Gram::Values(g) => g.product_sum(i, i),
        }
    }

    /// n · Σ v_i v_j − Σ v_i · Σ v_j: n² times the covariance of entries i
    /// and j (exact before the last rounding for counts).
    pub fn centred(&self, i: usize, j: usize) -> f64 {
        match self {
            Gram::Counts(g) => g.centred_product(i, j) as f64,
            Gram::Values(g) => g.n_rows as f64 * g.product_sum(i, j) - g.sums[i] * g.sums[j],
        }
    }

    /// Whether entry i never varied over the rows: exactly for counts; for
    /// features, a variance below 1e-12 of the mean square (rounding).
    pub fn is_constant(&self, i: usize) -> bool {
        match self {
            Gram::Counts(g) => g.centred_product(i, i) == 0,
            Gram::Values(g) => {
                let n = g.n_rows as f64;
                self.centred(i, i) <= 1e-12 * n * g.product_sum(i, i)
            }
        }
    }

    /// The full symmetric Σ v vᵀ as f64, row-major.
    pub fn to_f64_symmetric(&self) -> Vec<f64> {
        match self {
            Gram::Counts(g) => g.to_f64_symmetric(),
            Gram::Values(g) => {
                assert!(
                    !g.diagonal_only,
                    "a diagonal-only gram has no off-diagonal sums"
                );
                let n = g.dim;
                let mut out = vec![0.0; n * n];
                for i in 0..n {
                    for j in i..n {
                        let v = g.upper[i * n + j];
                        out[i * n + j] = v;
                        out[j * n + i] = v;
                    }
                }
                out
            }
        }
    }

    pub fn add_assign(&mut self, other: &Gram) {
        match (self, other) {
            (Gram::Counts(a), Gram::Counts(b)) => a.add_assign(b),
            (Gram::Values(a), Gram::Values(b)) => {
                for (x, y) in a.upper.iter_mut().zip(&b.upper) {
                    *x += y;
                }
                for (x, y) in a.sums.iter_mut().zip(&b.sums) {
                    *x += y;
                }
                a.n_rows += b.n_rows;
            }
            _ => panic!("sums of counts and of features do not add"),
        }
    }

    pub fn sub_assign(&mut self, other: &Gram) {
        match (self, other) {
            (Gram::Counts(a), Gram::Counts(b)) => a.sub_assign(b),
            (Gram::Values(a), Gram::Values(b)) => {
                for (x, y) in a.upper.iter_mut().zip(&b.upper) {
                    *x -= y;
                }
                for (x, y) in a.sums.iter_mut().zip(&b.sums) {
                    *x -= y;
                }
                a.n_rows -= b.n_rows;
            }
            _ => panic!("sums of counts and of features do not subtract"),
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
