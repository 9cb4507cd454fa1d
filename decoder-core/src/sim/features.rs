//! Continuous features for a simulated block: a stand-in for spike band
//! power, so the decoders that read features have a seeded block to train
//! and decode. Each channel's value per bin is an offset plus a gain times
//! the bin's spike count plus Gaussian noise, in µV: it carries the same
//! tuning as the counts, with noise of another shape. The offsets, gains
//! and noise levels belong to the simulated array (its population seed);
//! the noise of each bin to the block (its seed), drawn from a generator
//! of its own so the spikes are the ones the block of counts would have.

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

/// What the manifest says the simulated features are.
pub const FEATURE_NAME: &str = "simulated spike band power, µV";

/// Turns each bin's counts into its features.
#[derive(Clone, Debug)]
pub struct FeatureMaker {
    offset: Vec<f64>,
    gain: Vec<f64>,
    noise: Vec<f64>,
    rng: ChaCha8Rng,
}

impl FeatureMaker {
    /// The array's `n` channels (drawn from `population_seed`), noise from
    /// `block_seed`.
    pub fn new(population_seed: u64, block_seed: u64, n: usize) -> FeatureMaker {
        let mut array = ChaCha8Rng::seed_from_u64(population_seed ^ 0x5B9_F00D);
        let mut offset = Vec::with_capacity(n);
        let mut gain = Vec::with_capacity(n);
        let mut noise = Vec::with_capacity(n);
        for _ in 0..n {
            offset.push(array.random_range(20.0..60.0));
            gain.push(array.random_range(2.0..6.0));
            noise.push(array.random_range(1.0..3.0));
        }
        FeatureMaker {
            offset,
            gain,
            noise,
            rng: ChaCha8Rng::seed_from_u64(block_seed ^ 0xF_EA7),
        }
    }

    /// One bin's features from its counts.
    pub fn features(&mut self, counts: &[u16], out: &mut [f32]) {
        for (ch, (o, &c)) in out.iter_mut().zip(counts).enumerate() {
            let z: f64 = StandardNormal.sample(&mut self.rng);
            *o = (self.offset[ch] + self.gain[ch] * f64::from(c) + self.noise[ch] * z) as f32;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn features_follow_the_counts_and_repeat_with_the_seeds() {
        let mut a = FeatureMaker::new(1, 2, 3);
        let mut b = FeatureMaker::new(1, 2, 3);
        let (mut fa, mut fb) = ([0f32; 3], [0f32; 3]);
        let (mut low, mut high) = (0.0, 0.0);
        for _ in 0..2000 {
            a.features(&[0, 0, 0], &mut fa);
            b.features(&[0, 0, 0], &mut fb);
            assert_eq!(fa, fb);
            low += f64::from(fa[0]);
            a.features(&[5, 5, 5], &mut fa);
            b.features(&[5, 5, 5], &mut fb);
            high += f64::from(fa[0]);
        }
        // Five spikes more raise the mean by 5 × gain (2 to 6 µV a spike).
        let step = (high - low) / 2000.0 / 5.0;
        assert!((1.8..6.2).contains(&step), "{step}");
    }
}
