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

use crate::decoders::click::{ClickFilter, ClickGate, ClickModel};

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

/// Bins of counts the discriminant reads unless told otherwise (120 ms at
/// 20 ms bins).
pub const DEFAULT_LAGS: usize = 6;
/// Shrinkage of the pooled covariance unless told otherwise.
pub const DEFAULT_SHRINKAGE: f64 = 0.05;
/// How long after a cue's end a click still catches it, ms.
pub const CATCH_MS: f64 = 300.0;

/// A two-class linear discriminant: weights and intercept of the log
/// posterior odds of class 1, and class 1's prior.
#[derive(Clone, Debug, PartialEq)]
pub struct Discriminant {
    pub weights: Vec<f64>,
    pub intercept: f64,
    pub prior: f64,
}

/// Rows gathered before they are added to a class's scatter matrix by one
/// matrix product.
const CHUNK_ROWS: usize = 2048;

/// Design rows offered by index, so a fit never holds the whole design:
/// `rows` of them, each `p` long, written into the caller's buffer.
pub trait ClickRows {
    fn rows(&self) -> usize;
    fn width(&self) -> usize;
    /// Row `r` into `out` (`width()` long) and its label; `None` for a
    /// row this fit leaves out.
    fn row(&self, r: usize, out: &mut [f64]) -> Option<bool>;
}

/// The lagged counts of a block read in place: row r is bin r + lags − 1
/// with the lags − 1 bins before it, newest first; `keep` says which rows
/// this fit uses.
pub struct LaggedCounts<'a, K: Fn(usize) -> bool> {
    pub counts: &'a [u16],
    pub n: usize,
    pub cued: &'a [bool],
    pub lags: usize,
    pub keep: K,
}

impl<K: Fn(usize) -> bool> ClickRows for LaggedCounts<'_, K> {
    fn rows(&self) -> usize {
        self.cued.len().saturating_sub(self.lags - 1)
    }

    fn width(&self) -> usize {
        self.n * self.lags
    }

    fn row(&self, r: usize, out: &mut [f64]) -> Option<bool> {
        if !(self.keep)(r) {
            return None;
        }
        let bin = r + self.lags - 1;
        for l in 0..self.lags {
            let src = &self.counts[(bin - l) * self.n..(bin - l + 1) * self.n];
            for (o, &c) in out[l * self.n..(l + 1) * self.n].iter_mut().zip(src) {
                *o = f64::from(c);
            }
        }
        Some(self.cued[bin])
    }
}

/// Per class: rows, mean, and (second pass) the scatter about the mean.
struct ClassSums {
    n: usize,
    mean: DVector<f64>,
    scatter: DMatrix<f64>,
}

/// Fits the two-class discriminant on `rows`: two passes, the means, then
/// each class's scatter about its mean a chunk of rows at a time (one
/// matrix product a chunk), so memory is p² and a chunk, not the design.
pub fn fit_discriminant(
    rows: &dyn ClickRows,
    shrinkage: f64,
) -> Result<Discriminant, ClickFitError> {
    if !(0.0..=1.0).contains(&shrinkage) {
        return Err(ClickFitError::Shrinkage(shrinkage));
    }
    let p = rows.width();
    let mut class = [0, 1].map(|_| ClassSums {
        n: 0,
        mean: DVector::zeros(p),
        scatter: DMatrix::zeros(p, p),
    });
    let mut row = vec![0.0; p];
    for r in 0..rows.rows() {
        if let Some(label) = rows.row(r, &mut row) {
            let c = &mut class[usize::from(label)];
            c.n += 1;
            for (m, v) in c.mean.iter_mut().zip(&row) {
                *m += v;
            }
        }
    }
    if class[0].n == 0 || class[1].n == 0 {
        return Err(ClickFitError::OneClass {
            clicks: class[1].n,
            rest: class[0].n,
        });
    }
    for c in class.iter_mut() {
        c.mean /= c.n as f64;
    }
    // Centred rows of each class, gathered a chunk at a time.
    let mut chunks = [0, 1].map(|_| DMatrix::<f64>::zeros(CHUNK_ROWS, p));
    let mut filled = [0usize; 2];
    let flush = |c: &mut ClassSums, chunk: &DMatrix<f64>, k: usize| {
        let z = chunk.rows(0, k);
        c.scatter.gemm_tr(1.0, &z, &z, 1.0);
    };
    for r in 0..rows.rows() {
        if let Some(label) = rows.row(r, &mut row) {
            let k = usize::from(label);
            let at = filled[k];
            for (j, v) in row.iter().enumerate() {
                chunks[k][(at, j)] = v - class[k].mean[j];
            }
            filled[k] += 1;
            if filled[k] == CHUNK_ROWS {
                flush(&mut class[k], &chunks[k], CHUNK_ROWS);
                filled[k] = 0;
            }
        }
    }
    for k in 0..2 {
        if filled[k] > 0 {
            flush(&mut class[k], &chunks[k], filled[k]);
        }
    }
    let n = (class[0].n + class[1].n) as f64;
    let priors = [class[0].n as f64 / n, class[1].n as f64 / n];
    // Each class's covariance (divided by its rows), shrunk toward its
    // mean variance as scikit-learn's `_cov` does with a float shrinkage,
    // then weighted by the class priors.
    let mut pooled = DMatrix::<f64>::zeros(p, p);
    for (c, prior) in class.iter().zip(priors) {
        let mut s = &c.scatter / c.n as f64;
        let mu = s.trace() / p as f64;
        s *= 1.0 - shrinkage;
        for j in 0..p {
            s[(j, j)] += shrinkage * mu;
        }
        pooled += s * prior;
    }
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
    let coef = [solve(&class[0].mean)?, solve(&class[1].mean)?];
    let intercept = |k: usize| -0.5 * class[k].mean.dot(&coef[k]) + priors[k].ln();
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

/// The click model of a fitted discriminant, with the transitions of the
/// cues it was fitted on.
fn model_of(
    d: Discriminant,
    cued: &[bool],
    n: usize,
    lags: usize,
) -> Result<ClickModel, ClickFitError> {
    let (stay_rest, stay_click) = transitions(cued)?;
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
    let rows = LaggedCounts {
        counts,
        n,
        cued: click,
        lags,
        keep: |_| true,
    };
    model_of(fit_discriminant(&rows, shrinkage)?, click, n, lags)
}

/// How well clicks are decoded, as the field reports it.
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct ClickScores {
    /// Area under the ROC curve of the filtered click probability against
    /// the cues, bin by bin (0.5 is chance).
    pub auc: f64,
    /// Cued click attempts (runs of cued bins), and those with a click
    /// from their first bin to `catch_ms` after their last.
    pub cues: usize,
    pub caught: usize,
    /// Clicks outside every such window, per minute of decoding.
    pub false_per_minute: f64,
    /// Median time from a caught cue's first bin to its first click, ms.
    pub median_latency_ms: Option<f64>,
    /// The window after a cue's end within which a click still counts.
    pub catch_ms: f64,
}

/// Area under the ROC curve of `score` for `positive` (Mann–Whitney: the
/// share of (positive, negative) pairs ranked the right way, ties as
/// half); NaN without both classes.
pub fn roc_auc(score: &[f64], positive: &[bool]) -> f64 {
    let mut order: Vec<usize> = (0..score.len()).collect();
    order.sort_by(|&a, &b| score[a].total_cmp(&score[b]));
    // Mid-ranks, ties sharing the mean of their ranks.
    let mut rank = vec![0.0; score.len()];
    let mut i = 0;
    while i < order.len() {
        let mut j = i;
        while j + 1 < order.len() && score[order[j + 1]] == score[order[i]] {
            j += 1;
        }
        let mid = (i + j) as f64 / 2.0 + 1.0;
        for &k in &order[i..=j] {
            rank[k] = mid;
        }
        i = j + 1;
    }
    let n_pos = positive.iter().filter(|p| **p).count() as f64;
    let n_neg = positive.len() as f64 - n_pos;
    let sum_pos: f64 = rank
        .iter()
        .zip(positive)
        .filter(|(_, p)| **p)
        .map(|(r, _)| r)
        .sum();
    (sum_pos - n_pos * (n_pos + 1.0) / 2.0) / (n_pos * n_neg)
}

/// Scores decoded clicks against the cues of the same bins.
pub fn score_clicks(
    p_click: &[f64],
    clicks: &[bool],
    cued: &[bool],
    bin_ms: f64,
    catch_ms: f64,
) -> ClickScores {
    let t = cued.len();
    let after = (catch_ms / bin_ms).ceil() as usize;
    // The cues as runs of bins, and the window each may be caught in.
    let mut runs = Vec::new();
    let mut b = 0;
    while b < t {
        if cued[b] {
            let start = b;
            while b < t && cued[b] {
                b += 1;
            }
            runs.push((start, b, (b + after).min(t)));
        } else {
            b += 1;
        }
    }
    let mut in_window = vec![false; t];
    let mut latencies = Vec::new();
    let mut caught = 0;
    for &(start, _, until) in &runs {
        in_window[start..until].fill(true);
        if let Some(first) = (start..until).find(|&k| clicks[k]) {
            caught += 1;
            latencies.push((first - start) as f64 * bin_ms);
        }
    }
    let false_clicks = (0..t).filter(|&k| clicks[k] && !in_window[k]).count();
    latencies.sort_by(f64::total_cmp);
    let median = if latencies.is_empty() {
        None
    } else {
        let m = latencies.len() / 2;
        Some(if latencies.len() % 2 == 1 {
            latencies[m]
        } else {
            (latencies[m - 1] + latencies[m]) / 2.0
        })
    };
    ClickScores {
        auc: roc_auc(p_click, cued),
        cues: runs.len(),
        caught,
        false_per_minute: false_clicks as f64 / (t as f64 * bin_ms / 60_000.0),
        median_latency_ms: median,
        catch_ms,
    }
}

/// Cross-validated click decoding: `k` contiguous folds of the bins; each
/// fold's decoder is fitted on the rows whose whole window lies outside
/// the fold, then run from its start over the fold (filter and `gate`,
/// every bin allowed); the scores are over all held-out bins together.
#[allow(clippy::too_many_arguments)]
pub fn cross_validate_click(
    counts: &[u16],
    n: usize,
    cued: &[bool],
    lags: usize,
    shrinkage: f64,
    k: usize,
    gate: &ClickGate,
    bin_ms: f64,
    catch_ms: f64,
) -> Result<ClickScores, ClickFitError> {
    if lags == 0 {
        return Err(ClickFitError::Lags(lags));
    }
    let t = cued.len();
    let mut p_all = Vec::with_capacity(t);
    let mut clicks_all = Vec::with_capacity(t);
    for fold in crate::fit::folds::split_evenly(t, k.max(2)) {
        // Row r reads bins r ..= r + lags − 1: kept when none is held out.
        let rows = LaggedCounts {
            counts,
            n,
            cued,
            lags,
            keep: |r: usize| r + lags - 1 < fold.start || r >= fold.end,
        };
        let train_labels: Vec<bool> = (0..t)
            .filter(|b| !fold.contains(b))
            .map(|b| cued[b])
            .collect();
        let model = model_of(fit_discriminant(&rows, shrinkage)?, &train_labels, n, lags)?;
        let mut filter = ClickFilter::new(model).map_err(|_| ClickFitError::Singular)?;
        let mut g = gate.clone();
        g.reset();
        for b in fold {
            let p = filter.step(&counts[b * n..(b + 1) * n]);
            p_all.push(p);
            clicks_all.push(g.step(p, true));
        }
    }
    Ok(score_clicks(&p_all, &clicks_all, cued, bin_ms, catch_ms))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn caught_false_and_latency_are_counted_as_defined() {
        // 20 ms bins; two cues (bins 2-4 and 10-11), a 40 ms catch window
        // (2 bins) after each.
        let mut cued = vec![false; 20];
        cued[2..5].fill(true);
        cued[10..12].fill(true);
        let mut clicks = vec![false; 20];
        clicks[6] = true; // within 2 bins after the first cue: caught, 80 ms
        clicks[15] = true; // outside every window: false
        let p: Vec<f64> = cued.iter().map(|&c| if c { 0.9 } else { 0.1 }).collect();
        let s = score_clicks(&p, &clicks, &cued, 20.0, 40.0);
        assert_eq!((s.cues, s.caught), (2, 1));
        assert_eq!(s.median_latency_ms, Some(80.0));
        // One false click in 20 bins of 20 ms = 0.4 s: 150 a minute.
        assert!((s.false_per_minute - 150.0).abs() < 1e-9);
        assert_eq!(s.auc, 1.0);
        // Ties count half: a constant score is chance.
        assert_eq!(roc_auc(&[0.5; 20], &cued), 0.5);
    }
}
