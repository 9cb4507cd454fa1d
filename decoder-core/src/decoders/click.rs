//! The click decoder's per-bin half: the probability that the participant
//! is attempting a click, decoded beside velocity (point-and-click
//! decoding, Kim et al. 2011).
//!
//! Two published pieces in series. A linear discriminant on the counts of
//! the last few bins gives, each bin, the posterior that the bin belongs
//! to a click attempt. A two-state hidden Markov model (rest, click) then
//! filters those posteriors through time with the forward recursion
//! (Rabiner 1989), each bin's emission taken as the discriminant's
//! posterior over its class prior (a scaled likelihood), so one bin that
//! looks like a click does not make a click and a held attempt does. The
//! filter keeps a ring of the last bins' counts and allocates nothing per
//! bin. Fitting is in [`crate::fit::click`].

use serde::{Deserialize, Serialize};

/// A trained click decoder.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ClickModel {
    pub n_channels: usize,
    /// Bins of counts the discriminant reads: the current one and the
    /// `lags − 1` before it.
    pub lags: usize,
    /// Discriminant weights, lag-major: `weights[l · n_channels + c]`
    /// weighs channel c's count `l` bins back.
    pub weights: Vec<f64>,
    /// Discriminant intercept, the log prior odds included: the log
    /// posterior odds of a click are `weights · x + intercept`.
    pub intercept: f64,
    /// The share of training bins cued as clicks (the class prior).
    pub prior_click: f64,
    /// Probability of staying at rest, and of staying in a click, from
    /// one bin to the next (the hidden Markov model's transitions).
    pub stay_rest: f64,
    pub stay_click: f64,
}

/// Why a click model cannot be run.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum ClickError {
    #[error("click model: {0}")]
    Invalid(String),
}

impl ClickModel {
    pub fn validate(&self) -> Result<(), ClickError> {
        let bad = |s: String| Err(ClickError::Invalid(s));
        if self.lags == 0 || self.n_channels == 0 {
            return bad(format!(
                "{} lags of {} channels; both must be at least 1",
                self.lags, self.n_channels
            ));
        }
        if self.weights.len() != self.lags * self.n_channels {
            return bad(format!(
                "{} weights for {} lags of {} channels",
                self.weights.len(),
                self.lags,
                self.n_channels
            ));
        }
        if !self.weights.iter().all(|w| w.is_finite()) || !self.intercept.is_finite() {
            return bad("a weight or the intercept is not finite".into());
        }
        for (name, p) in [
            ("prior_click", self.prior_click),
            ("stay_rest", self.stay_rest),
            ("stay_click", self.stay_click),
        ] {
            if !(p > 0.0 && p < 1.0) {
                return bad(format!("{name} {p} must lie strictly between 0 and 1"));
            }
        }
        Ok(())
    }
}

/// The logistic function, computed without overflow.
pub fn logistic(d: f64) -> f64 {
    if d >= 0.0 {
        1.0 / (1.0 + (-d).exp())
    } else {
        let e = d.exp();
        e / (1.0 + e)
    }
}

/// The dot product in four interleaved partial sums (so the compiler can
/// keep four lanes busy), added in a fixed order: the same bits on every
/// machine, live and in replay.
fn dot(a: &[f64], b: &[f64]) -> f64 {
    let mut acc = [0.0f64; 4];
    let (a4, b4) = (a.chunks_exact(4), b.chunks_exact(4));
    let (ra, rb) = (a4.remainder(), b4.remainder());
    for (x, y) in a4.zip(b4) {
        for k in 0..4 {
            acc[k] += x[k] * y[k];
        }
    }
    let mut tail = 0.0;
    for (x, y) in ra.iter().zip(rb) {
        tail += x * y;
    }
    (acc[0] + acc[1]) + (acc[2] + acc[3]) + tail
}

/// A click model running bin by bin.
#[derive(Clone, Debug)]
pub struct ClickFilter {
    model: ClickModel,
    /// The last `lags` bins' counts, newest at `newest`.
    ring: Vec<f64>,
    newest: usize,
    /// Bins seen since the last reset (the discriminant waits for `lags`).
    seen: usize,
    /// Filtered probability of a click after the last bin.
    p_click: f64,
    /// The discriminant's posterior of the last bin.
    posterior: f64,
}

impl ClickFilter {
    pub fn new(model: ClickModel) -> Result<ClickFilter, ClickError> {
        model.validate()?;
        let ring = vec![0.0; model.lags * model.n_channels];
        let p = model.prior_click;
        Ok(ClickFilter {
            model,
            ring,
            newest: 0,
            seen: 0,
            p_click: p,
            posterior: p,
        })
    }

    pub fn model(&self) -> &ClickModel {
        &self.model
    }

    /// Back to the start: no bins seen, the prior as the probability.
    pub fn reset(&mut self) {
        self.ring.fill(0.0);
        self.newest = 0;
        self.seen = 0;
        self.p_click = self.model.prior_click;
        self.posterior = self.model.prior_click;
    }

    /// The discriminant's log posterior odds of a click for the bins in
    /// the ring.
    fn discriminant(&self) -> f64 {
        let (n, lags) = (self.model.n_channels, self.model.lags);
        let mut d = self.model.intercept;
        for l in 0..lags {
            let slot = (self.newest + lags - l) % lags;
            let x = &self.ring[slot * n..(slot + 1) * n];
            let w = &self.model.weights[l * n..(l + 1) * n];
            d += dot(w, x);
        }
        d
    }

    /// One bin's counts in: the filtered probability of a click.
    pub fn step(&mut self, counts: &[u16]) -> f64 {
        let (n, lags) = (self.model.n_channels, self.model.lags);
        self.newest = (self.newest + 1) % lags;
        let row = &mut self.ring[self.newest * n..(self.newest + 1) * n];
        for (r, &c) in row.iter_mut().zip(counts) {
            *r = f64::from(c);
        }
        self.seen += 1;
        if self.seen < lags {
            // Not enough bins for the discriminant yet: predict only.
            self.predict_only()
        } else {
            let q = logistic(self.discriminant());
            self.posterior = q;
            self.forward(Some(q))
        }
    }

    /// A bin that never came: the model's transitions alone, and its
    /// counts treated as unknown by the discriminant (the ring is not
    /// advanced, so the bins it reads stay the ones that came).
    pub fn predict_only(&mut self) -> f64 {
        self.forward(None)
    }

    /// One step of the forward recursion: predict with the transitions,
    /// then (with a posterior) weigh by the scaled likelihoods.
    fn forward(&mut self, posterior: Option<f64>) -> f64 {
        let m = &self.model;
        let prior = self.p_click * m.stay_click + (1.0 - self.p_click) * (1.0 - m.stay_rest);
        self.p_click = match posterior {
            None => prior,
            Some(q) => {
                let click = prior * q / m.prior_click;
                let rest = (1.0 - prior) * (1.0 - q) / (1.0 - m.prior_click);
                let total = click + rest;
                if total > 0.0 && total.is_finite() {
                    click / total
                } else {
                    prior
                }
            }
        };
        self.p_click
    }

    /// The filtered probability of a click after the last bin.
    pub fn probability(&self) -> f64 {
        self.p_click
    }

    /// The discriminant's posterior of the last bin decoded.
    pub fn posterior(&self) -> f64 {
        self.posterior
    }
}

/// Turns the click probability into clicks: a click when the probability
/// has stayed at or above `threshold` for `hold_bins` bins in a row, then
/// none for `refractory_bins` bins; never while not `allowed` (the
/// caller's say: not armed, coasting, halted, moving fast), which also
/// restarts the count.
#[derive(Clone, Debug, PartialEq)]
pub struct ClickGate {
    pub threshold: f64,
    pub hold_bins: usize,
    pub refractory_bins: usize,
    above: usize,
    cooldown: usize,
}

impl ClickGate {
    pub fn new(threshold: f64, hold_bins: usize, refractory_bins: usize) -> ClickGate {
        ClickGate {
            threshold,
            hold_bins: hold_bins.max(1),
            refractory_bins,
            above: 0,
            cooldown: 0,
        }
    }

    pub fn reset(&mut self) {
        self.above = 0;
        self.cooldown = 0;
    }

    /// One bin's probability in: whether this bin makes a click.
    pub fn step(&mut self, p_click: f64, allowed: bool) -> bool {
        if self.cooldown > 0 {
            self.cooldown -= 1;
            self.above = 0;
            return false;
        }
        // NaN is never at or above the threshold.
        let reached = p_click >= self.threshold;
        if !allowed || !reached {
            self.above = 0;
            return false;
        }
        self.above += 1;
        if self.above >= self.hold_bins {
            self.above = 0;
            self.cooldown = self.refractory_bins;
            return true;
        }
        false
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn model() -> ClickModel {
        ClickModel {
            n_channels: 2,
            lags: 2,
            // A click when channel 0 fires and channel 1 does not.
            weights: vec![1.0, -1.0, 0.5, -0.5],
            intercept: -3.0,
            prior_click: 0.1,
            stay_rest: 0.98,
            stay_click: 0.9,
        }
    }

    #[test]
    fn a_held_attempt_raises_the_probability_and_rest_lowers_it() {
        let mut f = ClickFilter::new(model()).unwrap();
        assert_eq!(f.probability(), 0.1);
        let mut p = Vec::new();
        for _ in 0..6 {
            p.push(f.step(&[6, 0]));
        }
        assert!(p.windows(2).all(|w| w[1] > w[0]), "{p:?}");
        assert!(p[5] > 0.99, "{p:?}");
        for _ in 0..6 {
            p.push(f.step(&[0, 4]));
        }
        assert!(p[11] < 0.01, "{p:?}");
    }

    #[test]
    fn a_missing_bin_moves_the_probability_toward_the_chain_s_own_balance() {
        let mut f = ClickFilter::new(model()).unwrap();
        for _ in 0..4 {
            f.step(&[6, 0]);
        }
        let before = f.probability();
        let after = f.predict_only();
        // The chain's stationary click share: (1 − 0.98) / (0.02 + 0.1).
        let balance = 0.02 / 0.12;
        assert!(after < before && after > balance, "{before} -> {after}");
        f.reset();
        assert_eq!(f.probability(), 0.1);
    }

    #[test]
    fn the_gate_clicks_after_the_hold_then_waits_out_the_refractory_time() {
        let mut g = ClickGate::new(0.8, 3, 4);
        let p = [
            0.9, 0.95, 0.9, 0.99, 0.99, 0.99, 0.99, 0.99, 0.99, 0.99, 0.99, 0.5,
        ];
        let clicks: Vec<bool> = p.iter().map(|&p| g.step(p, true)).collect();
        // Bins 0-2 hold: a click at 2; 3-6 refractory; 7-9 hold: a click
        // at 9; 10 refractory; 11 below.
        let at: Vec<usize> = (0..p.len()).filter(|&i| clicks[i]).collect();
        assert_eq!(at, vec![2, 9]);
        // Not allowed: no click, and the count starts again.
        let mut g = ClickGate::new(0.8, 2, 0);
        assert!(!g.step(0.9, true));
        assert!(!g.step(0.9, false));
        assert!(!g.step(0.9, true));
        assert!(g.step(0.9, true));
        assert!(!g.step(f64::NAN, true));
    }

    #[test]
    fn a_model_that_cannot_run_is_refused_with_the_reason() {
        let mut m = model();
        m.weights.pop();
        assert!(
            ClickFilter::new(m)
                .unwrap_err()
                .to_string()
                .contains("3 weights")
        );
        let mut m = model();
        m.stay_click = 1.0;
        assert!(
            ClickFilter::new(m)
                .unwrap_err()
                .to_string()
                .contains("stay_click")
        );
    }
}
