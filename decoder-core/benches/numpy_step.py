"""Times one Kalman decode step in numpy, the naive way (an N x N solve per
bin, as a textbook update does) and in information form (the same algebra
the Rust step uses), with the same d = 5 model shape as benches/decode.rs.

Run by compare_numpy.sh after the criterion bench, which passes the
criterion output directory so the ratio is printed from one run.

    python numpy_step.py [CRITERION_DIR]
"""

import json
import os
import sys
import time

import numpy as np


def model(n, rng):
    d = 5
    A = np.eye(d)
    A[0, 2] = A[1, 3] = 0.02
    A[2, 2] = A[3, 3] = 0.95
    W = np.diag([1e-4, 1e-4, 1.0, 1.0, 0.0])
    H = np.zeros((n, d))
    H[:, 0:2] = rng.uniform(-0.01, 0.01, size=(n, 2))
    H[:, 2:4] = rng.uniform(-0.05, 0.05, size=(n, 2))
    H[:, 4] = rng.uniform(0.1, 0.6, size=n)
    Q = np.diag(rng.uniform(0.1, 0.6, size=n))
    return A, W, H, Q


def naive_step(x, P, y, A, W, H, Q):
    x = A @ x
    P = A @ P @ A.T + W
    S = H @ P @ H.T + Q                     # N x N
    K = np.linalg.solve(S, H @ P).T         # d x N, an N x N solve
    x = x + K @ (y - H @ x)
    P = P - K @ H @ P
    return x, P


def info_step(x, P, y, A, W, G, S):
    x = A @ x
    P = A @ P @ A.T + W
    P = np.linalg.solve(np.eye(len(x)) + P @ S, P)
    x = x + P @ (G @ y - S @ x)
    return x, P


def median_time(fn, repeats=15, inner=None):
    if inner is None:
        t0 = time.perf_counter()
        fn()
        one = time.perf_counter() - t0
        inner = max(1, int(0.02 / max(one, 1e-9)))
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        for _ in range(inner):
            fn()
        times.append((time.perf_counter() - t0) / inner)
    return float(np.median(times))


def criterion_median(criterion, group, name, n):
    """The median of criterion's last run of GROUP/NAME/N in seconds, or
    None when it has not been run."""
    if not criterion:
        return None
    path = os.path.join(criterion, group, name, str(n), "new", "estimates.json")
    if not os.path.exists(path):
        return None
    with open(path) as f:
        return json.load(f)["median"]["point_estimate"] * 1e-9


def main():
    criterion = sys.argv[1] if len(sys.argv) > 1 else None
    rng = np.random.default_rng(7)
    print(f"numpy {np.__version__}")
    print(f"{'N':>6} {'numpy naive':>14} {'numpy info':>14} {'rust full':>12} {'naive/rust':>11}")
    for n in (96, 192, 1024):
        A, W, H, Q = model(n, rng)
        Qinv = np.diag(1.0 / np.diag(Q))
        G = H.T @ Qinv
        S = G @ H
        y = rng.poisson(0.5, size=n).astype(np.float64)
        x = np.array([0.0, 0.0, 0.0, 0.0, 1.0])
        P = np.diag([1.0, 1.0, 1.0, 1.0, 0.0])
        t_naive = median_time(lambda: naive_step(x, P, y, A, W, H, Q))
        t_info = median_time(lambda: info_step(x, P, y, A, W, G, S))
        rust = criterion_median(criterion, "decode_step", "full", n)
        rust_s = f"{rust * 1e6:9.3f} us" if rust else "         -"
        ratio = f"{t_naive / rust:10.0f}x" if rust else "          -"
        print(f"{n:>6} {t_naive * 1e6:11.1f} us {t_info * 1e6:11.1f} us {rust_s} {ratio}")


if __name__ == "__main__":
    main()
