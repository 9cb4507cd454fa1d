//! The steady-state Kalman gain (Malik et al. 2011).
//!
//! With fixed A, W, H, Q the covariance recursion converges within a few
//! seconds of bins, after which the gain no longer changes. Decoding with the
//! converged gain from the first bin removes the covariance update from the
//! per-bin path and makes the decoder a fixed linear filter, which is easier
//! to reason about at a rig. The gain is found by iterating the Riccati
//! recursion from P0 until the a-posteriori covariance stops changing.

use super::filter::information_terms;
use super::model::{KalmanError, KalmanModel, SteadyGain};
use crate::linalg::{self, Mat};

pub const DEFAULT_TOLERANCE: f64 = 1e-12;
pub const DEFAULT_MAX_ITERATIONS: usize = 10_000;

/// Iterates `P⁻ = A P Aᵀ + W`, `P = (I + P⁻ S)⁻¹ P⁻` until the largest change
/// of P, relative to P's largest entry, is at most `tolerance`.
pub fn steady_state_gain(
    model: &KalmanModel,
    tolerance: f64,
    max_iterations: usize,
) -> Result<SteadyGain, KalmanError> {
    debug_assert!(
        model.validate().is_ok(),
        "filters are built from checked models"
    );
    let d = model.state_dim();
    let n = model.n_channels();
    let (ht_q_inv, s) = information_terms(model)?;
    let mut p = model.p0.data.clone();
    let mut p_prior = vec![0.0; d * d];
    let mut tmp = vec![0.0; d * d];
    let mut lhs = vec![0.0; d * d];
    let mut next = vec![0.0; d * d];
    let mut change = f64::INFINITY;
    for iteration in 1..=max_iterations {
        linalg::sandwich_add(&model.a.data, &p, &model.w.data, d, &mut tmp, &mut p_prior);
        linalg::symmetrize(&mut p_prior, d);
        linalg::mat_mul(&p_prior, &s.data, d, &mut lhs);
        for i in 0..d {
            lhs[i * d + i] += 1.0;
        }
        next.copy_from_slice(&p_prior);
        if !linalg::lu_solve_in_place(&mut lhs, &mut next, d) {
            return Err(KalmanError::Singular);
        }
        linalg::symmetrize(&mut next, d);
        let scale = next
            .iter()
            .fold(0.0f64, |m, v| m.max(v.abs()))
            .max(f64::MIN_POSITIVE);
        change = next
            .iter()
            .zip(&p)
            .fold(0.0f64, |m, (a, b)| m.max((a - b).abs()))
            / scale;
        p.copy_from_slice(&next);
        if change <= tolerance {
            // K = P HᵀQ⁻¹ (d × N, normalised counts).
            let mut gain = Mat::zeros(d, n);
            for r in 0..d {
                for ch in 0..n {
                    let mut acc = 0.0;
                    for k in 0..d {
                        acc += p[r * d + k] * ht_q_inv.get(k, ch);
                    }
                    gain.set(r, ch, acc);
                }
            }
            return Ok(SteadyGain {
                gain,
                posterior_cov: Mat {
                    rows: d,
                    cols: d,
                    data: p,
                },
                tolerance,
                iterations: iteration,
                max_iterations,
            });
        }
    }
    Err(KalmanError::NotConverged {
        iterations: max_iterations,
        change,
        tolerance,
    })
}
