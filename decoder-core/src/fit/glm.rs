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

fn poisson_deviance(y: &[f64], mu: &[f64]) -> f64 {
    2.0 * y
        .iter()
        .zip(mu)
        .map(|(&y, &m)| {
            let term = if y > 0.0 { y * (y / m).ln() } else { 0.0 };
            term - (y - m)
        })
        .sum::<f64>()
}

/// Fits log E(y) = b0 + X·β by penalised IRLS. `x` is `n × p` without the
/// intercept column.
pub fn fit_poisson(x: &Mat, y: &[f64], options: &GlmFitOptions) -> Result<GlmFit, GlmError> {
    let n = x.rows;
    if y.len() != n {
        return Err(GlmError::Shape {
            rows: n,
            counts: y.len(),
        });
    }
    let total: f64 = y.iter().sum();
    if total <= 0.0 {
        return Err(GlmError::NeverFires);
    }
    let p = x.cols + 1;
    let mean = total / n as f64;
    let null_deviance = poisson_deviance(y, &vec![mean; n]);
    let mut beta = vec![0.0; p];
    beta[0] = mean.ln();
    let mut eta = vec![0.0; n];
    let mut mu = vec![0.0; n];
    let mut clamped = 0;
    let predict = |beta: &[f64], eta: &mut [f64], mu: &mut [f64]| -> usize {
        let mut clamped = 0;
        for i in 0..n {
            let mut e = beta[0];
            for (b, v) in beta[1..].iter().zip(x.row(i)) {
                e += b * v;
            }
            if e.abs() > ETA_LIMIT {
                clamped += 1;
                e = e.clamp(-ETA_LIMIT, ETA_LIMIT);
            }
            eta[i] = e;
            mu[i] = e.exp();
        }
        clamped
    };
    predict(&beta, &mut eta, &mut mu);
    let mut deviance = poisson_deviance(y, &mu);
    let mut converged = false;
    let mut iterations = 0;
    let mut xtwx = vec![0.0; p * p];
    let mut xtwz = vec![0.0; p];
    let mut row = vec![0.0; p];
    for iter in 1..=options.max_iterations {
        iterations = iter;
        xtwx.fill(0.0);
        xtwz.fill(0.0);
        for i in 0..n {
            // Working weight μ and working response z = η + (y − μ)/μ.
            let w = mu[i];
            let z = eta[i] + (y[i] - mu[i]) / mu[i];
            row[0] = 1.0;
            row[1..].copy_from_slice(x.row(i));
            for a in 0..p {
                let wa = w * row[a];
                xtwz[a] += wa * z;
                let out = &mut xtwx[a * p..a * p + a + 1];
                for (o, rb) in out.iter_mut().zip(&row[..=a]) {
                    *o += wa * rb;
                }
            }
        }
        let mut m = DMatrix::<f64>::zeros(p, p);
        for a in 0..p {
            for b in 0..=a {
                m[(a, b)] = xtwx[a * p + b];
                m[(b, a)] = xtwx[a * p + b];
            }
            if a > 0 {
                m[(a, a)] += options.ridge;
            }
        }
        let rhs = DVector::from_column_slice(&xtwz);
        let solved = match m.clone().cholesky() {
            Some(c) => c.solve(&rhs),
            None => m.lu().solve(&rhs).ok_or(GlmError::Singular)?,
        };
        if !solved.iter().all(|v| v.is_finite()) {
            return Err(GlmError::Singular);
        }
        beta.copy_from_slice(solved.as_slice());
        clamped = predict(&beta, &mut eta, &mut mu);
        let new_deviance = poisson_deviance(y, &mu);
        let change = (new_deviance - deviance).abs() / (new_deviance.abs() + 0.1);
        deviance = new_deviance;
        if change < options.tolerance {
            converged = true;
            break;
        }
    }
    Ok(GlmFit {
        coefficients: beta,
        deviance,
        null_deviance,
        iterations,
        converged,
        clamped,
    })
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
