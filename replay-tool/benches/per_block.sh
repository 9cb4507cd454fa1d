#!/usr/bin/env bash
# Several blocks, one decoder: yesterday's 10-minute calibration block and
# a few minutes of today's, from the same simulated array (96 channels,
# 20 ms bins) whose rates moved overnight (each channel's rate times a
# factor drawn in 0.6..1.8, preferred directions turned by about 10°).
# Trains a decoder on yesterday alone, on today's minutes alone, on both
# pooled, and on both with per-block normalisation, and prints R² of the
# decoded velocity (both columns pooled, each about its own mean) on a
# 20-minute block recorded later today.
#
#   bash replay-tool/benches/per_block.sh [WORKDIR] [TODAY_MINUTES]
#
# Needs a release build (cargo build --release -p replay-tool) and a Python
# with numpy ($VDEC_REFERENCE_PYTHON, else python3).
source "$(dirname "$0")/setup.sh" "$@"
today_min="${2:-3}"
overnight=(--drift-gain 0.6:1.8 --drift-ramp-min 0.001 --pd-change-deg 10)
"$tool" simulate --out yesterday --seed 1 --minutes 10 >/dev/null
"$tool" simulate --out today --seed 2 --minutes "$today_min" "${overnight[@]}" >/dev/null
"$tool" simulate --out later --seed 3 --minutes 20 "${overnight[@]}" >/dev/null
printf '' >raw.toml
printf '[kalman]\ncount_normalisation = "z-scored"\n' >z.toml
for m in kalman:raw kalman:z wiener:raw; do
  d="${m%%:*}" c="${m#*:}" name="${m/:/-}"
  train=("$tool" train --no-cv --decoder "$d" --config "$c.toml")
  "${train[@]}" --session yesterday --out "$name-yesterday.model" >/dev/null
  "${train[@]}" --session today --out "$name-today.model" >/dev/null
  "${train[@]}" --session yesterday --session today --out "$name-pooled.model" >/dev/null
  "${train[@]}" --session yesterday --session today --per-block --out "$name-per-block.model" >/dev/null
  for t in yesterday today pooled per-block; do
    "$tool" replay --session later --model "$name-$t.model" --out "$name-$t.npy" >/dev/null
  done
done
"$py" - "$today_min" <<'PY'
import sys
import numpy as np
def r2(est, truth):
    return 1 - ((truth - est) ** 2).sum() / ((truth - truth.mean(0)) ** 2).sum()
kin = np.load("later/kinematics.npy")[:, 2:4]
print(f"R² on 20 minutes later today; today's calibration {sys.argv[1]} min")
print("decoder     yesterday  today   pooled  per-block")
for m in ["kalman-raw", "kalman-z", "wiener-raw"]:
    row = [f"{r2(np.load(f'{m}-{t}.npy'), kin):8.3f}" for t in ["yesterday", "today", "pooled", "per-block"]]
    print(f"{m:11} " + " ".join(row))
PY
