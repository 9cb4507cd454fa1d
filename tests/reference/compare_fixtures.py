"""Compares freshly generated reference fixtures with the committed ones, so
a change in the pinned reference libraries (or in the fixture script) shows
up in CI rather than silently.

    python compare_fixtures.py COMMITTED_DIR FRESH_DIR

Every file is compared: .npy arrays element by element, JSON documents value
by value (numbers with the same tolerance), text files (CSV, TOML, versions)
byte for byte. A file present on one side only is a failure.

Tolerance. The pinned libraries are the same on every machine, but numpy and
scipy call OpenBLAS, which picks a kernel for the CPU it runs on; kernels sum
in different orders, so one matrix product can differ in its last bit or two
(about 1e-16 relative). The 2000-step Kalman recursion in filterpy_states.npy
carries such differences forward: measured up to 2.2e-11 absolute between
the committed fixtures and fresh runs with OPENBLAS_CORETYPE forced to
Haswell and to Prescott. A stable filter forgets old rounding at
the rate of its closed-loop poles, so the spread stays near T * eps * the
condition of the recursion rather than growing without bound. rtol 1e-9 and
atol 1e-9 leave a factor of about 45 over the measured spread while still
catching any change of library version or of the fixture script, which moves
results at 1e-6 or more. The Rust-against-reference checks keep their own,
tighter tolerances against whichever fixtures were generated on this machine.
"""

import json
import math
import os
import sys

import numpy as np

RTOL = 1e-9
ATOL = 1e-9


def files_under(root):
    found = set()
    for folder, _dirs, names in os.walk(root):
        for name in names:
            found.add(os.path.relpath(os.path.join(folder, name), root))
    return found


def close_json(a, b):
    if isinstance(a, bool) or isinstance(b, bool):
        return a == b
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        if math.isnan(a) or math.isnan(b):
            return math.isnan(a) and math.isnan(b)
        return abs(a - b) <= ATOL + RTOL * abs(b)
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(close_json(a[k], b[k]) for k in a)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(close_json(x, y) for x, y in zip(a, b))
    return a == b


def same(rel, committed, fresh):
    pa, pb = os.path.join(committed, rel), os.path.join(fresh, rel)
    if rel.endswith(".npy"):
        a, b = np.load(pa), np.load(pb)
        return a.shape == b.shape and a.dtype == b.dtype and np.allclose(a, b, rtol=RTOL, atol=ATOL)
    if rel.endswith(".json"):
        with open(pa) as fa, open(pb) as fb:
            return close_json(json.load(fa), json.load(fb))
    with open(pa, "rb") as fa, open(pb, "rb") as fb:
        return fa.read() == fb.read()


def main(committed, fresh):
    left, right = files_under(committed), files_under(fresh)
    bad = [f"{rel} (committed only)" for rel in sorted(left - right)]
    bad += [f"{rel} (fresh only)" for rel in sorted(right - left)]
    both = sorted(left & right)
    bad += [rel for rel in both if not same(rel, committed, fresh)]
    print(f"compared {len(both)} fixture files: {len(both) - len(bad)} match")
    if bad:
        sys.exit("fixtures differ from a fresh run: " + ", ".join(bad))


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2])
