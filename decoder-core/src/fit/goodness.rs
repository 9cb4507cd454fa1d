//! Goodness of fit of point-process encoding models by the time-rescaling
//! theorem (Brown et al. 2002): if a channel's conditional intensity is
//! right, the integrated intensity between its spikes is exponential with
//! mean 1, so u = 1 − exp(−z) is uniform on [0, 1]. The KS statistic of the
//! u's against the uniform, with the 95 % band 1.36/√n, says whether the
//! model fits; log-likelihood per spike against a homogeneous Poisson model
//! of the same mean rate says how much the model explains.
//!
//! Counts are binned, so spike times within a bin are unknown. The
//! discrete-time correction of Haslinger, Pipa and Brown (2010) handles
//! this: the interval to a spike in bin t is the sum of the expected counts
//! of the spike-free bins since the last spike plus
//! δ = −ln(1 − r·(1 − e^(−λ_t))) with r uniform on (0, 1), which makes the
//! rescaled intervals exactly exponential for bins with at most one spike
//! (use 1 ms bins for goodness of fit). A bin with m > 1 spikes is treated
//! as m sub-bins of λ/m with one spike each, an approximation. The r's come
//! from a caller's seeded source, so the statistic is reproducible.

use serde::Serialize;

/// The rescaled, uniformised inter-spike intervals of one channel: u_k =
/// 1 − exp(−ξ_k), uniform when the model is right. `uniform` supplies the
/// r of each spike; the interval before the first spike is not counted.
pub fn rescaled_intervals(
    expected: &[f64],
    counts: &[u16],
    mut uniform: impl FnMut() -> f64,
) -> Vec<f64> {
    let mut out = Vec::new();
    let mut since_last = 0.0;
    let mut seen_spike = false;
    for (&lambda, &m) in expected.iter().zip(counts) {
        if m == 0 {
            since_last += lambda;
            continue;
        }
        let q = lambda / f64::from(m);
        for _ in 0..m {
            let r = uniform();
            let delta = -(1.0 - r * (1.0 - (-q).exp())).ln();
            if seen_spike {
                out.push(1.0 - (-(since_last + delta)).exp());
            }
            seen_spike = true;
            since_last = 0.0;
        }
    }
    out
}

/// [`rescaled_intervals`] with r's from a ChaCha8 stream of `seed`.
pub fn rescaled_intervals_seeded(expected: &[f64], counts: &[u16], seed: u64) -> Vec<f64> {
    use rand::{RngExt, SeedableRng};
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    rescaled_intervals(expected, counts, || rng.random::<f64>())
}

/// The KS statistic of `u` against the uniform distribution on [0, 1].
pub fn ks_uniform(u: &[f64]) -> f64 {
    let mut s = u.to_vec();
    s.sort_by(f64::total_cmp);
    let n = s.len() as f64;
    s.iter()
        .enumerate()
        .map(|(i, &v)| {
            let v = v.clamp(0.0, 1.0);
            ((i as f64 + 1.0) / n - v).max(v - i as f64 / n)
        })
        .fold(0.0, f64::max)
}

/// The 95 % KS band for `n` intervals (Brown et al. 2002).
pub fn ks_band_95(n: usize) -> f64 {
    1.36 / (n.max(1) as f64).sqrt()
}

/// Poisson log-likelihood of counts under expected counts, dropping the
/// log(n!) term (it cancels in comparisons).
pub fn poisson_log_likelihood(expected: &[f64], counts: &[u16]) -> f64 {
    expected
        .iter()
        .zip(counts)
        .map(|(&l, &n)| f64::from(n) * l.max(f64::MIN_POSITIVE).ln() - l)
        .sum()
}

#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ChannelFit {
    pub channel: usize,
    pub spikes: u64,
    pub ks: f64,
    pub band: f64,
    pub within_band: bool,
    /// (log L(model) − log L(homogeneous Poisson)) / spikes, in bits.
    pub bits_per_spike: f64,
}

/// The fit of one channel given its expected counts on held-out bins.
pub fn channel_fit(channel: usize, expected: &[f64], counts: &[u16]) -> ChannelFit {
    let u = rescaled_intervals_seeded(expected, counts, 0x6F17 ^ channel as u64);
    let spikes: u64 = counts.iter().map(|&c| u64::from(c)).sum();
    let mean = spikes as f64 / counts.len().max(1) as f64;
    let homogeneous = vec![mean; counts.len()];
    let gain =
        poisson_log_likelihood(expected, counts) - poisson_log_likelihood(&homogeneous, counts);
    let ks = if u.is_empty() { 1.0 } else { ks_uniform(&u) };
    let band = ks_band_95(u.len());
    ChannelFit {
        channel,
        spikes,
        ks,
        band,
        within_band: !u.is_empty() && ks <= band,
        bits_per_spike: gain / std::f64::consts::LN_2 / (spikes.max(1) as f64),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ks_of_evenly_spread_values_is_half_a_step() {
        let u: Vec<f64> = (0..10).map(|i| (i as f64 + 0.5) / 10.0).collect();
        assert!((ks_uniform(&u) - 0.05).abs() < 1e-12);
    }

    #[test]
    fn the_true_intensity_passes_and_a_wrong_one_fails() {
        use rand::{RngExt, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        // 1 ms bins: expected counts between 0.002 and 0.038, at most one
        // spike per bin, drawn with probability 1 − e^(−λ) (Poisson ≥ 1).
        let lambda: Vec<f64> = (0..400_000)
            .map(|t| 0.02 + 0.018 * (t as f64 / 500.0).sin())
            .collect();
        let counts: Vec<u16> = lambda
            .iter()
            .map(|&l| u16::from(rng.random::<f64>() < 1.0 - (-l).exp()))
            .collect();
        let right = channel_fit(0, &lambda, &counts);
        let flat = vec![0.02; lambda.len()];
        let wrong = channel_fit(0, &flat, &counts);
        assert!(right.within_band, "{right:?}");
        assert!(!wrong.within_band, "{wrong:?}");
        assert!(
            right.bits_per_spike > 0.05 && wrong.bits_per_spike.abs() < 0.01,
            "{right:?} {wrong:?}"
        );
    }
}
