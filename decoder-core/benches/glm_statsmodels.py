"""Fits the designs written by the glm_fit bench with statsmodels
GLM(family=Poisson) (IRLS, its defaults), times them, checks the
coefficients against ours and prints the per-channel ratio.

    python glm_statsmodels.py DIR
"""

import json
import os
import sys
import time

import numpy as np
import statsmodels.api as sm


def main(d):
    rust = json.load(open(os.path.join(d, "rust.json")))
    times, worst = [], 0.0
    c = 0
    while os.path.exists(os.path.join(d, f"design_{c}.npy")):
        x = np.load(os.path.join(d, f"design_{c}.npy"))
        y = np.load(os.path.join(d, f"counts_{c}.npy"))
        ours = np.load(os.path.join(d, f"coef_{c}.npy"))
        t0 = time.perf_counter()
        res = sm.GLM(y, sm.add_constant(x, has_constant="add"), family=sm.families.Poisson()).fit()
        times.append(time.perf_counter() - t0)
        worst = max(worst, float(np.max(np.abs(res.params - ours)) / np.max(np.abs(res.params))))
        c += 1
    per = 1000.0 * float(np.median(times))
    print(f"statsmodels {sm.__version__}: median {per:.1f} ms per channel over {c} channels "
          f"({x.shape[0]} bins x {x.shape[1] + 1} coefficients); largest relative coefficient difference {worst:.2e}")
    print(f"Rust, one thread: {rust['per_channel_ms']:.1f} ms per channel -> {per / rust['per_channel_ms']:.1f}x faster; "
          f"all {rust['threads']} cores: {rust['all_cores_s']:.2f} s for {rust['channels']} channels "
          f"(statsmodels, one process: ~{per * rust['channels'] / 1000.0:.1f} s)")


if __name__ == "__main__":
    main(sys.argv[1])
