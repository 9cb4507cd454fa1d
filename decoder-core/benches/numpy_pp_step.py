"""Times one point-process filter step (Eden et al. 2004) in numpy,
vectorised over the channels, with the model shape of benches/decode.rs
(d = 2: vel_x, vel_y; "history" adds a 10-lag filter per channel), and
prints it beside the criterion medians of `pp_step` from the same run.

    python numpy_pp_step.py [CRITERION_DIR]
"""

import sys

import numpy as np

from numpy_step import criterion_median, median_time


def step(x, P, y, A, W, b0, B, K, ring):
    # Prediction, then the Newton update of the posterior mode.
    x = A @ x
    P = A @ P @ A.T + W
    eta = b0 + B @ x
    if K is not None:
        eta = eta + np.einsum("il,il->i", K, ring)
    lam = np.exp(np.clip(eta, -30.0, 30.0))
    info = np.linalg.inv(P) + (B.T * lam) @ B
    P = np.linalg.inv(info)
    x = x + P @ (B.T @ (y - lam))
    return x, P


def main():
    criterion = sys.argv[1] if len(sys.argv) > 1 else None
    rng = np.random.default_rng(11)
    print(f"numpy {np.__version__}")
    print(f"{'N':>6} {'form':>8} {'numpy':>12} {'rust':>12} {'numpy/rust':>11}")
    for n in (96, 192, 1024):
        for history in (False, True):
            A = 0.95 * np.eye(2)
            W = np.eye(2)
            b0 = np.log(rng.uniform(0.1, 0.6, size=n))
            B = rng.uniform(-0.05, 0.05, size=(n, 2))
            K = rng.uniform(-0.3, 0.1, size=(n, 10)) if history else None
            ring = rng.poisson(0.4, size=(n, 10)).astype(np.float64)
            y = rng.poisson(0.4, size=n).astype(np.float64)
            x = np.zeros(2)
            P = 10.0 * np.eye(2)
            t = median_time(lambda: step(x, P, y, A, W, b0, B, K, ring))
            name = "history" if history else "lnp"
            rust = criterion_median(criterion, "pp_step", name, n)
            rust_s = f"{rust * 1e6:9.2f} us" if rust else "         -"
            ratio = f"{t / rust:10.1f}x" if rust else "          -"
            print(f"{n:>6} {name:>8} {t * 1e6:9.2f} us {rust_s} {ratio}")


if __name__ == "__main__":
    main()
