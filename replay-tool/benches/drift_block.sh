#!/usr/bin/env bash
# Drift handling offline: a decoder trained on a 10-minute calibration block
# decodes a 30-minute block of the same simulated array (96 channels,
# 20 ms bins) whose rates ramp to between 0.6 and 1.8 times their start,
# with 10 % of the channels silent from minute 10 and another 10 % firing at
# 400 Hz, unrelated to movement, from minute 20; and the same block without
# drift. Prints R² of the decoded velocity (both columns pooled, each about
# its own mean) over the last third, for drift handling off, on (the
# defaults), on with the velocity bias corrected, following baselines only,
# and leaving channels out only.
#
#   bash replay-tool/benches/drift_block.sh [WORKDIR]
#
# Needs a release build (cargo build --release -p replay-tool) and a Python
# with numpy ($VDEC_REFERENCE_PYTHON, else python3).
source "$(dirname "$0")/setup.sh" "$@"
"$tool" simulate --out calib --seed 1 --minutes 10 --channels 96 >/dev/null
"$tool" simulate --out clean --seed 2 --minutes 30 --channels 96 >/dev/null
"$tool" simulate --out drifted --seed 2 --minutes 30 --channels 96 \
  --drift-gain 0.6:1.8 --drift-ramp-min 30 --silent 0.1@10 --noisy 0.1@20 >/dev/null
printf '[drift]\nenabled = false\n' >off.toml
printf '[drift]\nenabled = true\n' >on.toml
printf '[drift]\nenabled = true\ncorrect_bias = true\n' >bias.toml
printf '[drift]\nenabled = true\ndead_min_rate_hz = 1e9\nnoisy_factor = 1e9\n' >track.toml
printf '[drift]\nenabled = true\nbaseline_tau_s = 1e9\n' >leave.toml
# The Kalman filter twice: the default state (positions, velocities and a
# constant) and a velocity-only state (velocities and a constant).
printf '' >kalman.toml
printf '[kalman]\nstate = ["vel_x", "vel_y", "1"]\n' >kalman-vel.toml
printf '' >wiener.toml
for m in kalman kalman-vel wiener; do
  "$tool" train --session calib --decoder "${m%-vel}" --config "$m.toml" --out "$m.model" >/dev/null
  for s in clean drifted; do
    for c in off on bias track leave; do
      "$tool" replay --session "$s" --model "$m.model" --config "$c.toml" --out "$m-$s-$c.npy" >/dev/null
    done
  done
done
"$py" - <<'PY'
import numpy as np
def r2(est, truth):
    return 1 - ((truth - est) ** 2).sum() / ((truth - truth.mean(0)) ** 2).sum()
print("decoder     block       off      on    +bias baselines channels-out")
for m in ["kalman", "kalman-vel", "wiener"]:
    for s in ["clean", "drifted"]:
        kin = np.load(f"{s}/kinematics.npy")
        row = []
        for c in ["off", "on", "bias", "track", "leave"]:
            e = np.load(f"{m}-{s}-{c}.npy")
            a = 2 * len(e) // 3
            row.append(f"{r2(e[a:], kin[a:, 2:4]):7.3f}")
        print(f"{m:11} {s:8} " + " ".join(row))
PY
