#!/usr/bin/env bash
# Evidence of quality (issue 4), measured side by side in one run: the demo
# pipeline (pipelines/demo.yaml, run by the real `tagwright` binary) and a
# rule-of-thumb baseline (Hampel filter, flatline rule, range limits, linear
# interpolation), both scored against the demo generator's truth over several
# seeds and fault sizes. Metrics and targets: docs/quality.md.
# Usage: bash core/benches/quality_vs_truth.sh [quality_bench options]
#   e.g. --seeds 1 --fault-scales 1.0        (default: seeds 1-5 x scales 0.7, 1.0, 1.5; 8 h)
#        --keep DIR                           (keep each case's export and run under DIR)
#        --json FILE                          (default: target/quality/quality.json)
set -euo pipefail
repo="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$repo"

cargo build --release -q -p tagwright-cli --bin tagwright
cargo build --release -q -p tagwright-tests --bin quality_bench
exec "$repo/target/release/quality_bench" --pipeline "$repo/pipelines/demo.yaml" "$@"
