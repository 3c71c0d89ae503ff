#!/usr/bin/env bash
# Speed comparison of tagwright's state-space core against statsmodels.
# Builds the Rust timing example in release mode, makes sure the Python
# virtual environment at .venv has the pinned reference requirements, then
# runs core/benches/vs_statsmodels.py (extra arguments are passed through,
# e.g. --quick or --json-out FILE).
set -euo pipefail

repo="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$repo"

cargo build --release -p tagwright --example ssm_timing

venv="$repo/.venv"
req="$repo/tests/reference/requirements.txt"
stamp="$venv/.tagwright-requirements"
if [ ! -x "$venv/bin/python" ]; then
    python3 -m venv "$venv"
fi
if [ ! -f "$stamp" ] || ! cmp -s "$req" "$stamp"; then
    "$venv/bin/pip" install --quiet -r "$req"
    cp "$req" "$stamp"
fi

export TIMING_BIN="${TIMING_BIN:-$repo/target/release/examples/ssm_timing}"
exec "$venv/bin/python" "$repo/core/benches/vs_statsmodels.py" "$@"
