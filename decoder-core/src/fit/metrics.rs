//! Decoding accuracy per output dimension: Pearson correlation (CC), the
//! coefficient of determination (R², 1 − SS_res/SS_tot, which can go below
//! zero for a decoder worse than the mean) and root-mean-square error.

use serde::{Deserialize, Serialize};

#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Scores {
    pub cc: f64,
    pub r2: f64,
    pub rmse: f64,
}

/// The sums behind [`Scores`], added one (truth, estimate) pair at a time
/// (Welford's running means and co-moments, which stay accurate over
/// millions of bins), so a block is scored without keeping its estimates.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct ScoreSums {
    n: f64,
    mean_t: f64,
    mean_e: f64,
    /// Σ (t − t̄)², Σ (e − ē)², Σ (t − t̄)(e − ē).
    ss_t: f64,
    ss_e: f64,
    ss_te: f64,
    /// Σ (t − e)².
    ss_res: f64,
}

impl ScoreSums {
    pub fn add(&mut self, truth: f64, estimate: f64) {
        self.n += 1.0;
        let dt = truth - self.mean_t;
        self.mean_t += dt / self.n;
        let de = estimate - self.mean_e;
        self.mean_e += de / self.n;
        self.ss_t += dt * (truth - self.mean_t);
        self.ss_e += de * (estimate - self.mean_e);
        self.ss_te += dt * (estimate - self.mean_e);
        self.ss_res += (truth - estimate) * (truth - estimate);
    }

    pub fn of(truth: &[f64], estimate: &[f64]) -> ScoreSums {
        let mut s = ScoreSums::default();
        for (&t, &e) in truth.iter().zip(estimate) {
            s.add(t, e);
        }
        s
    }

    pub fn pairs(&self) -> u64 {
        self.n as u64
    }

    /// Pearson correlation; NaN when either series is constant.
    pub fn cc(&self) -> f64 {
        if self.n < 2.0 || self.ss_t == 0.0 || self.ss_e == 0.0 {
            return f64::NAN;
        }
        self.ss_te / (self.ss_t.sqrt() * self.ss_e.sqrt())
    }

    /// 1 − SS_res / SS_tot; NaN when the truth is constant.
    pub fn r2(&self) -> f64 {
        if self.n == 0.0 || self.ss_t == 0.0 {
            return f64::NAN;
        }
        1.0 - self.ss_res / self.ss_t
    }

    pub fn rmse(&self) -> f64 {
        if self.n == 0.0 {
            return f64::NAN;
        }
        (self.ss_res / self.n).sqrt()
    }

    pub fn scores(&self) -> Scores {
        Scores {
            cc: self.cc(),
            r2: self.r2(),
            rmse: self.rmse(),
        }
    }
}

/// Pearson correlation; NaN when either series is constant.
pub fn pearson(truth: &[f64], estimate: &[f64]) -> f64 {
    ScoreSums::of(truth, estimate).cc()
}

pub fn r_squared(truth: &[f64], estimate: &[f64]) -> f64 {
    ScoreSums::of(truth, estimate).r2()
}

pub fn rmse(truth: &[f64], estimate: &[f64]) -> f64 {
    ScoreSums::of(truth, estimate).rmse()
}

pub fn scores(truth: &[f64], estimate: &[f64]) -> Scores {
    ScoreSums::of(truth, estimate).scores()
}

/// Mean of scores, dimension by dimension.
pub fn mean_scores(all: &[Vec<Scores>]) -> Vec<Scores> {
    let Some(first) = all.first() else {
        return Vec::new();
    };
    (0..first.len())
        .map(|dim| {
            let k = all.len() as f64;
            Scores {
                cc: all.iter().map(|s| s[dim].cc).sum::<f64>() / k,
                r2: all.iter().map(|s| s[dim].r2).sum::<f64>() / k,
                rmse: all.iter().map(|s| s[dim].rmse).sum::<f64>() / k,
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn perfect_estimate_scores_one() {
        let t = [1.0, 2.0, 4.0, 3.0];
        let s = scores(&t, &t);
        assert!((s.cc - 1.0).abs() < 1e-15, "{}", s.cc);
        assert_eq!((s.r2, s.rmse), (1.0, 0.0));
    }

    #[test]
    fn mean_estimate_has_zero_r2_and_nan_cc() {
        let t = [1.0, 2.0, 3.0];
        let e = [2.0, 2.0, 2.0];
        assert_eq!(r_squared(&t, &e), 0.0);
        assert!(pearson(&t, &e).is_nan());
    }

    #[test]
    fn anticorrelated_estimate_has_negative_r2() {
        let t = [1.0, 2.0, 3.0];
        let e = [3.0, 2.0, 1.0];
        assert!((pearson(&t, &e) + 1.0).abs() < 1e-15);
        assert!(r_squared(&t, &e) < 0.0);
    }
}
