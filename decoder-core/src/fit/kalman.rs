//! Fitting the Kalman decoder from a calibration block (Wu et al. 2006).
//!
//! The state model is fitted by least squares on the kinematics alone
//! (A = X₂X₁ᵀ(X₁X₁ᵀ)⁻¹, W the covariance of its residuals) and the observation
//! model by least squares of counts on the state (H = YXᵀ(XXᵀ + λR)⁻¹, Q the
//! covariance of its residuals), where R is the identity with a zero at the
//! constant component, so the baseline rates are not shrunk. All of it is
//! computed from [`KalmanStats`], sums that add over segments, gathered in
//! one pass over the block's rows (a session directory is read a chunk at
//! a time), so cross-validation folds cost one pass and a block of any
//! length the same memory.

use std::ops::Range;

use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

use crate::decoders::kalman::model::{KalmanModel, ObservationNoise};
use crate::decoders::kalman::steady::steady_state_gain;
use crate::fit::TrainError;
use crate::fit::least_squares::{CrossSums, Gram, nonzero_counts};
use crate::fit::rows::{RowWindow, each_segment_row};
use crate::formats::block_rows::{BlockInfo, BlockRows};
use crate::linalg::{self, Mat};
use crate::wire::packet::{BinKind, BinValues};

/// The name of the constant state component.
pub const CONSTANT: &str = "1";

#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum CountNormalisation {
    /// Raw counts.
    None,
    /// Subtract each channel's training mean.
    MeanCentred,
    /// Subtract the mean and divide by the standard deviation.
    ZScored,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum QForm {
    Full,
    Diagonal,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SteadyStateOptions {
    pub tolerance: f64,
    pub max_iterations: usize,
}

/// Validated options of a Kalman fit (see `config/train.toml`).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct KalmanFitOptions {
    pub state: Vec<String>,
    pub outputs: Vec<String>,
    /// Counts of bin t are paired with the kinematics of bin t + lag_bins.
    pub lag_bins: usize,
    pub ridge: f64,
    pub count_normalisation: CountNormalisation,
    pub q_form: QForm,
    /// Fix each pos_* row of A to integrate the matching vel_* over one bin.
    pub physical_coupling: bool,
    pub steady_state: Option<SteadyStateOptions>,
    /// Per-block normalisation: with several blocks trained as one, each
    /// block's counts are centred on (and, z-scored, scaled by) its own
    /// means, so every block has its own baselines; the model keeps the
    /// last block's. See [`fit_from_block_stats`].
    #[serde(default)]
    pub per_block: bool,
}

impl Default for KalmanFitOptions {
    fn default() -> Self {
        KalmanFitOptions {
            state: ["pos_x", "pos_y", "vel_x", "vel_y", CONSTANT]
                .map(String::from)
                .to_vec(),
            outputs: ["vel_x", "vel_y"].map(String::from).to_vec(),
            lag_bins: 0,
            ridge: 1.0,
            count_normalisation: CountNormalisation::None,
            q_form: QForm::Full,
            physical_coupling: false,
            steady_state: None,
            per_block: false,
        }
    }
}

/// What a fit found besides the parameters.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct KalmanFitReport {
    /// Channels silent (zero variance) in the training bins: given no weight.
    pub excluded_channels: Vec<usize>,
    pub observation_bins: u64,
    pub transition_bins: u64,
    pub steady_state_iterations: Option<usize>,
}

/// Where each state component comes from.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum StateSource {
    Column(usize),
    Constant,
}

/// Resolves state names against the block's kinematics columns.
pub fn state_sources(
    kinematic_names: &[String],
    state: &[String],
) -> Result<Vec<StateSource>, TrainError> {
    state
        .iter()
        .map(|name| {
            if name == CONSTANT {
                Ok(StateSource::Constant)
            } else {
                kinematic_names
                    .iter()
                    .position(|k| k == name)
                    .map(StateSource::Column)
                    .ok_or_else(|| TrainError::UnknownKinematic {
                        name: name.clone(),
                        available: kinematic_names.to_vec(),
                    })
            }
        })
        .collect()
}

/// The state of one bin from its row of kinematics.
pub fn fill_state(kinematics: &[f64], sources: &[StateSource], out: &mut [f64]) {
    for (o, s) in out.iter_mut().zip(sources) {
        *o = match s {
            StateSource::Column(c) => kinematics[*c],
            StateSource::Constant => 1.0,
        };
    }
}

/// Scratch space for adding rows to [`KalmanStats`] (and
/// [`crate::fit::wiener::WienerStats`]).
#[derive(Clone, Debug, Default)]
pub struct StateScratch {
    pub(crate) x: Vec<f64>,
    pub(crate) x_prev: Vec<f64>,
    pub(crate) nz: Vec<(usize, u16)>,
    /// A row of features (or lagged features) as f64.
    pub(crate) dense: Vec<f64>,
}

/// Sums over the training bins of one or more segments.
#[derive(Clone, Debug, PartialEq)]
pub struct KalmanStats {
    pub d: usize,
    pub n: usize,
    pub gram: Gram,
    /// Σ y xᵀ, N × d.
    pub syx: CrossSums,
    /// Σ x xᵀ over observation pairs, d × d.
    pub sxx: CrossSums,
    pub sx: Vec<f64>,
    /// Σ x_t x_tᵀ, Σ x_{t+1} x_tᵀ, Σ x_{t+1} x_{t+1}ᵀ over transitions.
    pub s11: CrossSums,
    pub s21: CrossSums,
    pub s22: CrossSums,
    pub n_transitions: u64,
}

impl KalmanStats {
    /// Empty sums over rows of `input` (counts or features).
    pub fn new(input: BinKind, d: usize, n: usize, q_form: QForm) -> KalmanStats {
        let gram = Gram::new(input, n, q_form == QForm::Diagonal);
        KalmanStats {
            d,
            n,
            gram,
            syx: CrossSums::new(n, d),
            sxx: CrossSums::new(d, d),
            sx: vec![0.0; d],
            s11: CrossSums::new(d, d),
            s21: CrossSums::new(d, d),
            s22: CrossSums::new(d, d),
            n_transitions: 0,
        }
    }

    /// Adds the window's newest row, `since_start` rows into its segment:
    /// the observation pair (counts `lag` rows back, state now) and the
    /// transition (state one row back, state now) when both rows lie inside
    /// the segment. Over a segment's rows in order this adds exactly the
    /// pairs of the segment, in order of time.
    pub fn add_newest(
        &mut self,
        window: &RowWindow,
        sources: &[StateSource],
        lag: usize,
        since_start: usize,
        scratch: &mut StateScratch,
    ) {
        let StateScratch {
            x,
            x_prev,
            nz,
            dense,
        } = scratch;
        x.resize(self.d, 0.0);
        x_prev.resize(self.d, 0.0);
        fill_state(window.kinematics(0), sources, x);
        if since_start >= lag {
            match (&mut self.gram, window.values(lag)) {
                (Gram::Counts(g), BinValues::Counts(c)) => {
                    nz.clear();
                    nonzero_counts(c, 0, nz);
                    g.add_sparse(nz);
                    self.syx.add_sparse_outer(nz, x);
                }
                (Gram::Values(g), values) => {
                    dense.resize(values.len(), 0.0);
                    values.to_f64(dense);
                    g.add_dense(dense);
                    self.syx.add_outer(dense, x);
                }
                (Gram::Counts(_), BinValues::Features(_)) => {
                    unreachable!("sums of counts were handed features")
                }
            }
            self.sxx.add_outer(x, x);
            for (s, v) in self.sx.iter_mut().zip(x.iter()) {
                *s += v;
            }
        }
        if since_start >= 1 {
            fill_state(window.kinematics(1), sources, x_prev);
            self.s11.add_outer(x_prev, x_prev);
            self.s21.add_outer(x, x_prev);
            self.s22.add_outer(x, x);
            self.n_transitions += 1;
        }
    }

    /// One pass over `source`: the sums of each group of segments
    /// (`groups[g]`, disjoint across groups), in one [`KalmanStats`] per
    /// group.
    pub fn gather(
        source: &dyn BlockRows,
        sources: &[StateSource],
        lag: usize,
        q_form: QForm,
        groups: &[Vec<Range<usize>>],
    ) -> Result<Vec<KalmanStats>, TrainError> {
        let info = source.info();
        let n = info.n_channels;
        let mut stats: Vec<KalmanStats> = groups
            .iter()
            .map(|_| KalmanStats::new(info.input, sources.len(), n, q_form))
            .collect();
        let mut scratch = StateScratch::default();
        each_segment_row(source, groups, lag.max(1) + 1, |g, since_start, window| {
            stats[g].add_newest(window, sources, lag, since_start, &mut scratch);
        })?;
        Ok(stats)
    }

    pub fn add_assign(&mut self, o: &KalmanStats) {
        self.gram.add_assign(&o.gram);
        for (a, b) in [
            (&mut self.syx, &o.syx),
            (&mut self.sxx, &o.sxx),
            (&mut self.s11, &o.s11),
            (&mut self.s21, &o.s21),
            (&mut self.s22, &o.s22),
        ] {
            a.add_assign(b);
        }
        for (a, b) in self.sx.iter_mut().zip(&o.sx) {
            *a += b;
        }
        self.n_transitions += o.n_transitions;
    }

    pub fn sub_assign(&mut self, o: &KalmanStats) {
        self.gram.sub_assign(&o.gram);
        for (a, b) in [
            (&mut self.syx, &o.syx),
            (&mut self.sxx, &o.sxx),
            (&mut self.s11, &o.s11),
            (&mut self.s21, &o.s21),
            (&mut self.s22, &o.s22),
        ] {
            a.sub_assign(b);
        }
        for (a, b) in self.sx.iter_mut().zip(&o.sx) {
            *a -= b;
        }
        self.n_transitions -= o.n_transitions;
    }
}

/// Checks the options against the block before any pass over it.
pub fn check_options(
    info: &BlockInfo,
    options: &KalmanFitOptions,
) -> Result<Vec<StateSource>, TrainError> {
    if !info.has_kinematics {
        return Err(TrainError::NoKinematics);
    }
    let sources = state_sources(&info.kinematic_names, &options.state)?;
    for out in &options.outputs {
        if !options.state.contains(out) {
            return Err(TrainError::Option {
                key: "kalman.outputs",
                problem: format!("{out:?} is not in kalman.state {:?}", options.state),
            });
        }
    }
    Ok(sources)
}

/// Fits on the whole block (its valid rows).
pub fn fit_kalman(
    session: &dyn BlockRows,
    options: &KalmanFitOptions,
) -> Result<(KalmanModel, KalmanFitReport), TrainError> {
    // One segment a block: no pair of bins across a block's edge.
    fit_kalman_segments(session, options, &session.info().runs())
}

/// Fits on `segments` of the block, no pair of bins crossing from one
/// segment to the next.
pub fn fit_kalman_segments(
    session: &dyn BlockRows,
    options: &KalmanFitOptions,
    segments: &[Range<usize>],
) -> Result<(KalmanModel, KalmanFitReport), TrainError> {
    let info = session.info();
    let sources = check_options(&info, options)?;
    if options.per_block {
        let blocks = KalmanStats::gather(
            session,
            &sources,
            options.lag_bins,
            options.q_form,
            &info.by_block(segments),
        )?;
        return fit_from_block_stats(&blocks, options, info.bin_width, None);
    }
    let stats = KalmanStats::gather(
        session,
        &sources,
        options.lag_bins,
        options.q_form,
        &[segments.to_vec()],
    )?
    .pop()
    .expect("one group");
    fit_from_stats(&stats, options, info.bin_width)
}

fn solve_spd(
    m: &DMatrix<f64>,
    rhs: &DMatrix<f64>,
    state: &[String],
    what: &'static str,
) -> Result<DMatrix<f64>, TrainError> {
    match nalgebra::Cholesky::new(m.clone()) {
        Some(c) => Ok(c.solve(rhs)),
        None => {
            let idx = (0..m.nrows()).find(|&i| m[(i, i)] <= 0.0).unwrap_or(0);
            Err(TrainError::Degenerate {
                what,
                problem: format!(
                    "the state components are collinear or constant in the training bins (check {:?}); add ridge or drop a component",
                    state.get(idx).cloned().unwrap_or_default()
                ),
            })
        }
    }
}

fn to_dm(c: &CrossSums) -> DMatrix<f64> {
    DMatrix::from_row_slice(c.rows, c.cols, &c.data)
}

/// The fit proper, from sums. Public so cross-validation can call it with
/// "all folds minus one".
pub fn fit_from_stats(
    stats: &KalmanStats,
    options: &KalmanFitOptions,
    bin_width: crate::bin_width::BinWidth,
) -> Result<(KalmanModel, KalmanFitReport), TrainError> {
    let (d, n) = (stats.d, stats.n);
    let t_obs = stats.gram.n_rows();
    if t_obs < (d as u64) + 2 || stats.n_transitions < (d as u64) + 2 {
        return Err(TrainError::TooFewBins {
            bins: t_obs,
            needed: d as u64 + 2,
        });
    }
    let t = t_obs as f64;
    let constant_idx = options.state.iter().position(|s| s == CONSTANT);

    // Per-channel mean and variance, exact from integer sums.
    let mut offset = vec![0.0; n];
    let mut scale = vec![1.0; n];
    let mut excluded = Vec::new();
    for ch in 0..n {
        // T² · variance (exact for counts).
        let centred = stats.gram.centred(ch, ch);
        let constant = stats.gram.is_constant(ch);
        if constant {
            excluded.push(ch);
        }
        let mean = stats.gram.sum(ch) / t;
        let std = centred.sqrt() / t;
        match options.count_normalisation {
            CountNormalisation::None => {}
            CountNormalisation::MeanCentred => offset[ch] = mean,
            CountNormalisation::ZScored => {
                offset[ch] = mean;
                if !constant {
                    scale[ch] = std;
                }
            }
        }
    }

    // Observation sums in normalised units.
    let sx = DMatrix::from_row_slice(d, 1, &stats.sx);
    let mut syx = to_dm(&stats.syx);
    for ch in 0..n {
        for c in 0..d {
            syx[(ch, c)] = (syx[(ch, c)] - offset[ch] * sx[c]) / scale[ch];
        }
    }
    let sxx = to_dm(&stats.sxx);
    let mut kxx = sxx.clone();
    for i in 0..d {
        if Some(i) != constant_idx {
            kxx[(i, i)] += options.ridge;
        }
    }
    // Hᵀ = Kxx⁻¹ Syxᵀ.
    let mut h = solve_spd(&kxx, &syx.transpose(), &options.state, "H")?.transpose();
    for &ch in &excluded {
        h.row_mut(ch).fill(0.0);
    }

    let raw = (options.q_form == QForm::Full).then(|| stats.gram.to_f64_symmetric());
    let sy: Vec<f64> = (0..n).map(|i| stats.gram.sum(i)).collect();
    // Σ y'ᵢ y'ⱼ with y' = (y − o)/s.
    let q = residual_noise(
        options.q_form,
        t,
        &h,
        &syx,
        &sxx,
        &excluded,
        |i, j| match &raw {
            Some(raw) => {
                (raw[i * n + j] - offset[i] * sy[j] - sy[i] * offset[j] + t * offset[i] * offset[j])
                    / (scale[i] * scale[j])
            }
            None => {
                (stats.gram.square_sum(i) - 2.0 * offset[i] * sy[i] + t * offset[i] * offset[i])
                    / (scale[i] * scale[i])
            }
        },
    );

    finish(
        options,
        bin_width,
        ObservationFit {
            h,
            q,
            offset,
            scale,
            excluded,
        },
        stats,
    )
}

/// The fitted observation model, before it becomes a model with the
/// state model ([`finish`]).
struct ObservationFit {
    h: DMatrix<f64>,
    q: ObservationNoise,
    offset: Vec<f64>,
    scale: Vec<f64>,
    excluded: Vec<usize>,
}

/// Q, the covariance of the observation residuals:
/// `(Syy − H Syxᵀ − Syx Hᵀ + H Sxx Hᵀ) / T`, from `syy(i, j)`, the observations' sums in
/// normalised units (only `syy(i, i)` for a diagonal Q), and H, Syx, Sxx
/// over the same state components. A channel in `excluded` gets unit
/// variance and no covariance.
fn residual_noise(
    q_form: QForm,
    t: f64,
    h: &DMatrix<f64>,
    syx: &DMatrix<f64>,
    sxx: &DMatrix<f64>,
    excluded: &[usize],
    syy: impl Fn(usize, usize) -> f64,
) -> ObservationNoise {
    let (n, d) = (h.nrows(), h.ncols());
    let h_sxx = h * sxx; // N × d
    match q_form {
        QForm::Full => {
            let mut q = Mat::zeros(n, n);
            for i in 0..n {
                for j in i..n {
                    let mut v = syy(i, j);
                    for c in 0..d {
                        v -= h[(i, c)] * syx[(j, c)] + syx[(i, c)] * h[(j, c)]
                            - h_sxx[(i, c)] * h[(j, c)];
                    }
                    v /= t;
                    q.set(i, j, v);
                    q.set(j, i, v);
                }
            }
            for &ch in excluded {
                for k in 0..n {
                    q.set(ch, k, 0.0);
                    q.set(k, ch, 0.0);
                }
                q.set(ch, ch, 1.0);
            }
            ObservationNoise::Full(q)
        }
        QForm::Diagonal => {
            let mut diag = vec![0.0; n];
            for (i, v) in diag.iter_mut().enumerate() {
                let mut r = syy(i, i);
                for c in 0..d {
                    r -= 2.0 * h[(i, c)] * syx[(i, c)] - h_sxx[(i, c)] * h[(i, c)];
                }
                *v = r / t;
            }
            for &ch in excluded {
                diag[ch] = 1.0;
            }
            ObservationNoise::Diagonal(diag)
        }
    }
}

/// The state model from the kinematics alone: A and W by least squares
/// over the transitions, x0 and P0 the mean and covariance of the state.
fn state_model(
    stats: &KalmanStats,
    options: &KalmanFitOptions,
    bin_width: crate::bin_width::BinWidth,
) -> Result<(DMatrix<f64>, Mat, Vec<f64>, Mat), TrainError> {
    let d = stats.d;
    let t = stats.gram.n_rows() as f64;
    let constant_idx = options.state.iter().position(|s| s == CONSTANT);
    let sxx = to_dm(&stats.sxx);
    // State model.
    let s11 = to_dm(&stats.s11);
    let s21 = to_dm(&stats.s21);
    let s22 = to_dm(&stats.s22);
    let mut a = solve_spd(&s11, &s21.transpose(), &options.state, "A")?.transpose();
    if let Some(c) = constant_idx {
        a.row_mut(c).fill(0.0);
        a[(c, c)] = 1.0;
    }
    if options.physical_coupling {
        let dt = bin_width.seconds();
        for (i, name) in options.state.iter().enumerate() {
            if let Some(axis) = name.strip_prefix("pos_")
                && let Some(v) = options
                    .state
                    .iter()
                    .position(|s| s == &format!("vel_{axis}"))
            {
                a.row_mut(i).fill(0.0);
                a[(i, i)] = 1.0;
                a[(i, v)] = dt;
            }
        }
    }
    let n_tr = stats.n_transitions as f64;
    let mut w =
        (&s22 - &a * s21.transpose() - &s21 * a.transpose() + &a * &s11 * a.transpose()) / n_tr;
    if let Some(c) = constant_idx {
        w.row_mut(c).fill(0.0);
        w.column_mut(c).fill(0.0);
    }
    let mut w = Mat::from_dmatrix(&w);
    linalg::symmetrize(&mut w.data, d);

    let x0: Vec<f64> = stats.sx.iter().map(|v| v / t).collect();
    let x0m = DMatrix::from_row_slice(d, 1, &x0);
    let mut p0 = sxx / t - &x0m * x0m.transpose();
    if let Some(c) = constant_idx {
        p0.row_mut(c).fill(0.0);
        p0.column_mut(c).fill(0.0);
    }
    let mut p0 = Mat::from_dmatrix(&p0);
    linalg::symmetrize(&mut p0.data, d);
    let mut x0 = x0;
    if let Some(c) = constant_idx {
        x0[c] = 1.0;
    }
    Ok((a, w, x0, p0))
}

/// The model: the observation model fitted, the state model from the
/// kinematics of `stats`; validated, with its steady-state gain when
/// asked for.
fn finish(
    options: &KalmanFitOptions,
    bin_width: crate::bin_width::BinWidth,
    f: ObservationFit,
    stats: &KalmanStats,
) -> Result<(KalmanModel, KalmanFitReport), TrainError> {
    let (a, w, x0, p0) = state_model(stats, options, bin_width)?;
    let mut model = KalmanModel {
        state: options.state.clone(),
        outputs: options.outputs.clone(),
        a: Mat::from_dmatrix(&a),
        w,
        h: Mat::from_dmatrix(&f.h),
        q: f.q,
        x0,
        p0,
        count_offset: f.offset,
        count_scale: f.scale,
        steady: None,
    };
    model.validate()?;
    // Building the runtime checks that Q can be inverted.
    crate::decoders::kalman::filter::information_terms(&model)?;
    let mut report = KalmanFitReport {
        excluded_channels: f.excluded,
        observation_bins: stats.gram.n_rows(),
        transition_bins: stats.n_transitions,
        steady_state_iterations: None,
    };
    if let Some(st) = &options.steady_state {
        let gain = steady_state_gain(&model, st.tolerance, st.max_iterations)?;
        report.steady_state_iterations = Some(gain.iterations);
        model.steady = Some(gain);
    }
    Ok((model, report))
}

/// The fit with per-block normalisation, from each block's sums (`blocks`
/// in order; a block with no training rows is passed over).
///
/// Each block has its own baseline per channel: the observation model is
/// y = H x + b_k + noise in block k, which least squares fits by centring
/// counts and state on each block's own means (Frisch–Waugh–Lovell), so H
/// comes from the within-block covariances alone and Q from the residuals
/// about each block's line. With z-scoring, each block's counts are also
/// divided by that block's standard deviation. The model decodes with the
/// last block's baselines: `count_offset` its means (`count_scale` its
/// standard deviations), and the constant column of H its intercept,
/// −H·x̄ of its state. The state model (A, W, x0, P0) comes from the
/// blocks' kinematics pooled, as without the option.
///
/// `keep` names the block whose baselines the model decodes with instead
/// of the last (cross-validation decodes each held-out segment with its
/// own block's); a block with no training rows cannot lend its baselines,
/// and the last block with rows does.
pub fn fit_from_block_stats(
    blocks: &[KalmanStats],
    options: &KalmanFitOptions,
    bin_width: crate::bin_width::BinWidth,
    keep: Option<usize>,
) -> Result<(KalmanModel, KalmanFitReport), TrainError> {
    let kept = keep
        .and_then(|k| blocks.get(k))
        .filter(|b| b.gram.n_rows() > 0);
    let blocks: Vec<&KalmanStats> = blocks.iter().filter(|b| b.gram.n_rows() > 0).collect();
    let Some(last) = kept.or(blocks.last().copied()) else {
        return Err(TrainError::TooFewBins { bins: 0, needed: 2 });
    };
    let (d, n) = (last.d, last.n);
    let input = match last.gram {
        Gram::Counts(_) => BinKind::Counts,
        Gram::Values(_) => BinKind::Features,
    };
    let mut pooled = KalmanStats::new(input, d, n, options.q_form);
    for b in &blocks {
        pooled.add_assign(b);
    }
    let t_obs = pooled.gram.n_rows();
    if t_obs < (d as u64) + 2 || pooled.n_transitions < (d as u64) + 2 {
        return Err(TrainError::TooFewBins {
            bins: t_obs,
            needed: d as u64 + 2,
        });
    }
    let constant_idx = options.state.iter().position(|s| s == CONSTANT);
    // The components H is fitted on: every one but the constant, whose
    // column each block's centring empties.
    let kin: Vec<usize> = (0..d).filter(|&i| Some(i) != constant_idx).collect();
    let dk = kin.len();
    let z_scored = options.count_normalisation == CountNormalisation::ZScored;

    // Each block's per-channel mean and (z-scored) standard deviation.
    let moments = |b: &KalmanStats| -> (Vec<f64>, Vec<f64>) {
        let nb = b.gram.n_rows() as f64;
        (0..n)
            .map(|ch| {
                let mean = b.gram.sum(ch) / nb;
                let scale = if z_scored && !b.gram.is_constant(ch) {
                    b.gram.centred(ch, ch).sqrt() / nb
                } else {
                    1.0
                };
                (mean, scale)
            })
            .unzip()
    };
    let excluded: Vec<usize> = (0..n)
        .filter(|&ch| blocks.iter().all(|b| b.gram.is_constant(ch)))
        .collect();

    // Within-block sums, in normalised units.
    let mut syx = DMatrix::<f64>::zeros(n, dk);
    let mut sxx = DMatrix::<f64>::zeros(dk, dk);
    let full = options.q_form == QForm::Full;
    let mut syy = if full {
        DMatrix::<f64>::zeros(n, n)
    } else {
        DMatrix::<f64>::zeros(n, 1)
    };
    for b in &blocks {
        let nb = b.gram.n_rows() as f64;
        let (_, scale) = moments(b);
        let xbar: Vec<f64> = kin.iter().map(|&c| b.sx[c] / nb).collect();
        for ch in 0..n {
            for (kc, &c) in kin.iter().enumerate() {
                syx[(ch, kc)] += (b.syx.data[ch * d + c] - b.gram.sum(ch) * xbar[kc]) / scale[ch];
            }
        }
        for (ka, &a) in kin.iter().enumerate() {
            for (kb, &c) in kin.iter().enumerate() {
                sxx[(ka, kb)] += b.sxx.data[a * d + c] - nb * xbar[ka] * xbar[kb];
            }
        }
        for i in 0..n {
            if full {
                for j in i..n {
                    let v = b.gram.centred(i, j) / nb / (scale[i] * scale[j]);
                    syy[(i, j)] += v;
                    if j != i {
                        syy[(j, i)] += v;
                    }
                }
            } else {
                syy[(i, 0)] += b.gram.centred(i, i) / nb / (scale[i] * scale[i]);
            }
        }
    }
    let mut kxx = sxx.clone();
    for i in 0..dk {
        kxx[(i, i)] += options.ridge;
    }
    let names: Vec<String> = kin.iter().map(|&i| options.state[i].clone()).collect();
    let mut h_kin = solve_spd(&kxx, &syx.transpose(), &names, "H")?.transpose();
    for &ch in &excluded {
        h_kin.row_mut(ch).fill(0.0);
    }
    // Residual sums about each block's line.
    let t = t_obs as f64;
    let q = residual_noise(options.q_form, t, &h_kin, &syx, &sxx, &excluded, |i, j| {
        if full { syy[(i, j)] } else { syy[(i, 0)] }
    });

    // The last block's baselines: its means (and scales) as the offset,
    // and its intercept −H·x̄ in the constant column.
    let (offset, scale) = moments(last);
    let nl = last.gram.n_rows() as f64;
    let mut h = DMatrix::<f64>::zeros(n, d);
    for (kc, &c) in kin.iter().enumerate() {
        h.column_mut(c).copy_from(&h_kin.column(kc));
    }
    if let Some(c) = constant_idx {
        for ch in 0..n {
            h[(ch, c)] = -kin
                .iter()
                .enumerate()
                .map(|(kc, &k)| h_kin[(ch, kc)] * last.sx[k] / nl)
                .sum::<f64>();
        }
    }
    finish(
        options,
        bin_width,
        ObservationFit {
            h,
            q,
            offset,
            scale,
            excluded,
        },
        &pooled,
    )
}
