//! The point-process decoder: per-channel Poisson GLMs as the observation
//! model and the Gaussian-approximation recursive filter of Eden et al.
//! 2004 (after Brown et al. 1998) as the decoder.
//!
//! Per bin, with state x (e.g. vel_x, vel_y) and counts n_c:
//!
//! ```text
//! predict   x⁻ = A x,  P⁻ = A P Aᵀ + W
//! rates     λ_c = exp(b0_c + β_c·x⁻ + Σ_lag k_c[lag]·n_c(t−lag) + Σ_c' γ_cc'·n_c'(t−1))
//! update    P⁻¹ = (P⁻)⁻¹ + Σ_c β_c β_cᵀ λ_c        (information form)
//!           x   = x⁻ + P Σ_c β_c (n_c − λ_c)
//! ```
//!
//! λ is the expected count in the bin. The history filter k_c of each
//! channel is its basis coefficients folded through the raised-cosine basis
//! once at load, so a step costs O(N·(d² + span)) plus the coupling terms
//! when fitted. The exponent is clamped at ±`ETA_LIMIT` and each clamp is
//! counted; a bin that was never received advances the state without an
//! update and enters the history as zero counts.

use serde::{Deserialize, Serialize};

use crate::decoders::history_basis::{ETA_LIMIT, RaisedCosineBasis};
use crate::linalg::{self, Mat};

/// One channel's encoding model.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ChannelGlm {
    pub b0: f64,
    /// Over the state components.
    pub beta: Vec<f64>,
    /// Over the history basis (empty without history terms).
    pub history: Vec<f64>,
    /// Weights of the other channels' counts in the previous bin (empty
    /// without coupling; the channel's own entry is 0).
    pub coupling: Vec<f64>,
    /// Fit quality on the training bins.
    pub deviance: f64,
    pub null_deviance: f64,
    pub iterations: usize,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PointProcessModel {
    pub state: Vec<String>,
    pub outputs: Vec<String>,
    pub a: Mat,
    pub w: Mat,
    pub x0: Vec<f64>,
    pub p0: Mat,
    /// One per channel; `None` for a channel left out (never fired, or its
    /// fit did not converge), listed in `excluded` with the reason.
    pub channels: Vec<Option<ChannelGlm>>,
    pub excluded: Vec<(usize, String)>,
    pub history_basis: Option<RaisedCosineBasis>,
}

/// Why a point-process model cannot be run.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum PointProcessError {
    #[error("the state has {d} components; 1 to 16 are supported")]
    StateDim { d: usize },
    #[error("{name} must be a finite {d} × {d} matrix")]
    Matrix { name: &'static str, d: usize },
    #[error("x0 has {got} values for {d} state components")]
    InitialState { got: usize, d: usize },
    #[error(
        "channel {channel}: its coefficient lengths do not fit the state and the history basis"
    )]
    Coefficients { channel: usize },
    #[error("channel {channel}: a coefficient is not finite")]
    NonFinite { channel: usize },
    #[error(
        "the history basis is {rows}×{cols} for {n_basis} functions over {span} bins, or not finite"
    )]
    Basis {
        rows: usize,
        cols: usize,
        n_basis: usize,
        span: usize,
    },
    #[error("channel {channel}: coupling has {got} weights for {want} channels")]
    Coupling {
        channel: usize,
        got: usize,
        want: usize,
    },
    #[error("output {name:?} is not a state component (state is {state:?})")]
    UnknownOutput { name: String, state: Vec<String> },
}

impl PointProcessModel {
    pub fn n_channels(&self) -> usize {
        self.channels.len()
    }

    pub fn output_indices(&self) -> Result<Vec<usize>, PointProcessError> {
        self.outputs
            .iter()
            .map(|o| {
                self.state.iter().position(|s| s == o).ok_or_else(|| {
                    PointProcessError::UnknownOutput {
                        name: o.clone(),
                        state: self.state.clone(),
                    }
                })
            })
            .collect()
    }

    /// Checks dimensions and finiteness before a filter is built.
    pub fn validate(&self) -> Result<(), PointProcessError> {
        let d = self.state.len();
        if d == 0 || d > 16 {
            return Err(PointProcessError::StateDim { d });
        }
        for (name, m) in [("A", &self.a), ("W", &self.w), ("P0", &self.p0)] {
            if m.rows != d || m.cols != d || !m.is_finite() {
                return Err(PointProcessError::Matrix { name, d });
            }
        }
        if self.x0.len() != d {
            return Err(PointProcessError::InitialState {
                got: self.x0.len(),
                d,
            });
        }
        if let Some(b) = &self.history_basis {
            let w = &b.weights;
            if b.n_basis == 0
                || b.span_bins == 0
                || b.span_bins > 100_000
                || w.rows != b.n_basis
                || w.cols != b.span_bins
                || w.data.len() != w.rows * w.cols
                || !w.is_finite()
            {
                return Err(PointProcessError::Basis {
                    rows: w.rows,
                    cols: w.cols,
                    n_basis: b.n_basis,
                    span: b.span_bins,
                });
            }
        }
        let span = self.history_basis.as_ref().map_or(0, |b| b.n_basis);
        for (c, ch) in self.channels.iter().enumerate() {
            let Some(ch) = ch else { continue };
            if ch.beta.len() != d || (!ch.history.is_empty() && ch.history.len() != span) {
                return Err(PointProcessError::Coefficients { channel: c });
            }
            let finite = ch.b0.is_finite()
                && [&ch.beta, &ch.history, &ch.coupling]
                    .iter()
                    .all(|v| v.iter().all(|x| x.is_finite()));
            if !finite {
                return Err(PointProcessError::NonFinite { channel: c });
            }
            if !ch.coupling.is_empty() && ch.coupling.len() != self.channels.len() {
                return Err(PointProcessError::Coupling {
                    channel: c,
                    got: ch.coupling.len(),
                    want: self.channels.len(),
                });
            }
        }
        self.output_indices()?;
        Ok(())
    }
}

/// The running filter; all buffers allocated in `new`.
#[derive(Clone, Debug)]
pub struct PointProcessFilter {
    d: usize,
    a: Vec<f64>,
    w: Vec<f64>,
    x0: Vec<f64>,
    p0: Vec<f64>,
    /// Active channels: index, b0, β (d), history filter over lags.
    active: Vec<usize>,
    b0: Vec<f64>,
    beta: Vec<f64>,
    kernel: Vec<f64>,
    span: usize,
    coupling: Option<Vec<f64>>,
    n: usize,
    x: Vec<f64>,
    p: Vec<f64>,
    x_prior: Vec<f64>,
    p_prior: Vec<f64>,
    info: Vec<f64>,
    score: Vec<f64>,
    tmp: Vec<f64>,
    ident: Vec<f64>,
    /// Past counts per channel, newest first at `head`.
    ring: Vec<f64>,
    head: usize,
    last_counts: Vec<f64>,
    clamps: u64,
    fault: bool,
}

impl PointProcessFilter {
    /// Builds the runtime from a checked model ([`DecoderModel::validate`]).
    ///
    /// [`DecoderModel::validate`]: crate::decoders::DecoderModel::validate
    pub fn new(model: &PointProcessModel) -> Result<PointProcessFilter, PointProcessError> {
        debug_assert!(
            model.validate().is_ok(),
            "filters are built from checked models"
        );
        let d = model.state.len();
        let n = model.n_channels();
        let span = model.history_basis.as_ref().map_or(0, |b| b.span_bins);
        let mut active = Vec::new();
        let (mut b0, mut beta, mut kernel) = (Vec::new(), Vec::new(), Vec::new());
        let mut any_coupling = false;
        for (c, ch) in model.channels.iter().enumerate() {
            let Some(ch) = ch else { continue };
            active.push(c);
            b0.push(ch.b0);
            beta.extend_from_slice(&ch.beta);
            let mut k = vec![0.0; span];
            if let Some(basis) = &model.history_basis {
                for (j, coef) in ch.history.iter().enumerate() {
                    for (lag0, kv) in k.iter_mut().enumerate() {
                        *kv += coef * basis.weights.get(j, lag0);
                    }
                }
            }
            kernel.extend_from_slice(&k);
            any_coupling |= !ch.coupling.is_empty();
        }
        let coupling = any_coupling.then(|| {
            let mut g = vec![0.0; active.len() * n];
            for (i, &c) in active.iter().enumerate() {
                if let Some(ch) = &model.channels[c] {
                    for (j, v) in ch.coupling.iter().enumerate() {
                        g[i * n + j] = *v;
                    }
                }
            }
            g
        });
        let mut f = PointProcessFilter {
            d,
            a: model.a.data.clone(),
            w: model.w.data.clone(),
            x0: model.x0.clone(),
            p0: model.p0.data.clone(),
            active,
            b0,
            beta,
            kernel,
            span,
            coupling,
            n,
            x: vec![0.0; d],
            p: vec![0.0; d * d],
            x_prior: vec![0.0; d],
            p_prior: vec![0.0; d * d],
            info: vec![0.0; d * d],
            score: vec![0.0; d],
            tmp: vec![0.0; d * d],
            ident: vec![0.0; d * d],
            ring: vec![0.0; n * span.max(1)],
            head: 0,
            last_counts: vec![0.0; n],
            clamps: 0,
            fault: false,
        };
        f.reset();
        Ok(f)
    }

    pub fn reset(&mut self) {
        self.x.copy_from_slice(&self.x0);
        self.p.copy_from_slice(&self.p0);
        self.ring.fill(0.0);
        self.last_counts.fill(0.0);
        self.head = 0;
        self.fault = false;
    }

    pub fn state(&self) -> &[f64] {
        &self.x
    }

    pub fn covariance(&self) -> &[f64] {
        &self.p
    }

    /// Exponent clamps since the filter was built.
    pub fn clamps(&self) -> u64 {
        self.clamps
    }

    fn predict(&mut self) {
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

    /// Σ_lag k[lag]·n(t − lag) for active channel `i` (channel `c`). The
    /// ring's newest count sits just before `head`, so lags 1..=head run
    /// backwards from there and the rest wrap from the end: two straight
    /// passes, no modulo per lag.
    fn history_drive(&self, i: usize, c: usize) -> f64 {
        if self.span == 0 {
            return 0.0;
        }
        let span = self.span;
        let ring = &self.ring[c * span..(c + 1) * span];
        let kernel = &self.kernel[i * span..(i + 1) * span];
        let (recent, older) = ring.split_at(self.head);
        let mut acc = 0.0;
        for (k, v) in kernel.iter().zip(recent.iter().rev()) {
            acc += k * v;
        }
        for (k, v) in kernel[self.head..].iter().zip(older.iter().rev()) {
            acc += k * v;
        }
        acc
    }

    fn push_history(&mut self, counts: Option<&[u16]>) {
        let span = self.span.max(1);
        for c in 0..self.n {
            let v = counts.map_or(0.0, |k| f64::from(k[c]));
            self.ring[c * span + self.head] = v;
            self.last_counts[c] = v;
        }
        self.head = (self.head + 1) % span;
    }

    /// Decodes one bin; false when the update failed (the state is kept at
    /// the prediction and the caller sees a fault).
    pub fn step(&mut self, counts: &[u16]) -> bool {
        self.predict();
        let d = self.d;
        // Information matrix starts at (P⁻)⁻¹.
        self.info.copy_from_slice(&self.p_prior);
        self.ident.fill(0.0);
        for i in 0..d {
            self.ident[i * d + i] = 1.0;
        }
        if !linalg::lu_solve_in_place(&mut self.info, &mut self.ident, d) {
            self.fault = true;
            return false;
        }
        self.info.copy_from_slice(&self.ident);
        self.score.fill(0.0);
        for (i, &c) in self.active.iter().enumerate() {
            let beta = &self.beta[i * d..(i + 1) * d];
            let mut eta = self.b0[i] + linalg::dot(beta, &self.x_prior) + self.history_drive(i, c);
            if let Some(g) = &self.coupling {
                eta += linalg::dot(&g[i * self.n..(i + 1) * self.n], &self.last_counts);
            }
            if eta.abs() > ETA_LIMIT {
                self.clamps += 1;
                eta = eta.clamp(-ETA_LIMIT, ETA_LIMIT);
            }
            let lambda = eta.exp();
            let innovation = f64::from(counts[c]) - lambda;
            for r in 0..d {
                self.score[r] += beta[r] * innovation;
                let br = beta[r] * lambda;
                for (s, bs) in beta.iter().enumerate() {
                    self.info[r * d + s] += br * bs;
                }
            }
        }
        // P = info⁻¹, x = x⁻ + P · score.
        self.ident.fill(0.0);
        for i in 0..d {
            self.ident[i * d + i] = 1.0;
        }
        self.tmp.copy_from_slice(&self.info);
        let ok = linalg::lu_solve_in_place(&mut self.tmp, &mut self.ident, d);
        self.push_history(Some(counts));
        if !ok {
            self.x.copy_from_slice(&self.x_prior);
            self.p.copy_from_slice(&self.p_prior);
            self.fault = true;
            return false;
        }
        self.p.copy_from_slice(&self.ident);
        linalg::symmetrize(&mut self.p, d);
        linalg::mat_vec(&self.p, d, d, &self.score, &mut self.tmp[..d]);
        for i in 0..d {
            self.x[i] = self.x_prior[i] + self.tmp[i];
        }
        self.x.iter().all(|v| v.is_finite())
    }

    /// A bin that never came: predict only; its counts enter the history
    /// as zeros.
    pub fn predict_only(&mut self) {
        self.predict();
        self.x.copy_from_slice(&self.x_prior);
        self.p.copy_from_slice(&self.p_prior);
        self.push_history(None);
    }

    /// Expected counts of the active channels for the current state and
    /// history (for goodness of fit); `out` has one value per channel.
    pub fn expected_counts(&self, state: &[f64], out: &mut [f64]) {
        out.fill(0.0);
        let d = self.d;
        for (i, &c) in self.active.iter().enumerate() {
            let mut eta = self.b0[i]
                + linalg::dot(&self.beta[i * d..(i + 1) * d], state)
                + self.history_drive(i, c);
            if let Some(g) = &self.coupling {
                eta += linalg::dot(&g[i * self.n..(i + 1) * self.n], &self.last_counts);
            }
            out[c] = eta.clamp(-ETA_LIMIT, ETA_LIMIT).exp();
        }
    }

    /// Feeds observed counts into the history without decoding (goodness
    /// of fit walks the encoding model over recorded data).
    pub fn observe(&mut self, counts: &[u16]) {
        self.push_history(Some(counts));
    }
}
