//! Fitting the click decoder ([`crate::decoders::click`]) from a
//! calibration block whose bins are marked as cued clicks or not.
//!
//! The discriminant is Fisher's linear discriminant with a shrunk pooled
//! covariance, computed the way scikit-learn's
//! `LinearDiscriminantAnalysis(solver="lsqr", shrinkage=λ)` computes it, so
//! the two can be compared coefficient by coefficient: each class's
//! empirical covariance is shrunk towards its mean variance,
//! `(1 − λ)·S + λ·(tr S / p)·I`, the classes' covariances are averaged
//! with the class priors as weights, and
//! `w = Σ⁻¹(μ₁ − μ₀)`, `b = −½(μ₁ᵀΣ⁻¹μ₁ − μ₀ᵀΣ⁻¹μ₀) + ln(π₁/π₀)`. The hidden
//! Markov model's transitions are the label sequence's own: the share of
//! rest bins followed by rest, and of click bins followed by click.

use nalgebra::{DMatrix, DVector};

use crate::decoders::click::ClickModel;

/// Why a click decoder cannot be fitted.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum ClickFitError {
    #[error(
        "the block has {clicks} cued click bins and {rest} others; a click decoder needs both (mark click cues in click.npy or with the task's click flag)"
    )]
    OneClass { clicks: usize, rest: usize },
    #[error("click shrinkage {0} must lie in [0, 1]")]
    Shrinkage(f64),
    #[error("click lags {0} must be at least 1")]
    Lags(usize),
    #[error(
        "the pooled covariance of the click features is singular; raise the click shrinkage above 0"
    )]
    Singular,
    #[error(
        "the click labels never change from {0} to the other state; the transitions cannot be estimated"
    )]
    NoTransition(&'static str),
}

/// A two-class linear discriminant: weights and intercept of the log
/// posterior odds of class 1, and class 1's prior.
#[derive(Clone, Debug, PartialEq)]
pub struct Discriminant {
    pub weights: Vec<f64>,
    pub intercept: f64,
    pub prior: f64,
}

/// One class's shrunk covariance, as scikit-learn's `_cov` with a float
/// shrinkage: the empirical covariance (divided by n) shrunk towards its
/// mean variance, `(1 − λ)·S + λ·(tr S / p)·I`.
fn shrunk_covariance(rows: &[&[f64]], p: usize, shrinkage: f64) -> DMatrix<f64> {
    let n = rows.len() as f64;
    let mut mean = vec![0.0; p];
    for r in rows {
        for (m, v) in mean.iter_mut().zip(r.iter()) {
            *m += v;
        }
    }
    mean.iter_mut().for_each(|m| *m /= n);
    let mut z = DMatrix::<f64>::zeros(rows.len(), p);
    for (i, r) in rows.iter().enumerate() {
        for j in 0..p {
            z[(i, j)] = r[j] - mean[j];
        }
    }
    let mut s = z.transpose() * &z / n;
    let mu = s.trace() / p as f64;
    s *= 1.0 - shrinkage;
    for j in 0..p {
        s[(j, j)] += shrinkage * mu;
    }
    s
}

/// Fits the two-class discriminant on the rows `x` (each `p` long) with
/// labels `click`.
pub fn fit_discriminant(
    x: &[Vec<f64>],
    click: &[bool],
    shrinkage: f64,
) -> Result<Discriminant, ClickFitError> {
    if !(0.0..=1.0).contains(&shrinkage) {
        return Err(ClickFitError::Shrinkage(shrinkage));
    }
    let p = x.first().map_or(0, Vec::len);
    let ones: Vec<&[f64]> = x
        .iter()
        .zip(click)
        .filter(|(_, c)| **c)
        .map(|(r, _)| r.as_slice())
        .collect();
    let zeros: Vec<&[f64]> = x
        .iter()
        .zip(click)
        .filter(|(_, c)| !**c)
        .map(|(r, _)| r.as_slice())
        .collect();
    if ones.is_empty() || zeros.is_empty() {
        return Err(ClickFitError::OneClass {
            clicks: ones.len(),
            rest: zeros.len(),
        });
    }
    let n = x.len() as f64;
    let priors = [zeros.len() as f64 / n, ones.len() as f64 / n];
    let mean = |rows: &[&[f64]]| {
        let mut m = DVector::<f64>::zeros(p);
        for r in rows {
            for j in 0..p {
                m[j] += r[j];
            }
        }
        m / rows.len() as f64
    };
    let means = [mean(&zeros), mean(&ones)];
    let pooled = shrunk_covariance(&zeros, p, shrinkage) * priors[0]
        + shrunk_covariance(&ones, p, shrinkage) * priors[1];
    let solve = |b: &DVector<f64>| -> Result<DVector<f64>, ClickFitError> {
        match pooled.clone().cholesky() {
            Some(c) => Ok(c.solve(b)),
            None => pooled
                .clone()
                .lu()
                .solve(b)
                .filter(|v| v.iter().all(|x| x.is_finite()))
                .ok_or(ClickFitError::Singular),
        }
    };
    let coef = [solve(&means[0])?, solve(&means[1])?];
    let intercept = |k: usize| -0.5 * means[k].dot(&coef[k]) + priors[k].ln();
    Ok(Discriminant {
        weights: (&coef[1] - &coef[0]).iter().copied().collect(),
        intercept: intercept(1) - intercept(0),
        prior: priors[1],
    })
}

/// The lagged design of a block's counts (`t × n`, row-major): for each
/// bin from the `lags`-th on, the counts of it and the `lags − 1` before
/// it, newest first, with the bin's label.
pub fn lagged_rows(
    counts: &[u16],
    n: usize,
    click: &[bool],
    lags: usize,
) -> (Vec<Vec<f64>>, Vec<bool>) {
    let t = click.len();
    let mut x = Vec::with_capacity(t.saturating_sub(lags - 1));
    let mut y = Vec::with_capacity(x.capacity());
    for row in lags - 1..t {
        let mut r = Vec::with_capacity(n * lags);
        for l in 0..lags {
            r.extend(
                counts[(row - l) * n..(row - l + 1) * n]
                    .iter()
                    .map(|&c| f64::from(c)),
            );
        }
        x.push(r);
        y.push(click[row]);
    }
    (x, y)
}

/// The transitions of the label sequence: P(rest → rest) and
/// P(click → click).
pub fn transitions(click: &[bool]) -> Result<(f64, f64), ClickFitError> {
    let (mut rr, mut r, mut cc, mut c) = (0usize, 0usize, 0usize, 0usize);
    for w in click.windows(2) {
        if w[0] {
            c += 1;
            cc += usize::from(w[1]);
        } else {
            r += 1;
            rr += usize::from(!w[1]);
        }
    }
    if rr == r {
        return Err(ClickFitError::NoTransition("rest"));
    }
    if cc == c {
        return Err(ClickFitError::NoTransition("click"));
    }
    Ok((rr as f64 / r as f64, cc as f64 / c as f64))
}

/// Fits a click decoder on a block's counts (`t × n`) and its click cues.
pub fn fit_click(
    counts: &[u16],
    n: usize,
    click: &[bool],
    lags: usize,
    shrinkage: f64,
) -> Result<ClickModel, ClickFitError> {
    if lags == 0 {
        return Err(ClickFitError::Lags(lags));
    }
    let (x, y) = lagged_rows(counts, n, click, lags);
    let d = fit_discriminant(&x, &y, shrinkage)?;
    let (stay_rest, stay_click) = transitions(click)?;
    Ok(ClickModel {
        n_channels: n,
        lags,
        weights: d.weights,
        intercept: d.intercept,
        prior_click: d.prior,
        stay_rest,
        stay_click,
    })
}
