//! Closed-loop decoder adaptation between and during blocks, in the
//! SmoothBatch form (Orsborn et al. 2012; see also Dangi et al. 2013).
//!
//! While the participant drives the cursor, each batch of bins (a few
//! seconds) is labelled with the velocity the participant intended —
//! the decoded velocity turned toward the target, zero inside it
//! (intention re-estimation, Gilja et al. 2012) — and the observation
//! model is refitted on that batch alone: the Kalman filter's H and Q, or
//! each point-process channel's tuning (b0 and β, by Poisson IRLS with
//! its spike-history and coupling terms held as an offset). The running
//! model moves toward the batch fit by a fixed fraction per batch, so old
//! batches fade with a half-life rather than being forgotten at once:
//! `H ← α·H + (1 − α)·H_batch` with `α = 0.5^(batch / half-life)`, and the
//! same for Q (or b0, β). The state model (A, W) is the calibration's and
//! stays.
//!
//! Every update is checked before it may run: finite, Q positive definite,
//! the change per update within a limit (a larger step is cut to the
//! limit), and the filter stable (the steady-state closed loop
//! `(I − K H) A` has spectral radius below one). A batch with too few
//! usable bins is skipped. This module is pure: the daemon collects the
//! batch on its real-time thread and runs this on another.

use nalgebra::DMatrix;

use crate::decoders::history_basis::ETA_LIMIT;
use crate::decoders::kalman::model::{KalmanModel, ObservationNoise};
use crate::decoders::kalman::steady::{
    DEFAULT_MAX_ITERATIONS, DEFAULT_TOLERANCE, steady_state_gain,
};
use crate::decoders::point_process::PointProcessModel;
use crate::linalg::{self, Mat};
use crate::wire::task_packet::MAX_TASK_DIMS;

/// One decoded bin of a batch: what the participant saw and what was
/// decoded from the bin's counts. Every decoded bin is a row (the
/// point-process fit needs the spike history); only `usable` rows are
/// fitted.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct BatchRow {
    pub seq: u64,
    /// Armed, closed loop, a valid target, reach or hold.
    pub usable: bool,
    pub dims: u8,
    pub cursor: [f64; MAX_TASK_DIMS],
    pub target: [f64; MAX_TASK_DIMS],
    pub radius: f64,
    /// The decoded velocity (the model's outputs, in order).
    pub decoded: [f64; MAX_TASK_DIMS],
}

/// A batch: `rows.len()` decoded bins in seq order and their counts, out
/// of `slots` slots answered while it was collected.
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

    pub fn usable_rows(&self) -> usize {
        self.rows.iter().filter(|r| r.usable).count()
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
    /// Spectral radius of the steady-state closed loop after the update
    /// (Kalman filter only).
    pub spectral_radius: Option<f64>,
    pub keep: f64,
}

impl AdaptReport {
    fn of(
        batch: &Batch,
        used: &[usize],
        relative_change: f64,
        limited: bool,
        spectral_radius: Option<f64>,
        keep: f64,
    ) -> AdaptReport {
        AdaptReport {
            rows: used.len(),
            slots: batch.slots,
            first_seq: batch.rows[used[0]].seq,
            last_seq: batch.rows[used[used.len() - 1]].seq,
            relative_change,
            limited,
            spectral_radius,
            keep,
        }
    }
}

/// The intended velocity of a row: the decoded velocity's speed toward
/// the target, zero inside it.
pub fn intended_velocity(row: &BatchRow) -> [f64; MAX_TASK_DIMS] {
    let d = usize::from(row.dims);
    let mut to = [0.0; MAX_TASK_DIMS];
    for (i, t) in to.iter_mut().enumerate().take(d) {
        *t = row.target[i] - row.cursor[i];
    }
    let dist = norm(&to[..d]);
    let speed = norm(&row.decoded[..d]);
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

fn sources(state: &[String]) -> Result<Vec<Source>, AdaptSkip> {
    let axis = |a: &str| match a {
        "x" => Some(0),
        "y" => Some(1),
        "z" => Some(2),
        other => other.parse::<usize>().ok().and_then(|n| n.checked_sub(1)),
    };
    state
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

/// Checks that a model with this state can be adapted at all (its state
/// is made of positions, velocities and the constant).
pub fn check_adaptable(state: &[String]) -> Result<(), AdaptSkip> {
    sources(state).map(|_| ())
}

/// Euclidean length.
fn norm(v: &[f64]) -> f64 {
    v.iter().map(|x| x * x).sum::<f64>().sqrt()
}

/// The slowest speed a batch labels: the median intended speed of its
/// usable rows outside the target (0 when there are none). Near a target
/// the running decoder is slow while the user still intends to move; those
/// bins, labelled with their own decoded speed, teach the refit that full
/// modulation means slow movement, so each update decodes slower near
/// targets until the cursor creeps to the rim and cannot hold inside. A
/// floor at the batch's typical speed breaks that loop; direction still
/// comes from the target alone.
pub fn speed_floor(batch: &Batch, used: &[usize]) -> f64 {
    let mut speeds: Vec<f64> = used
        .iter()
        .map(|&r| norm(&intended_velocity(&batch.rows[r])))
        .filter(|s| *s > 0.0)
        .collect();
    if speeds.is_empty() {
        return 0.0;
    }
    speeds.sort_by(f64::total_cmp);
    speeds[speeds.len() / 2]
}

/// The velocity a row is labelled with: [`intended_velocity`], its speed
/// raised to `floor` when it is slower (zero inside the target stays zero).
pub fn labelled_velocity(row: &BatchRow, floor: f64) -> [f64; MAX_TASK_DIMS] {
    let mut v = intended_velocity(row);
    let speed = norm(&v);
    if speed > 0.0 && speed < floor {
        for x in &mut v {
            *x *= floor / speed;
        }
    }
    v
}

/// The intended state of a row.
fn intended_state(row: &BatchRow, src: &[Source], floor: f64, out: &mut [f64]) {
    let v = labelled_velocity(row, floor);
    for (o, s) in out.iter_mut().zip(src) {
        *o = match *s {
            Source::Pos(i) => row.cursor[i],
            Source::Vel(i) => v[i],
            Source::Constant => 1.0,
        };
    }
}

fn enough(batch: &Batch, options: &AdaptOptions, params: usize) -> Result<(), AdaptSkip> {
    let usable = batch.usable_rows();
    let needed =
        ((options.min_usable_fraction * batch.slots as f64).ceil() as usize).max(params + 2);
    if usable < needed {
        return Err(AdaptSkip::TooFewBins {
            usable,
            slots: batch.slots,
            needed,
        });
    }
    Ok(())
}

/// One SmoothBatch update of `model`'s observation model from `batch`.
pub fn adapt_kalman(
    model: &KalmanModel,
    batch: &Batch,
    options: &AdaptOptions,
) -> Result<(KalmanModel, AdaptReport), AdaptSkip> {
    let src = sources(&model.state)?;
    let (d, n) = (model.state_dim(), model.n_channels());
    enough(batch, options, d)?;
    let used: Vec<usize> = (0..batch.rows.len())
        .filter(|r| batch.rows[*r].usable)
        .collect();
    let t = used.len();
    // Design: the intended state of each row; targets: normalised counts
    // in the running model's units.
    let mut x = DMatrix::<f64>::zeros(t, d);
    let mut state = vec![0.0; d];
    let floor = speed_floor(batch, &used);
    for (r, &row) in used.iter().enumerate() {
        intended_state(&batch.rows[row], &src, floor, &mut state);
        for (c, v) in state.iter().enumerate() {
            x[(r, c)] = *v;
        }
    }
    let mut y = DMatrix::<f64>::zeros(t, n);
    for (r, &row) in used.iter().enumerate() {
        for ch in 0..n {
            let c = f64::from(batch.counts[row * n + ch]);
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
    let report = AdaptReport::of(batch, &used, change * step, limited, Some(radius), keep);
    Ok((adapted, report))
}

/// One SmoothBatch update of a point-process model's tuning: per channel,
/// b0 and β refitted by Poisson IRLS on the batch's intended states, with
/// the channel's spike-history and coupling terms (from the batch's own
/// counts; a bin that never came counts zero, as in the filter) held as an
/// offset, then blended and limited as for the Kalman filter.
pub fn adapt_point_process(
    model: &PointProcessModel,
    batch: &Batch,
    options: &AdaptOptions,
) -> Result<(PointProcessModel, AdaptReport), AdaptSkip> {
    let src = sources(&model.state)?;
    let (d, n) = (model.state.len(), model.n_channels());
    enough(batch, options, d + 1)?;
    let span = model.history_basis.as_ref().map_or(0, |b| b.span_bins);
    let coupled = model
        .channels
        .iter()
        .flatten()
        .any(|c| !c.coupling.is_empty());
    let back = span.max(usize::from(coupled)) as u64;
    let first = batch.rows[0].seq;
    let last = batch.rows[batch.rows.len() - 1].seq;
    // Row of each seq in the batch (None: the bin never came).
    let mut row_of = vec![None; (last - first + 1) as usize];
    for (r, row) in batch.rows.iter().enumerate() {
        row_of[(row.seq - first) as usize] = Some(r);
    }
    let count = |seq: u64, ch: usize| -> f64 {
        row_of[(seq - first) as usize].map_or(0.0, |r| f64::from(batch.counts[r * n + ch]))
    };
    // Rows fitted: usable, with their whole history inside the batch.
    let used: Vec<usize> = (0..batch.rows.len())
        .filter(|&r| batch.rows[r].usable && batch.rows[r].seq - first >= back)
        .collect();
    if used.len() < d + 3 {
        return Err(AdaptSkip::TooFewBins {
            usable: used.len(),
            slots: batch.slots,
            needed: d + 3,
        });
    }
    let p = d + 1;
    let t = used.len();
    let mut x = DMatrix::<f64>::zeros(t, p);
    let mut state = vec![0.0; d];
    let floor = speed_floor(batch, &used);
    for (i, &r) in used.iter().enumerate() {
        intended_state(&batch.rows[r], &src, floor, &mut state);
        x[(i, 0)] = 1.0;
        for (c, v) in state.iter().enumerate() {
            x[(i, 1 + c)] = *v;
        }
    }
    let keep = options.keep();
    let mut adapted = model.clone();
    let (mut old_norm, mut diff) = (0.0f64, Vec::new());
    for (ch, glm) in model.channels.iter().enumerate() {
        let Some(glm) = glm else { continue };
        let theta_old: Vec<f64> = std::iter::once(glm.b0)
            .chain(glm.beta.iter().copied())
            .collect();
        old_norm += theta_old.iter().map(|v| v * v).sum::<f64>();
        let y: Vec<f64> = used
            .iter()
            .map(|&r| f64::from(batch.counts[r * n + ch]))
            .collect();
        if y.iter().all(|v| *v == 0.0) {
            // Silent in this batch: its tuning stays.
            diff.push((ch, vec![0.0; p]));
            continue;
        }
        let kernel: Vec<f64> = match &model.history_basis {
            Some(b) => (0..span)
                .map(|lag0| {
                    glm.history
                        .iter()
                        .enumerate()
                        .map(|(j, h)| h * b.weights.get(j, lag0))
                        .sum()
                })
                .collect(),
            None => Vec::new(),
        };
        let offset: Vec<f64> = used
            .iter()
            .map(|&r| {
                let seq = batch.rows[r].seq;
                let mut o = 0.0;
                for (lag0, k) in kernel.iter().enumerate() {
                    o += k * count(seq - 1 - lag0 as u64, ch);
                }
                for (j, g) in glm.coupling.iter().enumerate() {
                    o += g * count(seq - 1, j);
                }
                o
            })
            .collect();
        let theta = poisson_with_offset(&x, &y, &offset, &theta_old, options.ridge)
            .map_err(|e| AdaptSkip::Fit(format!("channel {ch}: {e}")))?;
        let target: Vec<f64> = theta_old
            .iter()
            .zip(&theta)
            .map(|(o, b)| keep * o + (1.0 - keep) * b)
            .collect();
        diff.push((
            ch,
            target.iter().zip(&theta_old).map(|(t, o)| t - o).collect(),
        ));
    }
    let old_norm = old_norm.sqrt().max(f64::MIN_POSITIVE);
    let change = diff
        .iter()
        .flat_map(|(_, d)| d.iter().map(|v| v * v))
        .sum::<f64>()
        .sqrt()
        / old_norm;
    let limited = change > options.max_relative_change;
    let step = if limited {
        options.max_relative_change / change
    } else {
        1.0
    };
    for (ch, delta) in &diff {
        if let Some(glm) = adapted.channels[*ch].as_mut() {
            glm.b0 += step * delta[0];
            for (b, dv) in glm.beta.iter_mut().zip(&delta[1..]) {
                *b += step * dv;
            }
        }
    }
    adapted
        .validate()
        .map_err(|e| AdaptSkip::Refused(e.to_string()))?;
    let report = AdaptReport::of(batch, &used, change * step, limited, None, keep);
    Ok((adapted, report))
}

/// Poisson regression of `y` on `x` with a fixed `offset` by Newton's
/// method (IRLS), a ridge on every coefficient but the first, started at
/// `start`; converged when no coefficient moves by 1e-9.
pub fn poisson_with_offset(
    x: &DMatrix<f64>,
    y: &[f64],
    offset: &[f64],
    start: &[f64],
    ridge: f64,
) -> Result<Vec<f64>, String> {
    let (t, p) = x.shape();
    let mut theta = nalgebra::DVector::from_column_slice(start);
    for _ in 0..50 {
        let mut grad = nalgebra::DVector::<f64>::zeros(p);
        let mut hess = DMatrix::<f64>::zeros(p, p);
        for r in 0..t {
            let row = x.row(r);
            let eta = (row.dot(&theta.transpose()) + offset[r]).clamp(-ETA_LIMIT, ETA_LIMIT);
            let mu = eta.exp();
            let resid = y[r] - mu;
            for i in 0..p {
                grad[i] += row[i] * resid;
                for j in 0..=i {
                    hess[(i, j)] += mu * row[i] * row[j];
                }
            }
        }
        for i in 0..p {
            for j in 0..i {
                hess[(j, i)] = hess[(i, j)];
            }
            if i > 0 {
                grad[i] -= ridge * theta[i];
                hess[(i, i)] += ridge;
            }
        }
        let delta = nalgebra::Cholesky::new(hess)
            .ok_or("the information matrix is singular")?
            .solve(&grad);
        theta += &delta;
        if !theta.iter().all(|v| v.is_finite()) {
            return Err("the fit diverged".into());
        }
        if delta.amax() < 1e-9 {
            return Ok(theta.iter().copied().collect());
        }
    }
    Err("IRLS did not converge in 50 iterations".into())
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
            usable: true,
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
    fn a_slow_row_is_labelled_at_the_batch_median_speed() {
        let rows = vec![
            row([0.0, 0.0], [10.0, 0.0], [0.0, 8.0]),  // 8 toward +x
            row([0.0, 0.0], [0.0, 10.0], [6.0, 0.0]),  // 6 toward +y
            row([7.0, 0.0], [10.0, 0.0], [0.0, -1.0]), // 1, near the target
            row([9.5, 0.0], [10.0, 0.0], [3.0, 4.0]),  // inside: zero
        ];
        let batch = Batch {
            rows,
            ..Default::default()
        };
        let used = [0, 1, 2, 3];
        // Nonzero speeds 1, 6, 8: the median is 6.
        assert_eq!(speed_floor(&batch, &used), 6.0);
        assert_eq!(&labelled_velocity(&batch.rows[2], 6.0)[..2], &[6.0, 0.0]);
        assert_eq!(&labelled_velocity(&batch.rows[0], 6.0)[..2], &[8.0, 0.0]);
        assert_eq!(&labelled_velocity(&batch.rows[3], 6.0)[..2], &[0.0, 0.0]);
        assert_eq!(speed_floor(&Batch::default(), &[]), 0.0);
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
