# Sourced by the simulated-session bench scripts: strict mode, the release
# replay-tool ($tool), the Python with numpy ($py), and the working folder
# (the script's first argument, else a fresh temporary one) as the current
# directory. Run from a script: `source "$(dirname "$0")/setup.sh" "$@"`.
set -euo pipefail
here=$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)
tool="${CARGO_TARGET_DIR:-$here/target}/release/replay-tool"
py="${VDEC_REFERENCE_PYTHON:-python3}"
w="${1:-$(mktemp -d)}"
mkdir -p "$w" && cd "$w"
