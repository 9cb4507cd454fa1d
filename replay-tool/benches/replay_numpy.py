"""The numpy baseline for whole-process replay: load a session directory's
counts, decode every bin with the Kalman filter in information form (the
algebra the Rust pipeline runs), write the estimates. One process, timed
from start to finish by the caller, like `replay-tool replay`.

    python replay_numpy.py MODEL.json BLOCK_DIR OUT.npy

MODEL.json is `replay-tool model show MODEL --json` (PROTOCOL.md §4).
"""

import json
import os
import sys

import numpy as np


def main():
    model_path, block, out = sys.argv[1:4]
    m = json.load(open(model_path))
    A = np.array(m["A"])
    W = np.array(m["W"])
    H = np.array(m["H"])
    Q = np.array(m["Q"])
    if Q.ndim == 1:
        Q = np.diag(Q)
    x = np.array(m["x0"], dtype=np.float64)
    P = np.array(m["P0"])
    offset = np.array(m["count_offset"])
    scale = np.array(m["count_scale"])
    state = m["state"]
    outs = [state.index(o) for o in m["outputs"]]
    counts = np.load(os.path.join(block, "counts.npy"), mmap_mode="r")
    G = H.T @ np.linalg.inv(Q)
    S = G @ H
    eye = np.eye(len(x))
    est = np.empty((counts.shape[0], len(outs)))
    for t in range(counts.shape[0]):
        y = (counts[t].astype(np.float64) - offset) / scale
        x = A @ x
        P = A @ P @ A.T + W
        P = np.linalg.solve(eye + P @ S, P)
        x = x + P @ (G @ y - S @ x)
        est[t] = x[outs]
    np.save(out, est)


if __name__ == "__main__":
    main()
