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

/// `e^x` for each `x` of `v`, |x| ≤ [`ETA_LIMIT`] (the caller clamps):
/// x = k·ln 2 + r with |r| ≤ ln 2 / 2 (k by the round-to-nearest of adding
/// 1.5·2⁵², ln 2 split in two parts so k·ln 2 is exact), e^r by its Taylor
/// series to r¹³/13! (truncation below 4e-18 relative), times 2^k built
/// from its bits. Plain multiplies and adds in a fixed order, with no
/// branch and no call, so the loop vectorises and gives the same bits on
/// every x86-64 or ARM machine, live and offline; inlined into the
/// step's channel pass, which is also built four lanes wide (see
/// `observation_terms`). Within 2 ulp of the correctly rounded value
/// (tested against `f64::exp`).
#[inline(always)]
fn exp_in_place(v: &mut [f64]) {
    const INV_LN2: f64 = std::f64::consts::LOG2_E;
    // ln 2 split as in fdlibm (from memory; the high part has 32 low
    // zero bits so k · LN2_HI is exact for |k| < 2^20; checked by the test).
    const LN2_HI: f64 = f64::from_bits(0x3fe6_2e42_fee0_0000);
    const LN2_LO: f64 = f64::from_bits(0x3dea_39ef_3579_3c76);
    const SHIFT: f64 = 6_755_399_441_055_744.0; // 1.5 · 2^52
    const C: [f64; 14] = [
        1.0,
        1.0,
        1.0 / 2.0,
        1.0 / 6.0,
        1.0 / 24.0,
        1.0 / 120.0,
        1.0 / 720.0,
        1.0 / 5040.0,
        1.0 / 40320.0,
        1.0 / 362_880.0,
        1.0 / 3_628_800.0,
        1.0 / 39_916_800.0,
        1.0 / 479_001_600.0,
        1.0 / 6_227_020_800.0,
    ];
    for x in v.iter_mut() {
        let t = *x * INV_LN2 + SHIFT;
        let k = t - SHIFT;
        let r = (*x - k * LN2_HI) - k * LN2_LO;
        let mut p = C[13];
        for c in C[..13].iter().rev() {
            p = p * r + c;
        }
        let ki = (t.to_bits() as i64).wrapping_sub(SHIFT.to_bits() as i64);
        let scale = f64::from_bits(((ki + 1023) as u64) << 52);
        *x = p * scale;
    }
}

/// Σᵢ f(aᵢ, bᵢ, cᵢ) in four interleaved partial sums (i mod 4), added in
/// a fixed order at the end: independent chains the CPU overlaps and the
/// compiler vectorises, with one summation order on every machine.
#[inline]
fn sum4(a: &[f64], b: &[f64], c: &[f64], f: impl Fn(f64, f64, f64) -> f64) -> f64 {
    let n = a.len().min(b.len()).min(c.len());
    let mut s = [0.0f64; 4];
    let whole = n / 4 * 4;
    for i in (0..whole).step_by(4) {
        for k in 0..4 {
            s[k] += f(a[i + k], b[i + k], c[i + k]);
        }
    }
    let mut tail = 0.0;
    for i in whole..n {
        tail += f(a[i], b[i], c[i]);
    }
    ((s[0] + s[1]) + (s[2] + s[3])) + tail
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
    /// β by component: `beta_t[r * m + i]` is β_r of active channel i, so
    /// the per-bin loops run down contiguous columns and vectorise.
    beta_t: Vec<f64>,
    /// Per active channel: the exponent, then the rate λ (reused).
    eta: Vec<f64>,
    /// Per active channel: the observed count.
    observed: Vec<f64>,
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
    /// Past counts, lag-major: row `slot` holds one bin's counts of the
    /// active channels; `head` is the row written next.
    ring: Vec<f64>,
    head: usize,
    last_counts: Vec<f64>,
    clamps: u64,
    fault: bool,
    /// Active-channel indices left out of the update (drift handling).
    left_out: Vec<usize>,
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
        // Lag-major: kernel[(lag - 1) · m + i], as the ring is laid out.
        let m = active.len();
        let kernel = {
            let mut t = vec![0.0; span * m];
            for i in 0..m {
                for lag0 in 0..span {
                    t[lag0 * m + i] = kernel[i * span + lag0];
                }
            }
            t
        };
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
        let mut beta_t = vec![0.0; d * m];
        for i in 0..m {
            for r in 0..d {
                beta_t[r * m + i] = beta[i * d + r];
            }
        }
        let mut f = PointProcessFilter {
            beta_t,
            eta: vec![0.0; m],
            observed: vec![0.0; m],
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
            ring: vec![0.0; m * span],
            head: 0,
            last_counts: vec![0.0; n],
            clamps: 0,
            fault: false,
            left_out: Vec::new(),
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

    /// The ring slot holding the counts of `lag` bins ago (1..=span).
    fn slot(&self, lag: usize) -> usize {
        (self.head + self.span - lag) % self.span
    }

    /// Adds Σ_lag k[lag]·n(t − lag) to every active channel's exponent, a
    /// lag at a time down contiguous rows of the ring (lag-major, one
    /// value per active channel), so the loop vectorises.
    #[inline(always)]
    fn history_kernel(&self, eta: &mut [f64]) {
        let m = self.active.len();
        for lag in 1..=self.span {
            let slot = self.slot(lag);
            let kernel = &self.kernel[(lag - 1) * m..lag * m];
            let past = &self.ring[slot * m..(slot + 1) * m];
            for ((e, k), v) in eta.iter_mut().zip(kernel).zip(past) {
                *e += k * v;
            }
        }
    }

    /// The history drive of active channel `i` alone.
    fn history_drive(&self, i: usize) -> f64 {
        let m = self.active.len();
        (1..=self.span)
            .map(|lag| self.kernel[(lag - 1) * m + i] * self.ring[self.slot(lag) * m + i])
            .sum()
    }

    fn push_history(&mut self, counts: Option<&[u16]>) {
        for c in 0..self.n {
            self.last_counts[c] = counts.map_or(0.0, |k| f64::from(k[c]));
        }
        if self.span == 0 {
            return;
        }
        let m = self.active.len();
        let row = &mut self.ring[self.head * m..(self.head + 1) * m];
        for (r, &c) in row.iter_mut().zip(&self.active) {
            *r = self.last_counts[c];
        }
        self.head = (self.head + 1) % self.span;
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
        self.observation_terms(counts);
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

    /// The channels' part of a step, into `info` and `score`: exponents,
    /// rates, and the score and information sums. Compiled four lanes wide
    /// when the CPU has AVX2; every loop is elementwise or sums in a fixed
    /// order, so both builds give the same bits.
    fn observation_terms(&mut self, counts: &[u16]) {
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU has AVX2 (checked just above).
                unsafe { self.observation_terms_avx2(counts) };
                return;
            }
        }
        self.observation_terms_body(counts);
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn observation_terms_avx2(&mut self, counts: &[u16]) {
        self.observation_terms_body(counts);
    }

    #[inline(always)]
    fn observation_terms_body(&mut self, counts: &[u16]) {
        let d = self.d;
        // Pass 1, per channel: the exponent b0 + β·x⁻ (+ history and
        // coupling drive), clamped; the observed count.
        let m = self.active.len();
        self.eta.copy_from_slice(&self.b0);
        for r in 0..d {
            let xr = self.x_prior[r];
            for (e, b) in self.eta.iter_mut().zip(&self.beta_t[r * m..(r + 1) * m]) {
                *e += b * xr;
            }
        }
        for (o, &c) in self.observed.iter_mut().zip(&self.active) {
            *o = f64::from(counts[c]);
        }
        if self.span > 0 {
            let mut eta = std::mem::take(&mut self.eta);
            self.history_kernel(&mut eta);
            self.eta = eta;
        }
        if let Some(g) = &self.coupling {
            for (i, e) in self.eta.iter_mut().enumerate() {
                *e += linalg::dot(&g[i * self.n..(i + 1) * self.n], &self.last_counts);
            }
        }
        let mut clamped = 0u64;
        for e in self.eta.iter_mut() {
            clamped += u64::from(e.abs() > ETA_LIMIT);
            *e = e.clamp(-ETA_LIMIT, ETA_LIMIT);
        }
        self.clamps += clamped;
        // Pass 2: λ = exp(η) over all channels at once.
        exp_in_place(&mut self.eta);
        for &i in &self.left_out {
            // A channel left out adds no score and no information.
            self.eta[i] = 0.0;
            self.observed[i] = 0.0;
        }
        // Pass 3: score Σ β (n − λ) and information Σ λ β βᵀ, one column
        // pair at a time.
        for r in 0..d {
            let br = &self.beta_t[r * m..(r + 1) * m];
            self.score[r] = sum4(br, &self.observed, &self.eta, |b, n, l| b * (n - l));
            for s in r..d {
                let bs = &self.beta_t[s * m..(s + 1) * m];
                let acc = sum4(br, bs, &self.eta, |a, b, l| a * b * l);
                self.info[r * d + s] += acc;
                if s != r {
                    self.info[s * d + r] += acc;
                }
            }
        }
    }

    /// Leaves the channels marked in `left_out` (one flag per channel) out
    /// of every following update: their terms drop from the score and the
    /// information. Allocates; call it at a change, not per bin.
    pub fn set_left_out(&mut self, left_out: &[bool]) {
        self.left_out = self
            .active
            .iter()
            .enumerate()
            .filter(|&(_, &c)| left_out[c])
            .map(|(i, _)| i)
            .collect();
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
                + self.history_drive(i);
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_four_lane_build_of_a_step_gives_the_scalar_build_s_bits() {
        use crate::decoders::history_basis::RaisedCosineBasis;
        let n = 203; // not a multiple of four: the tails are exercised too
        let mut seed = 0x9e37_79b9_7f4a_7c15u64;
        let mut next = || {
            seed ^= seed << 13;
            seed ^= seed >> 7;
            seed ^= seed << 17;
            (seed >> 11) as f64 / (1u64 << 53) as f64
        };
        let channels = (0..n)
            .map(|_| {
                Some(ChannelGlm {
                    b0: (0.1 + 0.5 * next()).ln(),
                    beta: vec![0.1 * next() - 0.05, 0.1 * next() - 0.05],
                    history: (0..4).map(|_| 0.4 * next() - 0.3).collect(),
                    coupling: Vec::new(),
                    deviance: 0.0,
                    null_deviance: 0.0,
                    iterations: 0,
                })
            })
            .collect();
        let model = PointProcessModel {
            state: vec!["vel_x".into(), "vel_y".into()],
            outputs: vec!["vel_x".into(), "vel_y".into()],
            a: Mat::from_rows(&[vec![0.95, 0.0], vec![0.0, 0.95]]),
            w: Mat::from_rows(&[vec![1.0, 0.0], vec![0.0, 1.0]]),
            x0: vec![0.3, -0.2],
            p0: Mat::from_rows(&[vec![10.0, 0.0], vec![0.0, 10.0]]),
            channels,
            excluded: Vec::new(),
            history_basis: Some(RaisedCosineBasis::new(4, 10)),
        };
        let mut f = PointProcessFilter::new(&model).unwrap();
        for bin in 0..40 {
            let counts: Vec<u16> = (0..n).map(|_| (next() * 3.0) as u16).collect();
            let (mut a, mut b) = (f.clone(), f.clone());
            a.predict();
            b.predict();
            a.observation_terms(&counts);
            b.observation_terms_body(&counts);
            let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&a.info), bits(&b.info), "bin {bin}");
            assert_eq!(bits(&a.score), bits(&b.score), "bin {bin}");
            assert_eq!(bits(&a.eta), bits(&b.eta), "bin {bin}");
            f.step(&counts);
        }
    }

    #[test]
    fn the_vectorised_exp_is_within_two_ulp_of_the_library_exp() {
        let xs: Vec<f64> = (0..=600_000)
            .map(|i| -ETA_LIMIT + 2.0 * ETA_LIMIT * f64::from(i) / 600_000.0)
            .chain([0.0, -0.0, 1e-300, -1e-300, 0.5 * std::f64::consts::LN_2])
            .collect();
        let mut got = xs.clone();
        exp_in_place(&mut got);
        let mut worst = 0u64;
        for (x, g) in xs.iter().zip(&got) {
            let want = x.exp();
            let ulp = (want.to_bits() as i64 - g.to_bits() as i64).unsigned_abs();
            worst = worst.max(ulp);
            assert!(ulp <= 2, "exp({x}) = {g}, library {want} ({ulp} ulp)");
        }
        eprintln!("worst {worst} ulp");
    }
}
