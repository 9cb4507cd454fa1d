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

/// Pearson correlation; NaN when either series is constant.
pub fn pearson(truth: &[f64], estimate: &[f64]) -> f64 {
    let n = truth.len().min(estimate.len());
    if n < 2 {
        return f64::NAN;
    }
    let mt = truth[..n].iter().sum::<f64>() / n as f64;
    let me = estimate[..n].iter().sum::<f64>() / n as f64;
    let (mut stt, mut see, mut ste) = (0.0, 0.0, 0.0);
    for (t, e) in truth.iter().zip(estimate) {
        let (dt, de) = (t - mt, e - me);
        stt += dt * dt;
        see += de * de;
        ste += dt * de;
    }
    if stt == 0.0 || see == 0.0 {
        return f64::NAN;
    }
    ste / (stt.sqrt() * see.sqrt())
}

pub fn r_squared(truth: &[f64], estimate: &[f64]) -> f64 {
    let n = truth.len().min(estimate.len());
    if n == 0 {
        return f64::NAN;
    }
    let mt = truth[..n].iter().sum::<f64>() / n as f64;
    let (mut ss_res, mut ss_tot) = (0.0, 0.0);
    for (t, e) in truth.iter().zip(estimate) {
        ss_res += (t - e) * (t - e);
        ss_tot += (t - mt) * (t - mt);
    }
    if ss_tot == 0.0 {
        return f64::NAN;
    }
    1.0 - ss_res / ss_tot
}

pub fn rmse(truth: &[f64], estimate: &[f64]) -> f64 {
    let n = truth.len().min(estimate.len());
    if n == 0 {
        return f64::NAN;
    }
    (truth
        .iter()
        .zip(estimate)
        .map(|(t, e)| (t - e) * (t - e))
        .sum::<f64>()
        / n as f64)
        .sqrt()
}

pub fn scores(truth: &[f64], estimate: &[f64]) -> Scores {
    Scores {
        cc: pearson(truth, estimate),
        r2: r_squared(truth, estimate),
        rmse: rmse(truth, estimate),
    }
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
