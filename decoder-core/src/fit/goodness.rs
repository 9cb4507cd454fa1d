//! Goodness of fit of point-process encoding models by the time-rescaling
//! theorem (Brown et al. 2002): if a channel's conditional intensity is
//! right, the integrated intensity between its spikes is exponential with
//! mean 1, so u = 1 − exp(−z) is uniform on [0, 1]. The KS statistic of the
//! u's against the uniform, with the 95 % band 1.36/√n, says whether the
//! model fits; log-likelihood per spike against a homogeneous Poisson model
//! of the same mean rate says how much the model explains.
//!
//! Counts are binned, so spike times within a bin are unknown. The rule
//! here is exact for a correctly specified model at any bin width: the
//! intensity is held constant within each bin (the model says nothing
//! finer), and a bin's k spikes are placed at k independent uniform
//! positions inside it — which is what an inhomogeneous Poisson process
//! with that piecewise-constant intensity does given k events in the bin.
//! The rescaled interval between consecutive spikes is then the integrated
//! intensity between their positions. (The older correction of Haslinger,
//! Pipa and Brown 2010 is exact only for bins with at most one spike, and
//! splitting a bin of m spikes into m sub-bins rejects correct models at
//! 20 ms bins.) The positions come from a caller's seeded source, so the
//! statistic is reproducible.

use serde::Serialize;

/// The rescaled, uniformised inter-spike intervals of one channel: u_k =
/// 1 − exp(−z_k), with z_k the integrated intensity between spikes k − 1
/// and k, uniform when the model is right. `uniform` supplies each spike's
/// position in its bin, in (0, 1); the interval before the first spike is
/// not counted.
pub fn rescaled_intervals(
    expected: &[f64],
    counts: &[u16],
    mut uniform: impl FnMut() -> f64,
) -> Vec<f64> {
    let mut out = Vec::new();
    let mut positions: Vec<f64> = Vec::new();
    // Integrated intensity since the last spike, up to the current bin's
    // start; and the last spike's position within its bin.
    let mut since_last = 0.0;
    let mut last: Option<f64> = None;
    for (&lambda, &m) in expected.iter().zip(counts) {
        if m == 0 {
            since_last += lambda;
            continue;
        }
        positions.clear();
        positions.extend((0..m).map(|_| uniform()));
        positions.sort_by(f64::total_cmp);
        for &s in &positions {
            if let Some(prev) = last {
                // From the last spike: the bins since its bin's start, this
                // bin up to s, less the part of its bin before it.
                let z = since_last + lambda * s - prev;
                out.push(1.0 - (-z).exp());
            }
            // Measure the next interval from this spike: λ·s is the part of
            // this bin before it.
            last = Some(lambda * s);
            since_last = 0.0;
        }
        since_last += lambda;
    }
    out
}

/// [`rescaled_intervals`] with positions from a ChaCha8 stream of `seed`.
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
    /// Held-out bins with more than one spike (placed at random within
    /// their bin for the rescaling).
    pub multi_spike_bins: u64,
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
        multi_spike_bins: counts.iter().filter(|&&c| c > 1).count() as u64,
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
    /// Poisson counts at 20 ms bins, often several spikes a bin: the true
    /// expected counts pass (the old sub-bin rule put such channels far
    /// outside the band), and a flat rate of the same mean fails.
    #[test]
    fn poisson_counts_at_coarse_bins_pass_under_the_true_rate() {
        use rand::SeedableRng;
        use rand_distr::{Distribution, Poisson};
        let mut within = 0;
        let channels = 20;
        for c in 0..channels {
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(100 + c);
            // 20 ms bins at 10..90 spikes/s: 0.2 to 1.8 spikes a bin.
            let lambda: Vec<f64> = (0..20_000)
                .map(|t| 1.0 + 0.8 * (t as f64 / 60.0 + c as f64).sin())
                .collect();
            let counts: Vec<u16> = lambda
                .iter()
                .map(|&l| Poisson::new(l).unwrap().sample(&mut rng) as u16)
                .collect();
            let fit = channel_fit(c as usize, &lambda, &counts);
            assert!(fit.multi_spike_bins > 1000, "{fit:?}");
            within += usize::from(fit.within_band);
            if c == 0 {
                let flat = vec![1.0; lambda.len()];
                assert!(!channel_fit(0, &flat, &counts).within_band);
            }
        }
        // 95 % band: about 1 in 20 correct channels falls outside.
        assert!(within >= 17, "{within} of {channels} within the band");
    }
}
