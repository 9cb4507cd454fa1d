//! Closed-loop decoder adaptation between and during blocks, in the
//! SmoothBatch form (Orsborn et al. 2012; see also Dangi et al. 2013).
//!
//! While the participant drives the cursor, each batch of bins (a few
//! seconds) is labelled with the velocity the participant intended —
//! the decoded velocity turned toward the target, zero inside it
//! (intention re-estimation, Gilja et al. 2012) — and the Kalman filter's
//! observation model (H, Q) is refitted on that batch alone. The running
//! model moves toward the batch fit by a fixed fraction per batch, so old
//! batches fade with a half-life rather than being forgotten at once:
//! `H ← α·H + (1 − α)·H_batch` with `α = 0.5^(batch / half-life)`, and the
//! same for Q. The state model (A, W) is the calibration's and stays.
//!
//! Every update is checked before it may run: finite, Q positive definite,
//! the change per update within a limit (a larger step is cut to the
//! limit), and the filter stable (the steady-state closed loop
//! `(I − K H) A` has spectral radius below one). A batch with too few
//! usable bins is skipped. This module is pure: the daemon collects the
//! batch on its real-time thread and runs this on another.

use nalgebra::DMatrix;

use crate::decoders::kalman::model::{KalmanModel, ObservationNoise};
use crate::decoders::kalman::steady::{
    DEFAULT_MAX_ITERATIONS, DEFAULT_TOLERANCE, steady_state_gain,
};
use crate::formats::task_packet::MAX_TASK_DIMS;
use crate::linalg::{self, Mat};

/// One usable bin of a batch: what the participant saw and what was
/// decoded from the bin's counts.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct BatchRow {
    pub seq: u64,
    pub dims: u8,
    pub cursor: [f64; MAX_TASK_DIMS],
    pub target: [f64; MAX_TASK_DIMS],
    pub radius: f64,
    /// The decoded velocity (the model's outputs, in order).
    pub decoded: [f64; MAX_TASK_DIMS],
}

/// A batch: `rows.len()` usable bins and their counts, out of `slots`
/// slots answered while it was collected.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Batch {
    pub n_channels: usize,
    /// `rows.len() × n_channels`.
    pub counts: Vec<u16>,
    pub rows: Vec<BatchRow>,
    pub slots: usize,
}

impl Batch {
    /// An empty batch with room for `bins` rows (allocated once).
    pub fn with_capacity(n_channels: usize, bins: usize) -> Batch {
        Batch {
            n_channels,
            counts: Vec::with_capacity(n_channels * bins),
            rows: Vec::with_capacity(bins),
            slots: 0,
        }
    }

    pub fn clear(&mut self) {
        self.counts.clear();
        self.rows.clear();
        self.slots = 0;
    }
}

/// How adaptation blends and what it allows.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct AdaptOptions {
    /// Batch length in seconds of bins.
    pub batch_s: f64,
    /// Half-life of a batch's weight in the running model, seconds.
    pub half_life_s: f64,
    /// A batch with fewer usable bins than this fraction of its slots is
    /// skipped.
    pub min_usable_fraction: f64,
    /// Largest change of H per update, relative to ‖H‖ (Frobenius); a
    /// larger step is cut to it.
    pub max_relative_change: f64,
    /// Ridge penalty of the batch fit (not on the constant).
    pub ridge: f64,
}

impl Default for AdaptOptions {
    fn default() -> Self {
        AdaptOptions {
            batch_s: 10.0,
            half_life_s: 60.0,
            min_usable_fraction: 0.5,
            max_relative_change: 0.25,
            ridge: 1.0,
        }
    }
}

impl AdaptOptions {
    /// The running model's weight per batch, `0.5^(batch / half-life)`.
    pub fn keep(&self) -> f64 {
        0.5f64.powf(self.batch_s / self.half_life_s)
    }
}

/// Why a batch did not become an update.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum AdaptSkip {
    #[error("{usable} usable bins of {slots} slots, fewer than the {needed} needed")]
    TooFewBins {
        usable: usize,
        slots: usize,
        needed: usize,
    },
    #[error(
        "state component {name:?} cannot be re-estimated (only pos_*, vel_* and the constant 1)"
    )]
    UnsupportedState { name: String },
    #[error("the batch fit failed: {0}")]
    Fit(String),
    #[error("the update was refused: {0}")]
    Refused(String),
}

/// What one update did.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct AdaptReport {
    pub rows: usize,
    pub slots: usize,
    pub first_seq: u64,
    pub last_seq: u64,
    /// ‖H_new − H_old‖ / ‖H_old‖.
    pub relative_change: f64,
    /// The step was cut to `max_relative_change`.
    pub limited: bool,
    /// Spectral radius of the steady-state closed loop after the update.
    pub spectral_radius: f64,
    pub keep: f64,
}

/// The intended velocity of a row: the decoded velocity's speed toward
/// the target, zero inside it.
pub fn intended_velocity(row: &BatchRow) -> [f64; MAX_TASK_DIMS] {
    let d = usize::from(row.dims);
    let mut to = [0.0; MAX_TASK_DIMS];
    for (i, t) in to.iter_mut().enumerate().take(d) {
        *t = row.target[i] - row.cursor[i];
    }
    let dist = to[..d].iter().map(|v| v * v).sum::<f64>().sqrt();
    let speed = row.decoded[..d].iter().map(|v| v * v).sum::<f64>().sqrt();
    let mut out = [0.0; MAX_TASK_DIMS];
    if dist > row.radius && dist > 0.0 {
        for (o, t) in out.iter_mut().zip(&to).take(d) {
            *o = t / dist * speed;
        }
    }
    out
}

/// Where state component `name` comes from in a row.
enum Source {
    Pos(usize),
    Vel(usize),
    Constant,
}

fn sources(model: &KalmanModel) -> Result<Vec<Source>, AdaptSkip> {
    let axis = |a: &str| match a {
        "x" => Some(0),
        "y" => Some(1),
        "z" => Some(2),
        other => other.parse::<usize>().ok().and_then(|n| n.checked_sub(1)),
    };
    model
        .state
        .iter()
        .map(|name| {
            let bad = || AdaptSkip::UnsupportedState { name: name.clone() };
            if name == "1" {
                Ok(Source::Constant)
            } else if let Some(a) = name.strip_prefix("pos_") {
                axis(a)
                    .filter(|i| *i < MAX_TASK_DIMS)
                    .map(Source::Pos)
                    .ok_or_else(bad)
            } else if let Some(a) = name.strip_prefix("vel_") {
                axis(a)
                    .filter(|i| *i < MAX_TASK_DIMS)
                    .map(Source::Vel)
                    .ok_or_else(bad)
            } else {
                Err(bad())
            }
        })
        .collect()
}

/// Checks that `model` can be adapted at all (its state is made of
/// positions, velocities and the constant).
pub fn check_adaptable(model: &KalmanModel) -> Result<(), AdaptSkip> {
    sources(model).map(|_| ())
}

/// One SmoothBatch update of `model`'s observation model from `batch`.
pub fn adapt_kalman(
    model: &KalmanModel,
    batch: &Batch,
    options: &AdaptOptions,
) -> Result<(KalmanModel, AdaptReport), AdaptSkip> {
    let src = sources(model)?;
    let (d, n, t) = (model.state_dim(), model.n_channels(), batch.rows.len());
    let needed = ((options.min_usable_fraction * batch.slots as f64).ceil() as usize).max(d + 2);
    if t < needed {
        return Err(AdaptSkip::TooFewBins {
            usable: t,
            slots: batch.slots,
            needed,
        });
    }
    // Design: the intended state of each row; targets: normalised counts
    // in the running model's units.
    let mut x = DMatrix::<f64>::zeros(t, d);
    for (r, row) in batch.rows.iter().enumerate() {
        let v = intended_velocity(row);
        for (c, s) in src.iter().enumerate() {
            x[(r, c)] = match *s {
                Source::Pos(i) => row.cursor[i],
                Source::Vel(i) => v[i],
                Source::Constant => 1.0,
            };
        }
    }
    let mut y = DMatrix::<f64>::zeros(t, n);
    for r in 0..t {
        for ch in 0..n {
            let c = f64::from(batch.counts[r * n + ch]);
            y[(r, ch)] = (c - model.count_offset[ch]) / model.count_scale[ch];
        }
    }
    let mut xtx = x.transpose() * &x;
    for (c, s) in src.iter().enumerate() {
        if !matches!(s, Source::Constant) {
            xtx[(c, c)] += options.ridge;
        }
    }
    let xty = x.transpose() * &y;
    let chol = nalgebra::Cholesky::new(xtx).ok_or_else(|| {
        AdaptSkip::Fit("the batch's intended states do not span the state (no movement?)".into())
    })?;
    let h_batch = chol.solve(&xty).transpose(); // N × d
    let resid = &y - &x * h_batch.transpose();
    // A channel silent in this batch keeps its calibration rows.
    let silent: Vec<bool> = (0..n)
        .map(|ch| {
            let col = y.column(ch);
            col.iter().all(|v| *v == col[0])
        })
        .collect();

    let h_old = model.h.to_dmatrix();
    let keep = options.keep();
    let mut h_target = &h_old * keep + &h_batch * (1.0 - keep);
    for (ch, _) in silent.iter().enumerate().filter(|(_, s)| **s) {
        h_target.set_row(ch, &h_old.row(ch));
    }
    let q_old = model.q.to_full().to_dmatrix();
    let q_batch = resid.transpose() * &resid / t as f64;
    let mut q_target = &q_old * keep + &q_batch * (1.0 - keep);
    for ch in (0..n).filter(|ch| silent[*ch]) {
        for k in 0..n {
            q_target[(ch, k)] = q_old[(ch, k)];
            q_target[(k, ch)] = q_old[(k, ch)];
        }
    }
    // Limit the step.
    let norm_old = h_old.norm().max(f64::MIN_POSITIVE);
    let change = (&h_target - &h_old).norm() / norm_old;
    let limited = change > options.max_relative_change;
    let step = if limited {
        options.max_relative_change / change
    } else {
        1.0
    };
    let h_new = &h_old + (&h_target - &h_old) * step;
    let q_new = &q_old + (&q_target - &q_old) * step;

    let mut adapted = model.clone();
    adapted.h = Mat::from_dmatrix(&h_new);
    adapted.q = match &model.q {
        ObservationNoise::Full(_) => {
            let mut q = Mat::from_dmatrix(&q_new);
            linalg::symmetrize(&mut q.data, n);
            ObservationNoise::Full(q)
        }
        ObservationNoise::Diagonal(_) => {
            ObservationNoise::Diagonal((0..n).map(|i| q_new[(i, i)]).collect())
        }
    };
    if !(adapted.h.is_finite() && adapted.q.to_full().is_finite()) {
        return Err(AdaptSkip::Refused("a parameter is not finite".into()));
    }
    if !linalg::is_positive_definite(&adapted.q.to_full().data, n) {
        return Err(AdaptSkip::Refused(
            "the observation noise Q is not positive definite".into(),
        ));
    }
    adapted.steady = None;
    adapted
        .validate()
        .map_err(|e| AdaptSkip::Refused(e.to_string()))?;
    // Stability: the steady-state closed loop of the adapted filter.
    let (tol, iters) = model
        .steady
        .as_ref()
        .map_or((DEFAULT_TOLERANCE, DEFAULT_MAX_ITERATIONS), |s| {
            (s.tolerance, s.max_iterations)
        });
    let gain = steady_state_gain(&adapted, tol, iters)
        .map_err(|e| AdaptSkip::Refused(format!("no steady-state gain: {e}")))?;
    let k = gain.gain.to_dmatrix();
    // The gain acts on normalised counts; (I − K H) A.
    let closed = (DMatrix::<f64>::identity(d, d) - &k * &h_new) * model.a.to_dmatrix();
    let radius = spectral_radius_without_constant(&closed, &src);
    if radius.is_nan() || radius >= 1.0 {
        return Err(AdaptSkip::Refused(format!(
            "the adapted filter would be unstable (spectral radius {radius:.4})"
        )));
    }
    if model.steady.is_some() {
        adapted.steady = Some(gain);
    }
    let report = AdaptReport {
        rows: t,
        slots: batch.slots,
        first_seq: batch.rows[0].seq,
        last_seq: batch.rows[t - 1].seq,
        relative_change: change * step,
        limited,
        spectral_radius: radius,
        keep,
    };
    Ok((adapted, report))
}

/// Spectral radius of `m` with the constant component (which A holds at
/// one, by construction) left out.
fn spectral_radius_without_constant(m: &DMatrix<f64>, src: &[Source]) -> f64 {
    let keep: Vec<usize> = (0..src.len())
        .filter(|i| !matches!(src[*i], Source::Constant))
        .collect();
    let sub = DMatrix::from_fn(keep.len(), keep.len(), |i, j| m[(keep[i], keep[j])]);
    sub.complex_eigenvalues()
        .iter()
        .map(|z| z.norm())
        .fold(0.0, f64::max)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(cursor: [f64; 2], target: [f64; 2], decoded: [f64; 2]) -> BatchRow {
        let mut r = BatchRow {
            seq: 0,
            dims: 2,
            cursor: [0.0; MAX_TASK_DIMS],
            target: [0.0; MAX_TASK_DIMS],
            radius: 1.0,
            decoded: [0.0; MAX_TASK_DIMS],
        };
        r.cursor[..2].copy_from_slice(&cursor);
        r.target[..2].copy_from_slice(&target);
        r.decoded[..2].copy_from_slice(&decoded);
        r
    }

    #[test]
    fn intention_points_at_the_target_with_the_decoded_speed() {
        // Gilja et al. 2012: rotate toward the target, keep the speed.
        let v = intended_velocity(&row([0.0, 0.0], [10.0, 0.0], [0.0, 5.0]));
        assert_eq!(&v[..2], &[5.0, 0.0]);
        // Inside the target: zero.
        let v = intended_velocity(&row([9.5, 0.0], [10.0, 0.0], [3.0, 4.0]));
        assert_eq!(&v[..2], &[0.0, 0.0]);
    }

    #[test]
    fn the_blend_weight_halves_over_one_half_life() {
        let o = AdaptOptions {
            batch_s: 10.0,
            half_life_s: 10.0,
            ..Default::default()
        };
        assert_eq!(o.keep(), 0.5);
        let o = AdaptOptions {
            batch_s: 10.0,
            half_life_s: 60.0,
            ..Default::default()
        };
        // Six batches make one half-life.
        assert!((o.keep().powi(6) - 0.5).abs() < 1e-15);
    }
}
