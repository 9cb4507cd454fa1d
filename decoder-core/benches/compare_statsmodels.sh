#!/usr/bin/env bash
# One run: fit 192 channels × 90 000 bins × 15 coefficients with our IRLS,
# then the same designs with statsmodels, printing times, the ratio and the
# coefficient agreement. Usage: decoder-core/benches/compare_statsmodels.sh [PYTHON]
set -euo pipefail
here=$(cd "$(dirname "$0")" && pwd)
root=$(cd "$here/../.." && pwd)
python=${1:-python3}
out=$(mktemp -d)
trap 'rm -rf "$out"' EXIT
cd "$root"
cargo bench -p decoder-core --bench glm_fit -- "$out"
"$python" "$here/glm_statsmodels.py" "$out"
