#!/usr/bin/env bash
# One run: the criterion decode-step benches (Kalman, point process), then
# the numpy step timings,
# printing the numpy-naive / Rust ratio per channel count.
# Usage: decoder-core/benches/compare_numpy.sh [PYTHON]
set -euo pipefail
here=$(cd "$(dirname "$0")" && pwd)
root=$(cd "$here/../.." && pwd)
python=${1:-python3}
target=${CARGO_TARGET_DIR:-$root/target}
cd "$root"
cargo bench -p decoder-core --bench decode -- 'decode_step/full/(96|192|1024)$'
"$python" "$here/numpy_step.py" "$target/criterion"
# The point-process step, against numpy vectorised over the channels.
cargo bench -p decoder-core --bench decode -- 'pp_step'
"$python" "$here/numpy_pp_step.py" "$target/criterion"
