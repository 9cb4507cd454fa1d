//! The per-bin Kalman recursion in information form.
//!
//! The textbook update inverts the N × N innovation covariance every bin,
//! which at 1024 channels is a billion flops. Rewritten with the information
//! terms HᵀQ⁻¹ (d × N) and S = HᵀQ⁻¹H (d × d), both fixed once a model is
//! loaded, the update costs O(N·d + d³):
//!
//! ```text
//! x⁻ = A x          P⁻ = A P Aᵀ + W
//! P  = (I + P⁻ S)⁻¹ P⁻                 (= (P⁻⁻¹ + S)⁻¹, without inverting P⁻)
//! x  = x⁻ + P (HᵀQ⁻¹ y − S x⁻)
//! ```
//!
//! The form `(I + P⁻S)⁻¹P⁻` also holds when P⁻ is singular, as it is for the
//! constant state component that carries baseline rates. Count normalisation
//! `(count − offset) / scale` is folded into the gain rows at load time, so a
//! bin costs one u16 → f64 conversion per channel and d dot products. Every
//! buffer is allocated in [`KalmanFilter::new`]; a step allocates nothing.
//!
//! Leaving channels out (drift handling, a dead or noisy channel) is exact
//! in this form: the filter without rows R of H and rows and columns R of
//! Q has the gain `G' = G − G_R (Λ_RR)⁻¹ Λ_R·` with Λ = Q⁻¹ (for a
//! diagonal Q, G with columns R zeroed) and `S' = G' H`. Only Λ's rows R
//! are needed, solved from the Cholesky factor of Q kept at load, so a
//! change costs O(r·N² + r³ + d²·N) once, not per bin.

use std::sync::Arc;

use nalgebra::DMatrix;

use super::model::{KalmanError, KalmanModel, ObservationNoise};
use crate::linalg::{self, Mat};

/// HᵀQ⁻¹ (d × N, for normalised counts) and S = HᵀQ⁻¹H (d × d).
pub fn information_terms(model: &KalmanModel) -> Result<(Mat, Mat), KalmanError> {
    information_terms_with_factor(model).map(|(g, s, _)| (g, s))
}

/// The Cholesky factor of a full Q.
type QFactor = nalgebra::Cholesky<f64, nalgebra::Dyn>;

/// [`information_terms`] and, for a full Q, its Cholesky factor.
fn information_terms_with_factor(
    model: &KalmanModel,
) -> Result<(Mat, Mat, Option<QFactor>), KalmanError> {
    let d = model.state_dim();
    let n = model.n_channels();
    let h = model.h.to_dmatrix();
    // q_inv_h = Q⁻¹ H, N × d.
    let mut factor = None;
    let q_inv_h: DMatrix<f64> = match &model.q {
        ObservationNoise::Full(q) => {
            let chol = nalgebra::Cholesky::new(q.to_dmatrix()).ok_or_else(|| {
                // Find the first channel whose leading minor fails, for the message.
                let channel = (0..n)
                    .find(|&k| !linalg::is_positive_definite(&leading_minor(q, k + 1), k + 1))
                    .unwrap_or(0);
                KalmanError::QNotPositiveDefinite { channel }
            })?;
            let solved = chol.solve(&h);
            factor = Some(chol);
            solved
        }
        ObservationNoise::Diagonal(diag) => {
            let mut m = h.clone();
            for (i, q) in diag.iter().enumerate() {
                for c in 0..d {
                    m[(i, c)] /= q;
                }
            }
            m
        }
    };
    let ht_q_inv = q_inv_h.transpose();
    let s = &ht_q_inv * &h;
    let mut s = Mat::from_dmatrix(&s);
    linalg::symmetrize(&mut s.data, d);
    Ok((Mat::from_dmatrix(&ht_q_inv), s, factor))
}

fn leading_minor(m: &Mat, k: usize) -> Vec<f64> {
    let mut out = Vec::with_capacity(k * k);
    for r in 0..k {
        out.extend_from_slice(&m.row(r)[..k]);
    }
    out
}

/// The model's terms as loaded, from which a reduced filter is built.
/// What leaving channels out of a Kalman filter needs, kept from load:
/// [`Reducer::terms`] builds the filter's terms for any set of channels
/// left out.
#[derive(Clone, Debug)]
pub struct Reducer {
    /// HᵀQ⁻¹ in normalised units, d × N.
    g_norm: Mat,
    /// H, N × d.
    h: Mat,
    offset: Vec<f64>,
    scale: Vec<f64>,
    /// The Cholesky factor of a full Q; `None` for a diagonal Q.
    q_factor: Option<QFactor>,
    /// The full-model terms, restored when every channel is back.
    g: Vec<f64>,
    g0: Vec<f64>,
    s: Vec<f64>,
    steady: Option<SteadyRuntime>,
    /// The steady-state posterior covariance: where the full recursion
    /// starts when channels leave a steady-state filter.
    steady_p: Option<Vec<f64>>,
}

/// The information-form terms of the model with some channels left out:
/// what [`KalmanFilter::apply_reduced`] puts in place.
#[derive(Clone, Debug)]
pub struct ReducedTerms {
    left_out: Vec<bool>,
    g: Vec<f64>,
    g0: Vec<f64>,
    s: Vec<f64>,
    /// With every channel in: the model's own steady-state runtime, if any.
    steady: Option<SteadyRuntime>,
    all_in: bool,
}

impl ReducedTerms {
    /// The channels these terms leave out.
    pub fn left_out(&self) -> &[bool] {
        &self.left_out
    }
}

impl Reducer {
    /// The model's terms without the channels flagged in `left_out`: the
    /// exact filter of the model with those rows of H and Q removed
    /// (information form; with a full Q, the Schur complement of the
    /// left-out block of Q⁻¹). O(r·N² + d²·N) for r channels out of N
    /// with a full Q: at a thousand channels, tens of milliseconds, which
    /// is why the daemon builds them on a worker thread. A pure function
    /// of the model and the flags, so whoever builds them gets the same
    /// bits.
    pub fn terms(&self, left_out: &[bool]) -> ReducedTerms {
        let r = self;
        let (d, n) = (r.g_norm.rows, r.g_norm.cols);
        assert_eq!(left_out.len(), n, "one flag per channel");
        let out: Vec<usize> = (0..n).filter(|&c| left_out[c]).collect();
        if out.is_empty() {
            return ReducedTerms {
                left_out: left_out.to_vec(),
                g: r.g.clone(),
                g0: r.g0.clone(),
                s: r.s.clone(),
                steady: r.steady.clone(),
                all_in: true,
            };
        }
        // G' in normalised units.
        let mut g_red = r.g_norm.clone();
        match &r.q_factor {
            None => {
                for row in 0..d {
                    for &c in &out {
                        g_red.data[row * n + c] = 0.0;
                    }
                }
            }
            Some(chol) => {
                // Λ's rows R: Q z = e_c for each left-out channel.
                let mut e = DMatrix::<f64>::zeros(n, out.len());
                for (j, &c) in out.iter().enumerate() {
                    e[(c, j)] = 1.0;
                }
                let lam_cols = chol.solve(&e); // N × r, Λ's columns R (Λ symmetric)
                let lam_rr = DMatrix::from_fn(out.len(), out.len(), |i, j| lam_cols[(out[i], j)]);
                let lam_r = lam_cols.transpose(); // r × N
                let m = match lam_rr.clone().cholesky() {
                    Some(c) => c.solve(&lam_r),
                    None => lam_rr
                        .lu()
                        .solve(&lam_r)
                        .unwrap_or_else(|| DMatrix::zeros(out.len(), n)),
                };
                let g_r = DMatrix::from_fn(d, out.len(), |row, j| r.g_norm.get(row, out[j]));
                let corr = g_r * m; // d × N
                for row in 0..d {
                    for c in 0..n {
                        g_red.data[row * n + c] -= corr[(row, c)];
                    }
                    for &c in &out {
                        g_red.data[row * n + c] = 0.0;
                    }
                }
            }
        }
        let (g, g0) = fold_normalisation(&g_red, &r.offset, &r.scale);
        let mut s = vec![0.0; d * d];
        for row in 0..d {
            for col in 0..d {
                let mut acc = 0.0;
                for c in 0..n {
                    acc += g_red.data[row * n + c] * r.h.get(c, col);
                }
                s[row * d + col] = acc;
            }
        }
        linalg::symmetrize(&mut s, d);
        ReducedTerms {
            left_out: left_out.to_vec(),
            g,
            g0,
            s,
            steady: None,
            all_in: false,
        }
    }
}

/// Steady-state runtime: x ← F x + K′ c − k₀ with F = (I − K H) A.
#[derive(Clone, Debug)]
struct SteadyRuntime {
    f: Vec<f64>,
    /// Gain on raw counts, d × N (normalisation folded in).
    k: Vec<f64>,
    k0: Vec<f64>,
}

#[derive(Clone, Debug)]
pub struct KalmanFilter {
    d: usize,
    n: usize,
    a: Vec<f64>,
    w: Vec<f64>,
    /// HᵀQ⁻¹ with normalisation folded in: d × N, applied to raw counts.
    g: Vec<f64>,
    /// G · offset, subtracted after the gain.
    g0: Vec<f64>,
    /// S = HᵀQ⁻¹H in normalised units, d × d.
    s: Vec<f64>,
    x0: Vec<f64>,
    p0: Vec<f64>,
    steady: Option<SteadyRuntime>,
    x: Vec<f64>,
    p: Vec<f64>,
    /// What leaving channels out needs, kept from load (shared with a
    /// thread that builds reduced terms).
    reducer: Arc<Reducer>,
    /// Channels left out of the update (none unless drift handling says).
    left_out: Vec<bool>,
    // Scratch, sized once.
    counts_f64: Vec<f64>,
    x_prior: Vec<f64>,
    p_prior: Vec<f64>,
    tmp: Vec<f64>,
    lhs: Vec<f64>,
    info: Vec<f64>,
}

impl KalmanFilter {
    /// Builds the runtime from a validated model. `use_steady` selects the
    /// steady-state gain when the model carries one.
    pub fn new(model: &KalmanModel, use_steady: bool) -> Result<KalmanFilter, KalmanError> {
        debug_assert!(
            model.validate().is_ok(),
            "filters are built from checked models"
        );
        let d = model.state_dim();
        let n = model.n_channels();
        let (ht_q_inv, s, q_factor) = information_terms_with_factor(model)?;
        let (g, g0) = fold_normalisation(&ht_q_inv, &model.count_offset, &model.count_scale);
        let steady = match (&model.steady, use_steady) {
            (Some(st), true) => {
                let (k, k0) = fold_normalisation(&st.gain, &model.count_offset, &model.count_scale);
                // F = (I − K_norm H) A, with H in normalised units.
                let mut i_minus_kh = Mat::identity(d).data;
                for r in 0..d {
                    for c in 0..d {
                        let mut acc = 0.0;
                        for ch in 0..n {
                            acc += st.gain.get(r, ch) * model.h.get(ch, c);
                        }
                        i_minus_kh[r * d + c] -= acc;
                    }
                }
                let mut f = vec![0.0; d * d];
                linalg::mat_mul(&i_minus_kh, &model.a.data, d, &mut f);
                Some(SteadyRuntime { f, k, k0 })
            }
            _ => None,
        };
        let reducer = Reducer {
            g_norm: ht_q_inv,
            h: model.h.clone(),
            offset: model.count_offset.clone(),
            scale: model.count_scale.clone(),
            q_factor,
            g: g.clone(),
            g0: g0.clone(),
            s: s.data.clone(),
            steady: steady.clone(),
            steady_p: steady
                .as_ref()
                .and(model.steady.as_ref())
                .map(|st| st.posterior_cov.data.clone()),
        };
        Ok(KalmanFilter {
            d,
            n,
            a: model.a.data.clone(),
            w: model.w.data.clone(),
            g,
            g0,
            s: s.data,
            reducer: Arc::new(reducer),
            left_out: vec![false; n],
            x0: model.x0.clone(),
            p0: model.p0.data.clone(),
            steady,
            x: model.x0.clone(),
            p: model.p0.data.clone(),
            counts_f64: vec![0.0; n],
            x_prior: vec![0.0; d],
            p_prior: vec![0.0; d * d],
            tmp: vec![0.0; d * d],
            lhs: vec![0.0; d * d],
            info: vec![0.0; d],
        })
    }

    pub fn state_dim(&self) -> usize {
        self.d
    }

    pub fn n_channels(&self) -> usize {
        self.n
    }

    pub fn is_steady_state(&self) -> bool {
        self.steady.is_some()
    }

    /// Back to x0, P0 (a new stream or a new block).
    pub fn reset(&mut self) {
        self.x.copy_from_slice(&self.x0);
        self.p.copy_from_slice(&self.p0);
    }

    pub fn state(&self) -> &[f64] {
        &self.x
    }

    /// Continues from the given state and covariance (d and d × d values),
    /// as another filter left them.
    pub fn restore(&mut self, state: &[f64], covariance: &[f64]) {
        self.x.copy_from_slice(state);
        self.p.copy_from_slice(covariance);
    }

    /// The a-posteriori covariance, d × d row-major (P0 until the first step;
    /// fixed at its prior value in steady-state mode).
    pub fn covariance(&self) -> &[f64] {
        &self.p
    }

    /// One bin: predict, then update with the bin's counts. Returns false if
    /// the covariance update was singular (non-finite parameters or state);
    /// the state is then the prediction alone.
    pub fn step(&mut self, counts: &[u16]) -> bool {
        debug_assert_eq!(counts.len(), self.n);
        for (dst, &c) in self.counts_f64.iter_mut().zip(counts) {
            *dst = f64::from(c);
        }
        self.update()
    }

    /// [`KalmanFilter::step`] with the bin's values already as f64 (counts
    /// corrected for drift), in the same units as counts.
    pub fn step_values(&mut self, values: &[f64]) -> bool {
        debug_assert_eq!(values.len(), self.n);
        self.counts_f64.copy_from_slice(values);
        self.update()
    }

    fn update(&mut self) -> bool {
        let d = self.d;
        if let Some(st) = &self.steady {
            linalg::mat_vec(&st.f, d, d, &self.x, &mut self.x_prior);
            for r in 0..d {
                let row = &st.k[r * self.n..(r + 1) * self.n];
                self.x[r] = self.x_prior[r] + (linalg::dot(row, &self.counts_f64) - st.k0[r]);
            }
            return true;
        }
        self.predict_into_prior();
        // info = G c − g0 − S x⁻
        for r in 0..d {
            let row = &self.g[r * self.n..(r + 1) * self.n];
            let s_row = &self.s[r * d..(r + 1) * d];
            self.info[r] = (linalg::dot(row, &self.counts_f64) - self.g0[r])
                - linalg::dot(s_row, &self.x_prior);
        }
        // lhs = I + P⁻ S ; solve lhs · P = P⁻.
        linalg::mat_mul(&self.p_prior, &self.s, d, &mut self.lhs);
        for i in 0..d {
            self.lhs[i * d + i] += 1.0;
        }
        self.p.copy_from_slice(&self.p_prior);
        if !linalg::lu_solve_in_place(&mut self.lhs, &mut self.p, d) {
            self.p.copy_from_slice(&self.p_prior);
            self.x.copy_from_slice(&self.x_prior);
            return false;
        }
        linalg::symmetrize(&mut self.p, d);
        for r in 0..d {
            self.x[r] = self.x_prior[r] + linalg::dot(&self.p[r * d..(r + 1) * d], &self.info);
        }
        true
    }

    /// A bin with no counts (a missing packet): the prediction alone.
    pub fn predict_only(&mut self) {
        if self.steady.is_some() {
            linalg::mat_vec(&self.a, self.d, self.d, &self.x, &mut self.x_prior);
            self.x.copy_from_slice(&self.x_prior);
            return;
        }
        self.predict_into_prior();
        self.x.copy_from_slice(&self.x_prior);
        self.p.copy_from_slice(&self.p_prior);
    }

    /// Channels left out of the update, as last set.
    pub fn left_out(&self) -> &[bool] {
        &self.left_out
    }

    /// Leaves the channels marked in `left_out` out of every following
    /// update: the exact filter of the model without those rows of H and
    /// rows and columns of Q. The state and covariance carry over. A
    /// steady-state filter runs the full recursion from its converged
    /// covariance while any channel is out, and its fixed gain again once
    /// every channel is back. Builds the terms here ([`Reducer::terms`]):
    /// allocates and, with a full Q, costs O(r·N²); the daemon builds them
    /// on a worker and puts them in place with
    /// [`KalmanFilter::apply_reduced`].
    pub fn set_left_out(&mut self, left_out: &[bool]) {
        assert_eq!(left_out.len(), self.n, "one flag per channel");
        if left_out == self.left_out.as_slice() {
            return;
        }
        let terms = self.reducer.terms(left_out);
        self.apply_reduced(terms);
    }

    /// What builds the reduced terms for any set of channels left out: a
    /// shared handle, so another thread can build them while this filter
    /// decodes ([`Reducer::terms`]).
    pub fn reducer(&self) -> Arc<Reducer> {
        Arc::clone(&self.reducer)
    }

    /// Puts terms built by [`Reducer::terms`] in place: from the next bin
    /// the filter is the model without those channels. Cheap (moves, and
    /// with a steady-state model one d × d copy); returns the terms it
    /// replaced, for the caller to drop where freeing costs nothing.
    pub fn apply_reduced(&mut self, terms: ReducedTerms) -> ReducedTerms {
        assert_eq!(terms.left_out.len(), self.n, "one flag per channel");
        let ReducedTerms {
            left_out,
            g,
            g0,
            s,
            steady,
            all_in,
        } = terms;
        let old = ReducedTerms {
            left_out: std::mem::replace(&mut self.left_out, left_out),
            g: std::mem::replace(&mut self.g, g),
            g0: std::mem::replace(&mut self.g0, g0),
            s: std::mem::replace(&mut self.s, s),
            steady: None,
            all_in: false,
        };
        if all_in {
            self.steady = steady;
            if self.steady.is_some() {
                self.p.copy_from_slice(&self.p0);
            }
        } else if self.steady.take().is_some()
            && let Some(p) = &self.reducer.steady_p
        {
            self.p.copy_from_slice(p);
        }
        old
    }

    fn predict_into_prior(&mut self) {
        linalg::time_update(
            &self.a,
            &self.w,
            &self.x,
            &self.p,
            self.d,
            &mut self.tmp,
            &mut self.x_prior,
            &mut self.p_prior,
        );
    }
}

/// Folds `(count − offset) / scale` into a d × N gain: returns the gain on raw
/// counts and the constant to subtract after it.
fn fold_normalisation(gain: &Mat, offset: &[f64], scale: &[f64]) -> (Vec<f64>, Vec<f64>) {
    let (d, n) = (gain.rows, gain.cols);
    let mut g = vec![0.0; d * n];
    let mut g0 = vec![0.0; d];
    for r in 0..d {
        let mut acc = 0.0;
        for ch in 0..n {
            let v = gain.get(r, ch) / scale[ch];
            g[r * n + ch] = v;
            acc += v * offset[ch];
        }
        g0[r] = acc;
    }
    (g, g0)
}
