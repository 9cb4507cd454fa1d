"""Compares freshly generated reference fixtures with the committed ones, so
a change in the pinned reference libraries (or in the fixture script) shows
up in CI rather than silently.

    python compare_fixtures.py COMMITTED_DIR FRESH_DIR
"""

import glob
import os
import sys

import numpy as np


def main(committed, fresh):
    bad = []
    names = sorted(glob.glob(os.path.join(committed, "**", "*.npy"), recursive=True))
    for path in names:
        rel = os.path.relpath(path, committed)
        a = np.load(path)
        b = np.load(os.path.join(fresh, rel))
        if a.shape != b.shape or a.dtype != b.dtype or not np.allclose(a, b, rtol=1e-12, atol=1e-14):
            bad.append(rel)
    print(f"compared {len(names)} fixture arrays: {len(names) - len(bad)} match")
    if bad:
        sys.exit("fixtures differ from a fresh run: " + ", ".join(bad))


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2])
