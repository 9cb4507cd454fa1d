//! Poisson GLM encoding models, one per channel: log of the expected count
//! in a bin = b0 + βᵀx (log-linear tuning to the state: the LNP model with an
//! exponential nonlinearity, Truccolo et al. 2005) + history terms over the
//! channel's own past counts through a raised-cosine basis (Pillow et al.
//! 2008) + optional coupling terms from other channels' last bins.
//!
//! Fitting is IRLS (Newton's method for the canonical log link) with a
//! ridge penalty on everything but the intercept. It stops when the
//! deviance changes by less than `tolerance` relative to itself (the rule
//! statsmodels uses, so the two agree at convergence), reports the
//! deviance, the null deviance and the iterations, and says when it did not
//! converge — the caller reports such channels rather than keeping them
//! silently. The linear predictor is clamped at ±`ETA_LIMIT` during fitting
//! so exp() cannot overflow; every clamp is counted.

use nalgebra::{DMatrix, DVector};
use serde::{Deserialize, Serialize};

use crate::decoders::history_basis::ETA_LIMIT;
use crate::linalg::Mat;

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct GlmFitOptions {
    /// Ridge penalty λ on all coefficients but the intercept; 0 for none.
    pub ridge: f64,
    pub max_iterations: usize,
    /// Relative change of deviance at which IRLS stops.
    pub tolerance: f64,
}

impl Default for GlmFitOptions {
    fn default() -> Self {
        GlmFitOptions {
            ridge: 0.0,
            max_iterations: 100,
            tolerance: 1e-8,
        }
    }
}

/// One channel's fit.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct GlmFit {
    /// Intercept first, then one coefficient per design column.
    pub coefficients: Vec<f64>,
    pub deviance: f64,
    /// Deviance of the intercept-only model.
    pub null_deviance: f64,
    pub iterations: usize,
    pub converged: bool,
    /// Times η was clamped at ±ETA_LIMIT in the final iteration.
    pub clamped: usize,
}

#[derive(Debug, thiserror::Error, PartialEq)]
pub enum GlmError {
    #[error("the design has {rows} rows but there are {counts} counts")]
    Shape { rows: usize, counts: usize },
    #[error("the channel never fires in the training bins")]
    NeverFires,
    #[error(
        "the normal equations are singular (a design column is constant or repeated); add a ridge penalty"
    )]
    Singular,
}

/// The designs of many Poisson GLMs fitted side by side (one per channel),
/// offered as passes over their rows so that no design is ever held whole:
/// a pass visits every row once, in order, and gives each fit still
/// running its row.
pub trait GlmDesigns {
    /// Number of fits.
    fn fits(&self) -> usize;
    /// Design columns of every fit, without the intercept.
    fn columns(&self) -> usize;
    /// One pass: `row(fit, x, y)` for every row, for each fit with
    /// `active[fit]`; each fit's rows in order (fits may interleave).
    fn pass(
        &self,
        active: &[bool],
        row: &mut dyn FnMut(usize, &[f64], f64),
    ) -> Result<(), crate::fit::TrainError>;
}

/// One in-memory design.
struct OneDesign<'a> {
    x: &'a Mat,
    y: &'a [f64],
}

impl GlmDesigns for OneDesign<'_> {
    fn fits(&self) -> usize {
        1
    }
    fn columns(&self) -> usize {
        self.x.cols
    }
    fn pass(
        &self,
        _active: &[bool],
        row: &mut dyn FnMut(usize, &[f64], f64),
    ) -> Result<(), crate::fit::TrainError> {
        for (i, &y) in self.y.iter().enumerate() {
            row(0, self.x.row(i), y);
        }
        Ok(())
    }
}

/// Fits log E(y) = b0 + X·β by penalised IRLS. `x` is `n × p` without the
/// intercept column.
pub fn fit_poisson(x: &Mat, y: &[f64], options: &GlmFitOptions) -> Result<GlmFit, GlmError> {
    if y.len() != x.rows {
        return Err(GlmError::Shape {
            rows: x.rows,
            counts: y.len(),
        });
    }
    fit_poisson_many(&OneDesign { x, y }, options)
        .expect("an in-memory design reads without error")
        .pop()
        .expect("one fit")
}

/// One fit's running state.
struct Running {
    beta: Vec<f64>,
    /// Σ y over the rows, and the rows.
    total: f64,
    rows: f64,
    /// Deviance of the intercept-only model (the half-sum, ×2 when read).
    null_deviance: f64,
    /// Deviance of the current β (the half-sum, ×2 when read).
    half_deviance: f64,
    previous: Option<f64>,
    clamped: usize,
    iterations: usize,
    xtwx: Vec<f64>,
    xtwz: Vec<f64>,
    done: Option<Result<GlmFit, GlmError>>,
}

/// Fits every design of `designs` by penalised IRLS, all in the same
/// passes: pass k gives each running fit its deviance at βₖ and the
/// weighted normal equations for βₖ₊₁, so a fit of i iterations costs
/// i + 2 passes (one for the totals) and memory is p² per fit. Each fit
/// follows [`fit_poisson`]'s rule exactly: it stops when the deviance
/// changes by less than `tolerance` relative to itself, or after
/// `max_iterations` solves.
pub fn fit_poisson_many(
    designs: &dyn GlmDesigns,
    options: &GlmFitOptions,
) -> Result<Vec<Result<GlmFit, GlmError>>, crate::fit::TrainError> {
    let m = designs.fits();
    let p = designs.columns() + 1;
    let mut fits: Vec<Running> = (0..m)
        .map(|_| Running {
            beta: vec![0.0; p],
            total: 0.0,
            rows: 0.0,
            null_deviance: 0.0,
            half_deviance: 0.0,
            previous: None,
            clamped: 0,
            iterations: 0,
            xtwx: vec![0.0; p * p],
            xtwz: vec![0.0; p],
            done: None,
        })
        .collect();
    let mut active = vec![true; m];
    designs.pass(&active, &mut |f, _, y| {
        fits[f].total += y;
        fits[f].rows += 1.0;
    })?;
    for (f, fit) in fits.iter_mut().enumerate() {
        if fit.total <= 0.0 {
            fit.done = Some(Err(GlmError::NeverFires));
            active[f] = false;
        } else {
            fit.beta[0] = (fit.total / fit.rows).ln();
        }
    }
    let mut first = true;
    while active.iter().any(|a| *a) {
        for fit in fits.iter_mut() {
            fit.half_deviance = 0.0;
            fit.clamped = 0;
            fit.xtwx.fill(0.0);
            fit.xtwz.fill(0.0);
        }
        designs.pass(&active, &mut |f, x, y| {
            let fit = &mut fits[f];
            if first {
                // The intercept-only model: the mean count.
                let mean = fit.total / fit.rows;
                let term = if y > 0.0 { y * (y / mean).ln() } else { 0.0 };
                fit.null_deviance += term - (y - mean);
            }
            let mut e = fit.beta[0];
            for (b, v) in fit.beta[1..].iter().zip(x) {
                e += b * v;
            }
            if e.abs() > ETA_LIMIT {
                fit.clamped += 1;
                e = e.clamp(-ETA_LIMIT, ETA_LIMIT);
            }
            let mu = e.exp();
            let term = if y > 0.0 { y * (y / mu).ln() } else { 0.0 };
            fit.half_deviance += term - (y - mu);
            // Working weight μ and working response z = η + (y − μ)/μ;
            // the row is (1, x), the intercept's products written out.
            let z = e + (y - mu) / mu;
            fit.xtwz[0] += mu * z;
            fit.xtwx[0] += mu;
            for a in 1..p {
                let wa = mu * x[a - 1];
                fit.xtwz[a] += wa * z;
                let out = &mut fit.xtwx[a * p..a * p + a + 1];
                out[0] += wa;
                for (o, rb) in out[1..].iter_mut().zip(&x[..a]) {
                    *o += wa * rb;
                }
            }
        })?;
        first = false;
        for (f, fit) in fits.iter_mut().enumerate() {
            if !active[f] {
                continue;
            }
            let deviance = 2.0 * fit.half_deviance;
            let converged = fit.previous.is_some_and(|prev| {
                (deviance - prev).abs() / (deviance.abs() + 0.1) < options.tolerance
            });
            if converged || fit.iterations >= options.max_iterations {
                fit.done = Some(Ok(GlmFit {
                    coefficients: fit.beta.clone(),
                    deviance,
                    null_deviance: 2.0 * fit.null_deviance,
                    iterations: fit.iterations,
                    converged,
                    clamped: fit.clamped,
                }));
                active[f] = false;
                continue;
            }
            match solve_normal_equations(&fit.xtwx, &fit.xtwz, p, options.ridge) {
                Some(beta) => fit.beta = beta,
                None => {
                    fit.done = Some(Err(GlmError::Singular));
                    active[f] = false;
                    continue;
                }
            }
            fit.iterations += 1;
            fit.previous = Some(deviance);
        }
    }
    Ok(fits
        .into_iter()
        .map(|f| f.done.expect("every fit ends"))
        .collect())
}

/// Solves (XᵀWX + λR) β = XᵀWz from the lower triangle of XᵀWX, R the
/// identity but for the intercept; `None` when singular or not finite.
fn solve_normal_equations(xtwx: &[f64], xtwz: &[f64], p: usize, ridge: f64) -> Option<Vec<f64>> {
    let mut m = DMatrix::<f64>::zeros(p, p);
    for a in 0..p {
        for b in 0..=a {
            m[(a, b)] = xtwx[a * p + b];
            m[(b, a)] = xtwx[a * p + b];
        }
        if a > 0 {
            m[(a, a)] += ridge;
        }
    }
    let rhs = DVector::from_column_slice(xtwz);
    let solved = match m.clone().cholesky() {
        Some(c) => c.solve(&rhs),
        None => m.lu().solve(&rhs)?,
    };
    solved
        .iter()
        .all(|v| v.is_finite())
        .then(|| solved.as_slice().to_vec())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn recovers_known_coefficients() {
        // y ~ Poisson(exp(0.5 + 0.8 x)) with a deterministic x and the
        // expected counts themselves as data: the fit is exact.
        let n = 400;
        let mut x = Mat::zeros(n, 1);
        let mut y = vec![0.0; n];
        for (i, yi) in y.iter_mut().enumerate() {
            let v = (i as f64 / 40.0).sin();
            x.set(i, 0, v);
            *yi = (0.5 + 0.8 * v).exp();
        }
        let fit = fit_poisson(&x, &y, &GlmFitOptions::default()).unwrap();
        assert!(fit.converged);
        assert!((fit.coefficients[0] - 0.5).abs() < 1e-8, "{fit:?}");
        assert!((fit.coefficients[1] - 0.8).abs() < 1e-8, "{fit:?}");
        assert!(fit.deviance < 1e-10);
    }

    #[test]
    fn a_silent_channel_is_an_error_not_a_fit() {
        let x = Mat::zeros(10, 1);
        assert_eq!(
            fit_poisson(&x, &[0.0; 10], &GlmFitOptions::default()),
            Err(GlmError::NeverFires)
        );
    }
}
