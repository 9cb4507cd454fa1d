//! The spike-history basis and the exponent limit that the point-process
//! decoder shares with GLM fitting: both sides must compute the same
//! covariates from the same past counts and clamp the same linear
//! predictor, or a fitted model would decode differently than it was fitted.

use serde::{Deserialize, Serialize};

use crate::linalg::Mat;

/// Largest |η| used in exp(η), in fitting and decoding alike (e^30 ≈ 1e13
/// spikes per bin is far outside anything physiological).
pub const ETA_LIMIT: f64 = 30.0;

/// Log-stretched raised cosines over lags 1..=span bins (Pillow et al.
/// 2008): bump j is ½(1 + cos(π·(s(t) − φ_j)/(2Δ))) where |s(t) − φ_j| <
/// 2Δ, with s(t) = ln(t + 1) and the centres φ_j evenly spaced Δ apart from
/// s(1) to s(span), so neighbouring bumps overlap by half and short lags get
/// finer resolution than long ones.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct RaisedCosineBasis {
    pub n_basis: usize,
    pub span_bins: usize,
    /// `n_basis × span_bins`: weight of lag (column + 1) in basis row.
    pub weights: Mat,
}

impl RaisedCosineBasis {
    pub fn new(n_basis: usize, span_bins: usize) -> RaisedCosineBasis {
        let n_basis = n_basis.max(1);
        let span = span_bins.max(1);
        let s = |t: f64| (t + 1.0).ln();
        let (lo, hi) = (s(1.0), s(span as f64));
        let delta = if n_basis > 1 {
            (hi - lo) / (n_basis - 1) as f64
        } else {
            (hi - lo).max(1e-9)
        };
        let mut weights = Mat::zeros(n_basis, span);
        for j in 0..n_basis {
            let centre = lo + j as f64 * delta;
            for lag in 1..=span {
                let d = (s(lag as f64) - centre) / (2.0 * delta);
                if d.abs() < 1.0 {
                    weights.set(j, lag - 1, 0.5 * (1.0 + (std::f64::consts::PI * d).cos()));
                }
            }
        }
        RaisedCosineBasis {
            n_basis,
            span_bins: span,
            weights,
        }
    }

    /// History covariates of bin `t` from the counts `history` of one
    /// channel (history[t − lag] for lag 1..=span; bins before 0 count 0).
    pub fn covariates(&self, history: &[f64], t: usize, out: &mut [f64]) {
        for (j, o) in out.iter_mut().enumerate().take(self.n_basis) {
            let w = self.weights.row(j);
            let mut acc = 0.0;
            for (lag0, wl) in w.iter().enumerate() {
                let lag = lag0 + 1;
                if lag <= t && *wl != 0.0 {
                    acc += wl * history[t - lag];
                }
            }
            *o = acc;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn basis_bumps_overlap_by_half_and_cover_the_span() {
        let b = RaisedCosineBasis::new(4, 20);
        // Raised cosines a quarter period apart sum to 2 wherever two
        // neighbours overlap fully, and to 1.5 at the first and last centre.
        for lag in 1..=20 {
            let sum: f64 = (0..4).map(|j| b.weights.get(j, lag - 1)).sum();
            assert!(
                (1.5 - 1e-12..=2.0 + 1e-12).contains(&sum),
                "lag {lag}: {sum}"
            );
        }
        assert_eq!(b.weights.get(0, 0), 1.0);
        assert_eq!(b.weights.get(3, 19), 1.0);
        // Short lags are finer: the first bump is narrower than the last.
        let width = |j: usize| (0..20).filter(|&l| b.weights.get(j, l) > 0.0).count();
        assert!(width(0) < width(3));
    }
}
