#!/usr/bin/env bash
# Online adaptation in simulated closed loop: a Kalman decoder trained on a
# calibration block whose velocities are turned by 60° (so it decodes every
# intention 60° off) drives the real daemon for 150 center-out trials (96
# channels, 20 ms bins, as fast as the loop turns round), with and without
# `--adapt`, for three task seeds. Prints success and mean time per trial
# (timeouts count) for each third of the session. With --adapt each seed
# runs twice and the two runs must be identical (updates land at slots set
# by the bins, PROTOCOL.md §9).
#
#   bash replay-tool/benches/adapt_rotated.sh [WORKDIR]
#
# Needs a release build (cargo build --release -p replay-tool -p daemon)
# and a Python with numpy ($VDEC_REFERENCE_PYTHON, else python3).
source "$(dirname "$0")/setup.sh" "$@"
"$tool" simulate --out calib --seed 11 --minutes 10 --channels 96 >/dev/null
"$py" - <<'PY'
import numpy as np, shutil
shutil.copytree("calib", "turned", dirs_exist_ok=True)
k = np.load("calib/kinematics.npy")
a = np.radians(60.0); c, s = np.cos(a), np.sin(a)
for i in (0, 2):  # pos_x, pos_y and vel_x, vel_y
    x, y = k[:, i].copy(), k[:, i + 1].copy()
    k[:, i], k[:, i + 1] = c * x - s * y, s * x + c * y
np.save("turned/kinematics.npy", k)
PY
"$tool" train --session turned --decoder kalman --out turned.model --no-cv >/dev/null
for seed in 1 2 3; do
  "$tool" closed-loop --model turned.model --time-scale 0 --trials 150 --task-seed "$seed" --report "plain-$seed" >/dev/null
  for run in a b; do
    "$tool" closed-loop --model turned.model --time-scale 0 --trials 150 --task-seed "$seed" --adapt --report "adapt-$seed-$run" >/dev/null
  done
  cmp <("$py" -c "import json; print(json.load(open('adapt-$seed-a/closed-loop.json'))['trials'])") \
      <("$py" -c "import json; print(json.load(open('adapt-$seed-b/closed-loop.json'))['trials'])") \
    || { echo "adaptive runs of seed $seed differ" >&2; exit 1; }
done
"$py" - <<'PY'
import json
def thirds(path):
    t = json.load(open(path + "/closed-loop.json"))["trials"]
    n = len(t); out = []
    for k in range(3):
        s = t[k * n // 3:(k + 1) * n // 3]
        out.append((100 * sum(x["success"] for x in s) / len(s),
                    sum(x["trial_time_s"] for x in s) / len(s)))
    return out
print("seed  decoder          first third     second third    last third")
for seed in (1, 2, 3):
    for name, path in (("turned", f"plain-{seed}"), ("turned, adapting", f"adapt-{seed}-a")):
        cells = "  ".join(f"{s:5.1f} % {t:4.2f} s" for s, t in thirds(path))
        print(f"{seed:<5} {name:<16} {cells}")
print("(adaptive runs repeated identically)")
PY
