#!/usr/bin/env bash
# Whole-process replay of long blocks, against the numpy information-form
# loop on the same model in the same run (BENCHMARKS.md, "Replay at
# scale"). Prints, per block: bins, median wall time and peak RSS of
# `replay-tool replay` over 5 runs, bins/s, the numpy loop's wall time and
# the ratio, and the largest difference between the two sets of estimates.
#
#   replay-tool/benches/replay_throughput.sh PYTHON [WORK_DIR]
#
# PYTHON needs numpy (the reference virtual environment has it).
set -euo pipefail
here=$(cd "$(dirname "$0")" && pwd)
root=$(cd "$here/../.." && pwd)
python=${1:?usage: replay_throughput.sh PYTHON [WORK_DIR]}
work=${2:-/var/tmp/vdec-replay-bench}
target=${CARGO_TARGET_DIR:-$root/target}
cd "$root"
cargo build --release -q -p replay-tool
tool="$target/release/replay-tool"
mkdir -p "$work"
cd "$work"
[ -d cal ] || "$tool" simulate --out cal --minutes 5 --channels 192 >/dev/null
[ -f k.model ] || "$tool" train --session cal --decoder kalman --out k.model --no-cv >/dev/null
"$tool" model show k.model --json > k.json
for minutes in 60 240; do
  block="long-$minutes"
  if [ ! -d "$block" ]; then
    /usr/bin/time -f "simulate $minutes min: %e s, peak RSS %M KB" \
      "$tool" simulate --out "$block" --minutes "$minutes" --channels 192 --seed 4 >/dev/null
  fi
  bins=$("$python" -c "import numpy as np; print(np.load('$block/counts.npy', mmap_mode='r').shape[0])")
  walls=(); rss=0
  for _ in 1 2 3 4 5; do
    line=$( { /usr/bin/time -f "%e %M" "$tool" replay --session "$block" --model k.model --out est.npy >/dev/null; } 2>&1 | tail -1)
    walls+=("${line% *}")
    r=${line#* }; [ "$r" -gt "$rss" ] && rss=$r
  done
  wall=$(printf '%s\n' "${walls[@]}" | sort -g | sed -n 3p)
  np_line=$( { /usr/bin/time -f "%e %M" "$python" "$here/replay_numpy.py" k.json "$block" est-numpy.npy; } 2>&1 | tail -1)
  np_wall=${np_line% *}
  diff=$("$python" -c "import numpy as np; print('%.2e' % abs(np.load('est.npy') - np.load('est-numpy.npy')).max())")
  "$python" -c "
b, w, r, nw = $bins, $wall, $rss, $np_wall
print(f'{b} bins x 192 channels: replay-tool {w:.3f} s median of 5 ({b / w / 1e6:.2f} M bins/s), peak RSS {r / 1024:.1f} MB; numpy information form {nw:.2f} s; ratio {nw / w:.1f}x; largest difference $diff')
"
done
