#!/usr/bin/env bash
# A simulated two-hour day in closed loop: the simulated user drives the real
# daemon (96 channels, 20 ms bins, as fast as the loop turns round) through
# a world whose rates ramp to between 0.6 and 1.8 times their start over the
# two hours, where 10 % of the channels fall silent from minute 30 to minute
# 100 and another 10 % fire at 400 Hz, unrelated to movement, from minute 60
# to minute 90. Prints success and mean time per trial (timeouts count) per
# quarter hour for:
#   morning         the decoder calibrated on the day's first 10 minutes
#   + handling      the same, [drift] enabled = true
#   + bias          the same, and [drift] correct_bias = true
#   + adaptation    the same, and `--adapt`
#   fresh           a decoder calibrated on the first 10 minutes of each
#                   quarter, run on that quarter alone (the ceiling)
# and, on a world that does not change, 30 minutes of the morning decoder
# with handling off and on.
#
#   bash replay-tool/benches/drift_day.sh [WORKDIR] [TASK_SEED]
#
# TASK_SEED (default 1) seeds the target order and the user's spikes of
# every session, so several seeds show how much the figures vary.
#
# Needs a release build (cargo build --release -p replay-tool -p daemon)
# and a Python with numpy ($VDEC_REFERENCE_PYTHON, else python3).
source "$(dirname "$0")/setup.sh" "$@"
day=(--drift-gain 0.6:1.8 --drift-ramp-min 120 --silent 0.1@30-100 --noisy 0.1@60-90)
printf '[drift]\nenabled = true\n' >drift.toml
printf '[drift]\nenabled = true\ncorrect_bias = true\n' >bias.toml
task_seed="${2:-1}"
run() { "$tool" closed-loop --time-scale 0 --trials 1000000 --task-seed "$task_seed" "$@" >/dev/null; }

"$tool" simulate --out morning-calib --seed 1 --minutes 10 --channels 96 "${day[@]}" >/dev/null
"$tool" train --session morning-calib --decoder kalman --out morning.model --no-cv >/dev/null
run --model morning.model --minutes 120 "${day[@]}" --report morning
run --model morning.model --minutes 120 "${day[@]}" --config drift.toml --report handling
run --model morning.model --minutes 120 "${day[@]}" --config bias.toml --report bias
run --model morning.model --minutes 120 "${day[@]}" --config drift.toml --adapt --report adapting
for q in 0 1 2 3 4 5 6 7; do
  from=$((15 * q))
  "$tool" simulate --out "upto-$q" --seed $((10 + q)) --minutes $((from + 10)) --channels 96 "${day[@]}" >/dev/null
  # Its last 10 minutes: the world at the start of quarter q.
  "$py" - "upto-$q" "calib-$q" <<'PY'
import numpy as np, shutil, sys, os
src, dst = sys.argv[1], sys.argv[2]
os.makedirs(dst, exist_ok=True)
shutil.copy(f"{src}/manifest.toml", dst)
for name in ("counts", "kinematics"):
    a = np.load(f"{src}/{name}.npy")
    np.save(f"{dst}/{name}.npy", a[-30000:])
PY
  rm -rf "upto-$q"
  "$tool" train --session "calib-$q" --decoder kalman --out "fresh-$q.model" --no-cv >/dev/null
  run --model "fresh-$q.model" --minutes 15 "${day[@]}" --world-from-min "$from" --report "fresh-$q"
done
run --model morning.model --minutes 30 --report still-off
run --model morning.model --minutes 30 --config drift.toml --report still-on
run --model morning.model --minutes 30 --config bias.toml --report still-bias

"$py" - <<'PY'
import json
def quarters(path, offset_min=0.0):
    trials = json.load(open(path + "/closed-loop.json"))["trials"]
    out = {}
    t = offset_min * 60
    for x in trials:
        q = int(t // 900)
        out.setdefault(q, []).append(x)
        t += x["trial_time_s"]
    return out
def cell(ts):
    if not ts:
        return "     —      "
    s = 100 * sum(x["success"] for x in ts) / len(ts)
    m = sum(x["trial_time_s"] for x in ts) / len(ts)
    return f"{s:5.1f} % {m:4.2f} s"
rows = [("morning", quarters("morning")), ("+ handling", quarters("handling")),
        ("+ bias", quarters("bias")), ("+ adaptation", quarters("adapting"))]
fresh = {}
for q in range(8):
    fresh[q] = quarters(f"fresh-{q}", 15 * q).get(q, [])
rows.append(("fresh", fresh))
print("minutes       " + "  ".join(f"{15*q:>3}–{15*q+15:<3}     " for q in range(8)))
for name, qs in rows:
    print(f"{name:<13} " + "  ".join(cell(qs.get(q, [])) for q in range(8)))
for name in ("still-off", "still-on", "still-bias"):
    t = json.load(open(name + "/closed-loop.json"))["trials"]
    print(f"stationary, handling {name[6:]:<4}: {cell(t)} over {len(t)} trials")
PY
