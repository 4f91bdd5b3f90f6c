#!/usr/bin/env bash
# Builds plumbline (release), installs the peer's pinned requirements into a
# virtual environment beside this script, and runs compare.py; every argument
# is passed on to compare.py (see `compare.py --help`).
set -euo pipefail
here=$(cd "$(dirname "$0")" && pwd)
root=$(cd "$here/../.." && pwd)
venv=${PEER_VENV:-$here/.venv}
python=${PYTHON:-python3}
if [ ! -x "$venv/bin/python" ]; then
    "$python" -m venv "$venv"
fi
"$venv/bin/pip" install -q -r "$here/requirements.txt"
cargo build --release --manifest-path "$root/Cargo.toml"
exec "$venv/bin/python" "$here/compare.py" --binary "$root/target/release/plumbline" "$@"
