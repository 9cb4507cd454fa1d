"""Reference fixtures for the decoder's cross-checks.

Writes, into the directory given as the only argument:

  block/                  a session directory written the way a NumPy user
                          would write one (int32 counts, float64 kinematics,
                          manifest.toml, trials.csv)
  wu2006_*.npy            A, W, H, Q, x0, P0 fitted with numpy least squares
                          from the formulas of Wu et al. 2006, for two fit
                          settings (see FITS below)
  filterpy_states.npy     filterpy.kalman.KalmanFilter run over the block's
                          counts with the 'plain' parameters
  filterpy_*_states.npy   the same with a diagonal R, on z-scored counts
                          under the 'ridge_z' fit, and on mean-centred
                          counts under the 'velocity_only' fit
  dare_*.npy              a velocity-only model and the steady-state gain
                          from scipy.linalg.solve_discrete_are
  metrics.json            two arrays and their scipy.stats.pearsonr,
                          sklearn.metrics.r2_score and numpy RMSE
  glm_*.npy               statsmodels GLM(family=Poisson) fits of three
                          channels on the block's velocity, without and
                          with own-history columns through a raised-cosine
                          basis (written out here from its formula), with
                          the design matrices used; glm_offset_* the same
                          fit of one channel with a fixed offset
  wiener_sklearn_weights  sklearn.linear_model.Ridge on the block's lagged
                          counts (intercept first), for the Wiener filter
  intention_*.npy         a cursor, decoded velocity and trials, and the
                          velocity re-estimated by the rule of Gilja et al.
                          2012 written out in numpy
  eden_*.npy              one point-process filter step (Eden et al. 2004)
                          written out in numpy from the equations
  gof_*.npy, gof.json     time-rescaled intervals (Brown et al. 2002; the
                          intensity constant within a bin and each bin's
                          spikes at uniform positions in it) of one channel
                          under its statsmodels fit, and scipy.stats.kstest
                          on them
  gof_glm_*.npy           for three seeds: velocity, counts drawn from a
                          known Poisson GLM at 20 ms bins, the true
                          coefficients and statsmodels' fitted ones
  click_*.npy             counts with cued click epochs (some channels
                          faster during them), sklearn's
                          LinearDiscriminantAnalysis(solver="lsqr",
                          shrinkage) on the counts of the last CLICK_LAGS
                          bins (coefficients, intercept, posteriors), the
                          label sequence's transitions, and the two-state
                          forward recursion (Rabiner 1989) written out in
                          numpy over those posteriors, and sklearn's
                          roc_auc_score of the filtered probability
  features_block/         the block's counts made continuous features
                          (float32: an offset, a gain times the count and
                          Gaussian noise per channel), as features.npy
  features_wu2006_*.npy   A, W, H, Q, x0, P0 fitted on those features as
                          on counts (the 'plain' settings)
  features_filterpy_states.npy
                          filterpy.kalman.KalmanFilter over the features
                          with those parameters
  features_wiener_weights sklearn Ridge on the lagged features
  blocks/a, blocks/b      two session directories of one simulated array
                          whose baselines moved between them (each
                          channel's rate times a factor in 0.6..1.8)
  per_block_*.npy         least squares with an intercept per block
                          (numpy.linalg.lstsq on the state and one
                          indicator column per block): the Kalman
                          observation model on raw and on z-scored counts
                          with a ridge, and the Wiener weights
  versions.txt            the versions that produced all of this

The data are synthetic and seeded; nothing here is recorded data.
"""

import json
import os
import sys

import filterpy
import numpy as np
import scipy
import scipy.linalg
import scipy.stats
import sklearn
import statsmodels
import statsmodels.api as sm
from filterpy.kalman import KalmanFilter
from sklearn.discriminant_analysis import LinearDiscriminantAnalysis
from sklearn.linear_model import Ridge
from sklearn.metrics import r2_score, roc_auc_score

SEED = 20261202
T = 2000          # bins
N = 24            # channels
BIN_MS = 20.0
DT = BIN_MS / 1000.0
GOF_SEEDS = (11, 12, 13)
TIGHT = {"tol": 1e-12, "maxiter": 200}
WIENER_TAPS = 3
WIENER_RIDGE = 5.0
INTENT_RADIUS = 1.0
GOF_T = 4000      # bins per goodness-of-fit block
GOF_N = 12        # channels per goodness-of-fit block
CLICK_T = 3000    # bins of the click block
CLICK_N = 8       # its channels
CLICK_LAGS = 3
CLICK_SHRINKAGE = 0.1


def make_block(rng):
    """Smooth 2-D velocity (an AR(1) process), positions integrating it, and
    Poisson counts log-linearly tuned to velocity."""
    vel = np.zeros((T, 2))
    for t in range(1, T):
        vel[t] = 0.95 * vel[t - 1] + rng.normal(0.0, 2.0, size=2)
    pos = np.cumsum(vel * DT, axis=0)
    kin = np.column_stack([pos, vel])
    base = np.log(rng.uniform(8.0, 30.0, size=N) * DT)
    pd = rng.uniform(0.0, 2 * np.pi, size=N)
    depth = rng.uniform(0.02, 0.06, size=N)
    beta = np.column_stack([depth * np.cos(pd), depth * np.sin(pd)])
    rate = np.exp(base[None, :] + vel @ beta.T)
    counts = rng.poisson(rate).astype(np.int32)
    assert (counts.sum(axis=0) > 0).all(), "every channel must fire"
    return counts, kin


def write_dir(path, values_name, values, kin, notes, extra=""):
    """A session directory: counts.npy or features.npy, kinematics.npy and
    manifest.toml (with `extra` lines)."""
    os.makedirs(path, exist_ok=True)
    np.save(os.path.join(path, values_name), values)
    np.save(os.path.join(path, "kinematics.npy"), kin)
    with open(os.path.join(path, "manifest.toml"), "w") as f:
        f.write("version = 1\n")
        f.write(f"bin_ms = {BIN_MS}\n")
        f.write('kinematics = ["pos_x", "pos_y", "vel_x", "vel_y"]\n')
        f.write(extra)
        f.write(f'notes = "{notes}"\n')


def write_block(path, counts, kin):
    write_dir(path, "counts.npy", counts, kin, "reference fixture, synthetic, seed %d" % SEED)
    with open(os.path.join(path, "trials.csv"), "w") as f:
        f.write("trial,start_bin,end_bin,target_x,target_y\n")
        for i, start in enumerate(range(0, T, 200)):
            f.write(f"{i},{start},{min(start + 200, T)},0.0,0.0\n")


def wu2006_fit(counts, kin, state_cols, constant, ridge, normalisation):
    """A, W, H, Q by least squares (Wu et al. 2006). X is d x T, Y is N x T."""
    X = kin[:, state_cols].T
    if constant:
        X = np.vstack([X, np.ones((1, T))])
    d = X.shape[0]
    Y = counts.T.astype(np.float64)
    offset = np.zeros(N)
    scale = np.ones(N)
    if normalisation in ("mean-centred", "z-scored"):
        offset = Y.mean(axis=1)
    if normalisation == "z-scored":
        scale = Y.std(axis=1)
    Y = (Y - offset[:, None]) / scale[:, None]

    X1, X2 = X[:, :-1], X[:, 1:]
    A = np.linalg.lstsq(X1.T, X2.T, rcond=None)[0].T
    if constant:
        A[-1, :] = 0.0
        A[-1, -1] = 1.0
    R = X2 - A @ X1
    W = R @ R.T / X1.shape[1]
    if constant:
        W[-1, :] = 0.0
        W[:, -1] = 0.0

    # Ridge as ordinary least squares on an augmented system: rows sqrt(λ)·I
    # for every state component but the constant.
    pen = np.sqrt(ridge) * np.eye(d)
    if constant:
        pen = pen[:-1, :]
    Xa = np.vstack([X.T, pen])
    Ya = np.vstack([Y.T, np.zeros((pen.shape[0], N))])
    H = np.linalg.lstsq(Xa, Ya, rcond=None)[0].T
    E = Y - H @ X
    Q = E @ E.T / T

    x0 = X.mean(axis=1)
    P0 = (X @ X.T) / T - np.outer(x0, x0)
    if constant:
        P0[-1, :] = 0.0
        P0[:, -1] = 0.0
        x0[-1] = 1.0
    return dict(A=A, W=W, H=H, Q=Q, x0=x0, P0=P0, offset=offset, scale=scale)


FITS = {
    # name: (state columns of kinematics, constant, ridge, normalisation)
    "plain": ([0, 1, 2, 3], True, 0.0, "none"),
    "ridge_z": ([0, 1, 2, 3], True, 5.0, "z-scored"),
    "velocity_only": ([2, 3], False, 0.0, "mean-centred"),
}


GLM_CHANNELS = (0, 5, 11)
HISTORY_BASIS = 4
HISTORY_SPAN = 10


def raised_cosine(n_basis, span):
    """Log-stretched raised cosines over lags 1..span (Pillow et al. 2008):
    0.5 * (1 + cos(pi * (s - c_j) / (2 * delta))) where |s - c_j| < 2 delta,
    s = log(lag + 1), centres evenly spaced delta apart from s(1) to s(span)."""
    s = np.log(np.arange(1, span + 1) + 1.0)
    lo, hi = s[0], s[-1]
    delta = (hi - lo) / (n_basis - 1)
    basis = np.zeros((n_basis, span))
    for j in range(n_basis):
        d = (s - (lo + j * delta)) / (2 * delta)
        basis[j] = np.where(np.abs(d) < 1, 0.5 * (1 + np.cos(np.pi * d)), 0.0)
    return basis


def history_columns(y, basis):
    """Column j at bin t: sum over lags 1..span of basis[j, lag-1] * y[t-lag]."""
    n_basis, span = basis.shape
    out = np.zeros((len(y), n_basis))
    for lag in range(1, span + 1):
        shifted = np.zeros(len(y))
        shifted[lag:] = y[:-lag]
        out += shifted[:, None] * basis[:, lag - 1][None, :]
    return out


def main(out):
    rng = np.random.default_rng(SEED)
    counts, kin = make_block(rng)
    write_block(os.path.join(out, "block"), counts, kin)

    fits = {}
    for name, (cols, constant, ridge, norm) in FITS.items():
        fit = wu2006_fit(counts, kin, cols, constant, ridge, norm)
        fits[name] = fit
        for key, value in fit.items():
            np.save(os.path.join(out, f"wu2006_{name}_{key}.npy"), value)

    # filterpy over the block with the plain parameters.
    p = fits["plain"]
    d = p["A"].shape[0]
    kf = KalmanFilter(dim_x=d, dim_z=N)
    kf.F = p["A"].copy()
    kf.Q = p["W"].copy()
    kf.H = p["H"].copy()
    kf.R = p["Q"].copy()
    kf.x = p["x0"].reshape(d, 1).copy()
    kf.P = p["P0"].copy()
    states = np.zeros((T, d))
    for t in range(T):
        kf.predict()
        kf.update(counts[t].astype(np.float64).reshape(N, 1))
        states[t] = kf.x[:, 0]
    np.save(os.path.join(out, "filterpy_states.npy"), states)

    # filterpy on the other decoding paths: a diagonal observation noise
    # (the plain fit's Q with its off-diagonal dropped), z-scored counts
    # under the ridge_z fit, and mean-centred counts under the velocity-only
    # fit (the steady-state decoder is checked against this one once the
    # time-varying gain has settled).
    def filterpy_run(fit, R, z):
        dd = fit["A"].shape[0]
        f = KalmanFilter(dim_x=dd, dim_z=N)
        f.F, f.Q, f.H, f.R = fit["A"].copy(), fit["W"].copy(), fit["H"].copy(), R.copy()
        f.x = fit["x0"].reshape(dd, 1).copy()
        f.P = fit["P0"].copy()
        xs = np.zeros((T, dd))
        for t in range(T):
            f.predict()
            f.update(z[t].reshape(N, 1))
            xs[t] = f.x[:, 0]
        return xs

    raw = counts.astype(np.float64)
    np.save(
        os.path.join(out, "filterpy_diagonal_states.npy"),
        filterpy_run(p, np.diag(np.diag(p["Q"])), raw),
    )
    rz = fits["ridge_z"]
    np.save(
        os.path.join(out, "filterpy_zscored_states.npy"),
        filterpy_run(rz, rz["Q"], (raw - rz["offset"]) / rz["scale"]),
    )
    vo = fits["velocity_only"]
    np.save(
        os.path.join(out, "filterpy_velocity_only_states.npy"),
        filterpy_run(vo, vo["Q"], (raw - vo["offset"]) / vo["scale"]),
    )

    # Steady-state gain of the velocity-only model. The a-priori covariance
    # solves the filtering DARE, which scipy writes for the dual system.
    v = fits["velocity_only"]
    P_prior = scipy.linalg.solve_discrete_are(v["A"].T, v["H"].T, v["W"], v["Q"])
    S = v["H"] @ P_prior @ v["H"].T + v["Q"]
    K = P_prior @ v["H"].T @ np.linalg.inv(S)
    np.save(os.path.join(out, "dare_gain.npy"), K)
    np.save(os.path.join(out, "dare_prior_cov.npy"), P_prior)

    # Metrics on two related arrays.
    truth = rng.normal(size=500)
    estimate = 0.8 * truth + rng.normal(scale=0.5, size=500) + 0.1
    np.save(os.path.join(out, "metrics_truth.npy"), truth)
    np.save(os.path.join(out, "metrics_estimate.npy"), estimate)
    with open(os.path.join(out, "metrics.json"), "w") as f:
        json.dump(
            {
                "pearsonr": float(scipy.stats.pearsonr(truth, estimate).statistic),
                "r2_score": float(r2_score(truth, estimate)),
                "rmse": float(np.sqrt(np.mean((truth - estimate) ** 2))),
            },
            f,
            indent=2,
        )

    # Poisson GLMs with statsmodels' IRLS run to convergence at machine
    # precision (deviance change below 1e-12), velocity only and with
    # history columns, so coefficients can be compared at 1e-8.
    basis = raised_cosine(HISTORY_BASIS, HISTORY_SPAN)
    np.save(os.path.join(out, "glm_basis.npy"), basis)
    vel = kin[:, 2:4]
    lnp_mu = {}
    for c in GLM_CHANNELS:
        y = counts[:, c].astype(np.float64)
        lnp = sm.GLM(y, sm.add_constant(vel), family=sm.families.Poisson()).fit(**TIGHT)
        lnp_mu[c] = lnp.mu
        np.save(os.path.join(out, f"glm_lnp_coef_{c}.npy"), lnp.params)
        design = np.column_stack([vel, history_columns(y, basis)])
        np.save(os.path.join(out, f"glm_history_design_{c}.npy"), design)
        hist = sm.GLM(y, sm.add_constant(design), family=sm.families.Poisson()).fit(**TIGHT)
        np.save(os.path.join(out, f"glm_history_coef_{c}.npy"), hist.params)
        np.save(os.path.join(out, f"glm_history_deviance_{c}.npy"), np.array([hist.deviance]))

    # A Poisson GLM with a fixed offset (what online adaptation fits: the
    # tuning, with the spike-history drive held fixed): statsmodels'
    # GLM(offset=...) on the velocity, the offset a known kernel on the
    # channel's own history columns.
    y = counts[:, 5].astype(np.float64)
    offset = history_columns(y, basis) @ np.array([0.3, -0.2, 0.1, -0.05])
    np.save(os.path.join(out, "glm_offset_offset.npy"), offset)
    fit = sm.GLM(y, sm.add_constant(vel), offset=offset, family=sm.families.Poisson()).fit(**TIGHT)
    np.save(os.path.join(out, "glm_offset_coef.npy"), fit.params)

    # The Wiener filter: scikit-learn's Ridge on the lagged design (the
    # current bin and WIENER_TAPS - 1 bins back, channel by channel within
    # each lag; rows from the first bin with a full history), intercept
    # unpenalised.
    lagged = np.column_stack([
        counts[WIENER_TAPS - 1 - a:T - a].astype(np.float64) for a in range(WIENER_TAPS)
    ])
    ridge = Ridge(alpha=WIENER_RIDGE, fit_intercept=True, solver="cholesky")
    ridge.fit(lagged, kin[WIENER_TAPS - 1:, 2:4])
    np.save(
        os.path.join(out, "wiener_sklearn_weights.npy"),
        np.column_stack([ridge.intercept_, ridge.coef_]),
    )

    # Intention re-estimation (Gilja et al. 2012), the rule written out:
    # within a trial, the decoded velocity turned to point from the cursor
    # at the target with its speed kept, and zero within INTENT_RADIUS of
    # the target; outside trials, left as decoded. Trials leave gaps and
    # some bins sit inside the window.
    g = np.random.default_rng(SEED + 7)
    n_int = 400
    cursor = np.cumsum(g.normal(0.0, 0.4, size=(n_int, 2)), axis=0)
    decoded = g.normal(0.0, 5.0, size=(n_int, 2))
    trials = []
    for k, start in enumerate(range(10, n_int - 40, 60)):
        end = start + 45
        tx, ty = cursor[start + 30] + g.normal(0.0, 0.5, size=2)  # reached late in the trial
        trials.append((start, end, tx, ty))
    intended = decoded.copy()
    for start, end, tx, ty in trials:
        for b in range(start, end):
            to = np.array([tx, ty]) - cursor[b]
            dist = np.hypot(to[0], to[1])
            intended[b] = 0.0 if dist <= INTENT_RADIUS else to / dist * np.hypot(*decoded[b])
    np.save(os.path.join(out, "intention_kinematics.npy"), np.column_stack([cursor, decoded]))
    np.save(os.path.join(out, "intention_trials.npy"), np.array(trials, dtype=np.float64))
    np.save(os.path.join(out, "intention_velocity.npy"), intended)

    # One step of the point-process filter, from the equations:
    #   x- = A x, P- = A P A' + W, lambda = exp(b0 + beta x-),
    #   P = inv(inv(P-) + sum_c beta_c beta_c' lambda_c),
    #   x = x- + P sum_c beta_c (n_c - lambda_c).
    r2 = np.random.default_rng(SEED + 1)
    A = np.array([[0.95, 0.02], [-0.01, 0.93]])
    Wn = np.diag([0.5, 0.4])
    x = r2.normal(size=2)
    P = np.array([[1.0, 0.2], [0.2, 0.8]])
    b0 = np.log(r2.uniform(0.1, 0.6, size=6))
    beta = r2.normal(scale=0.3, size=(6, 2))
    n_obs = r2.poisson(0.4, size=6).astype(np.float64)
    x_prior = A @ x
    P_prior = A @ P @ A.T + Wn
    lam = np.exp(b0 + beta @ x_prior)
    P_post = np.linalg.inv(np.linalg.inv(P_prior) + (beta.T * lam) @ beta)
    x_post = x_prior + P_post @ (beta.T @ (n_obs - lam))
    for name, value in [("A", A), ("W", Wn), ("x", x), ("P", P), ("b0", b0), ("beta", beta),
                        ("counts", n_obs), ("x_post", x_post), ("P_post", P_post)]:
        np.save(os.path.join(out, f"eden_{name}.npy"), value)

    # Time rescaling of channel 0 under its velocity-only fit: the
    # intensity is constant within a bin, and a bin's m spikes sit at m
    # independent uniform positions inside it (sorted); an interval is the
    # integrated intensity between consecutive spikes.
    c = GLM_CHANNELS[0]
    mu = lnp_mu[c]
    y = counts[:, c]
    r = r2.uniform(size=int(y.sum()))
    intervals, since, last, k = [], 0.0, None, 0
    for lam_t, m in zip(mu, y):
        if m == 0:
            since += lam_t
            continue
        for s_pos in np.sort(r[k:k + m]):
            if last is not None:
                intervals.append(1.0 - np.exp(-(since + lam_t * s_pos - last)))
            last, since = lam_t * s_pos, 0.0
        k += m
        since += lam_t
    intervals = np.array(intervals)
    np.save(os.path.join(out, "gof_expected.npy"), mu)
    np.save(os.path.join(out, "gof_uniforms.npy"), r)
    np.save(os.path.join(out, "gof_intervals.npy"), intervals)
    with open(os.path.join(out, "gof.json"), "w") as f:
        ks = scipy.stats.kstest(intervals, "uniform")
        json.dump({"channel": c, "ks_statistic": float(ks.statistic), "n": len(intervals)}, f, indent=2)

    # Counts drawn from a known log-linear Poisson GLM in velocity at 20 ms
    # bins (often more than one spike a bin), for GOF_SEEDS seeds, with
    # statsmodels' fit of each channel: the decoder's goodness of fit must
    # pass correct models, under the true and under the fitted rates.
    for seed in GOF_SEEDS:
        g = np.random.default_rng(seed)
        vel = np.zeros((GOF_T, 2))
        for t in range(1, GOF_T):
            vel[t] = 0.95 * vel[t - 1] + g.normal(0.0, 2.0, size=2)
        b0 = np.log(g.uniform(20.0, 60.0, size=GOF_N) * DT)
        pd = g.uniform(0.0, 2 * np.pi, size=GOF_N)
        depth = g.uniform(0.02, 0.05, size=GOF_N)
        beta = np.column_stack([depth * np.cos(pd), depth * np.sin(pd)])
        true_coef = np.column_stack([b0, beta])
        design = sm.add_constant(vel)
        gcounts = g.poisson(np.exp(design @ true_coef.T)).astype(np.int16)
        fitted = np.array([
            sm.GLM(gcounts[:, ch].astype(np.float64), design, family=sm.families.Poisson()).fit().params
            for ch in range(GOF_N)
        ])
        np.save(os.path.join(out, f"gof_glm_velocity_{seed}.npy"), vel)
        np.save(os.path.join(out, f"gof_glm_counts_{seed}.npy"), gcounts)
        np.save(os.path.join(out, f"gof_glm_true_coef_{seed}.npy"), true_coef)
        np.save(os.path.join(out, f"gof_glm_fitted_coef_{seed}.npy"), fitted)

    click_fixtures(out)
    per_block_fixtures(out)
    features_fixtures(out, counts, kin)

    with open(os.path.join(out, "versions.txt"), "w") as f:
        f.write(f"python {sys.version.split()[0]}\n")
        for mod in (np, scipy, filterpy, sklearn, statsmodels):
            f.write(f"{mod.__name__} {mod.__version__}\n")


def click_fixtures(out):
    g = np.random.default_rng(SEED + 7)
    labels = np.zeros(CLICK_T, dtype=bool)
    t = 20
    while t < CLICK_T:
        length = int(g.integers(10, 21))
        labels[t:t + length] = True
        t += length + int(g.integers(60, 140))
    base = g.uniform(0.5, 2.0, size=CLICK_N)
    gain = np.ones(CLICK_N)
    gain[:4] = g.uniform(1.5, 3.0, size=4)
    rate = np.where(labels[:, None], base * gain, base)
    counts = g.poisson(rate).astype(np.int16)
    # The counts of the bin and the CLICK_LAGS - 1 before it, newest first.
    rows = range(CLICK_LAGS - 1, CLICK_T)
    x = np.array([np.concatenate([counts[r - l] for l in range(CLICK_LAGS)]) for r in rows], dtype=np.float64)
    y = labels[CLICK_LAGS - 1:]
    lda = LinearDiscriminantAnalysis(solver="lsqr", shrinkage=CLICK_SHRINKAGE).fit(x, y)
    proba = lda.predict_proba(x)[:, 1]
    prior = lda.priors_[1]
    # Transitions of the whole label sequence.
    now, nxt = labels[:-1], labels[1:]
    stay_rest = np.sum(~now & ~nxt) / np.sum(~now)
    stay_click = np.sum(now & nxt) / np.sum(now)
    A = np.array([[stay_rest, 1 - stay_rest], [1 - stay_click, stay_click]])
    # Forward recursion, normalised each step: alpha_t = (alpha_{t-1} A) * b_t,
    # b_t the scaled likelihoods (posterior over prior); no emission for
    # the first CLICK_LAGS - 1 bins (the discriminant has no window yet).
    alpha = np.array([1 - prior, prior])
    forward = np.zeros(CLICK_T)
    for t in range(CLICK_T):
        alpha = alpha @ A
        if t >= CLICK_LAGS - 1:
            q = proba[t - (CLICK_LAGS - 1)]
            alpha = alpha * np.array([(1 - q) / (1 - prior), q / prior])
        alpha = alpha / alpha.sum()
        forward[t] = alpha[1]
    np.save(os.path.join(out, "click_counts.npy"), counts)
    np.save(os.path.join(out, "click_labels.npy"), labels.astype(np.float64))
    np.save(os.path.join(out, "click_lda_coef.npy"), lda.coef_[0])
    np.save(os.path.join(out, "click_lda_intercept.npy"), lda.intercept_)
    np.save(os.path.join(out, "click_lda_proba.npy"), proba)
    np.save(os.path.join(out, "click_transitions.npy"), np.array([stay_rest, stay_click]))
    np.save(os.path.join(out, "click_forward.npy"), forward)
    # The area under the ROC curve of the filtered probability, bin by bin.
    np.save(os.path.join(out, "click_auc.npy"), np.array([roc_auc_score(labels, forward)]))


PB_T = (1500, 1000)   # bins of blocks a and b
PB_RIDGE = 5.0


def per_block_fixtures(out):
    """Two blocks of one array (same tuning) whose baselines moved between
    them, and least squares with an intercept per block on them."""
    rng = np.random.default_rng(SEED + 7)
    base = np.log(rng.uniform(8.0, 30.0, size=N) * DT)
    pd = rng.uniform(0.0, 2 * np.pi, size=N)
    depth = rng.uniform(0.02, 0.06, size=N)
    beta = np.column_stack([depth * np.cos(pd), depth * np.sin(pd)])
    moved = np.log(rng.uniform(0.6, 1.8, size=N))
    blocks = []
    for name, t_b, shift in (("a", PB_T[0], 0.0), ("b", PB_T[1], 1.0)):
        vel = np.zeros((t_b, 2))
        for t in range(1, t_b):
            vel[t] = 0.95 * vel[t - 1] + rng.normal(0.0, 2.0, size=2)
        pos = np.cumsum(vel * DT, axis=0) + 3.0 * shift
        kin = np.column_stack([pos, vel])
        rate = np.exp(base[None, :] + shift * moved[None, :] + vel @ beta.T)
        counts = rng.poisson(rate).astype(np.int32)
        assert (counts.sum(axis=0) > 0).all(), "every channel must fire"
        write_dir(
            os.path.join(out, "blocks", name),
            "counts.npy",
            counts,
            kin,
            "reference fixture, synthetic, seed %d, block %s" % (SEED + 7, name),
        )
        blocks.append((counts.astype(np.float64), kin))

    def indicators(lengths):
        d = np.zeros((sum(lengths), len(lengths)))
        at = 0
        for k, n in enumerate(lengths):
            d[at:at + n, k] = 1.0
            at += n
        return d

    # The Kalman observation model: counts (each block's own scale when
    # z-scored) on the four kinematics and an indicator per block, the
    # ridge as sqrt(λ)·I rows on the kinematics only.
    for name, ridge, z in (("plain", 0.0, False), ("ridge_z", PB_RIDGE, True)):
        ys, xs = [], []
        for counts, kin in blocks:
            scale = counts.std(axis=0) if z else np.ones(N)
            ys.append(counts / scale)
            xs.append(kin)
        Y, X = np.vstack(ys), np.vstack(xs)
        D = indicators([len(y) for y in ys])
        design = np.column_stack([X, D])
        pen = np.column_stack([np.sqrt(ridge) * np.eye(4), np.zeros((4, 2))])
        coef = np.linalg.lstsq(
            np.vstack([design, pen]), np.vstack([Y, np.zeros((4, N))]), rcond=None
        )[0]
        E = Y - design @ coef
        last_counts = blocks[-1][0]
        offset = last_counts.mean(axis=0)
        scale = last_counts.std(axis=0) if z else np.ones(N)
        # The model decodes (y - offset) / scale = H_kin x + c: c is the last
        # block's intercept less its offset, in the same units.
        c = coef[-1] - offset / scale
        np.save(os.path.join(out, f"per_block_{name}_H.npy"), np.column_stack([coef[:4].T, c]))
        np.save(os.path.join(out, f"per_block_{name}_Q.npy"), E.T @ E / len(Y))
        np.save(os.path.join(out, f"per_block_{name}_offset.npy"), offset)
        np.save(os.path.join(out, f"per_block_{name}_scale.npy"), scale)

    # The Wiener weights: velocity on the lagged counts of each block (rows
    # from its first full history) and an indicator per block; intercept
    # (the last block's) first.
    lagged, targets = [], []
    for counts, kin in blocks:
        t_b = len(counts)
        lagged.append(np.column_stack([
            counts[WIENER_TAPS - 1 - a:t_b - a] for a in range(WIENER_TAPS)
        ]))
        targets.append(kin[WIENER_TAPS - 1:, 2:4])
    F, Yw = np.vstack(lagged), np.vstack(targets)
    D = indicators([len(f) for f in lagged])
    design = np.column_stack([F, D])
    f = F.shape[1]
    pen = np.column_stack([np.sqrt(WIENER_RIDGE) * np.eye(f), np.zeros((f, 2))])
    coef = np.linalg.lstsq(
        np.vstack([design, pen]), np.vstack([Yw, np.zeros((f, 2))]), rcond=None
    )[0]
    np.save(
        os.path.join(out, "per_block_wiener_weights.npy"),
        np.column_stack([coef[-1], coef[:f].T]),
    )


def features_fixtures(out, counts, kin):
    """Continuous features (a stand-in for spike band power) from the
    block's counts, and the Kalman and Wiener references on them."""
    rng = np.random.default_rng(SEED + 11)
    offset = rng.uniform(20.0, 60.0, size=N)
    gain = rng.uniform(2.0, 6.0, size=N)
    noise = rng.uniform(1.0, 3.0, size=N)
    feats = (offset + gain * counts + noise * rng.normal(size=counts.shape)).astype(np.float32)
    write_dir(
        os.path.join(out, "features_block"),
        "features.npy",
        feats,
        kin,
        "reference fixture, synthetic, seed %d" % (SEED + 11),
        extra='features = "synthetic band power"\n',
    )
    y = feats.astype(np.float64)
    fit = wu2006_fit(y, kin, [0, 1, 2, 3], True, 0.0, "none")
    for key, value in fit.items():
        np.save(os.path.join(out, f"features_wu2006_{key}.npy"), value)
    d = fit["A"].shape[0]
    kf = KalmanFilter(dim_x=d, dim_z=N)
    kf.F, kf.Q, kf.H, kf.R = fit["A"].copy(), fit["W"].copy(), fit["H"].copy(), fit["Q"].copy()
    kf.x = fit["x0"].reshape(d, 1).copy()
    kf.P = fit["P0"].copy()
    states = np.zeros((T, d))
    for t in range(T):
        kf.predict()
        kf.update(y[t].reshape(N, 1))
        states[t] = kf.x[:, 0]
    np.save(os.path.join(out, "features_filterpy_states.npy"), states)
    lagged = np.column_stack([y[WIENER_TAPS - 1 - a:T - a] for a in range(WIENER_TAPS)])
    ridge = Ridge(alpha=WIENER_RIDGE, fit_intercept=True, solver="cholesky")
    ridge.fit(lagged, kin[WIENER_TAPS - 1:, 2:4])
    np.save(
        os.path.join(out, "features_wiener_weights.npy"),
        np.column_stack([ridge.intercept_, ridge.coef_]),
    )


if __name__ == "__main__":
    if len(sys.argv) != 2:
        sys.exit("usage: make_fixtures.py OUT_DIR")
    main(sys.argv[1])
