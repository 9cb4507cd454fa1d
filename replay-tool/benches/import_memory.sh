#!/usr/bin/env bash
# Whole-process import of long NWB recordings written by pynwb (BENCHMARKS.md,
# "Import in bounded memory"): 192 units at about 20 Hz each, 60 and 120
# minutes. Prints, per file: its size, spike count, the median wall time and
# the peak RSS of `replay-tool import` over 5 runs. Peak RSS must not grow
# with the recording's length.
#
#   replay-tool/benches/import_memory.sh PYTHON [WORK_DIR]
#
# PYTHON needs pynwb (the reference virtual environment has it); writing
# the two files takes about two and a half minutes, once.
set -euo pipefail
here=$(cd "$(dirname "$0")" && pwd)
root=$(cd "$here/../.." && pwd)
python=${1:?usage: import_memory.sh PYTHON [WORK_DIR]}
work=${2:-/var/tmp/vdec-import-bench}
target=${CARGO_TARGET_DIR:-$root/target}
cd "$root"
cargo build --release -q -p replay-tool
tool="$target/release/replay-tool"
mkdir -p "$work"
cd "$work"
for minutes in 60 120; do
  file="long-$minutes.nwb"
  [ -f "$file" ] || "$python" "$here/make_long_nwb.py" "$file" "$minutes"
  walls=(); rss=0; said=""
  for _ in 1 2 3 4 5; do
    rm -rf imported
    line=$( { /usr/bin/time -f "%e %M" "$tool" import "$file" --out imported --bin-ms 20 > said.txt; } 2>&1 | tail -1)
    walls+=("${line% *}")
    r=${line#* }; [ "$r" -gt "$rss" ] && rss=$r
  done
  wall=$(printf '%s\n' "${walls[@]}" | sort -g | sed -n 3p)
  spikes=$(sed -n 's/.*(\([0-9]*\) spikes in range).*/\1/p' said.txt)
  size=$(du -m "$file" | cut -f1)
  echo "$minutes min: $size MB, $spikes spikes: import median ${wall} s, peak RSS $((rss / 1024)) MB"
done
rm -rf imported said.txt
