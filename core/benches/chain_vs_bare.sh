#!/usr/bin/env bash
# Speed of the whole cleaning chain (issue 4), measured side by side in one
# run on generated long-format files of TAGS x HOURS at 1 s (default
# 2,000 x 12 h, about 86 M rows):
#  - a bare arrow-rs read + write of the file (examples/bare_copy.rs, one thread);
#  - `tagwright run` with quality, range, faults and fill, parameters fitted
#    per tag on the run's window (two fit rounds), on 1 and on 2 threads;
#  - the same chain with the model parameters given in the pipeline (no fit);
#  - `carried`: the fitted chain with `--state`, its parameters carried from
#    an earlier shift of the same tags (a file of other draws, run untimed
#    first), as a scheduled run each shift does: each tag's fit then starts
#    from one point instead of a grid of starts.
# Speed = rows per second; the figure of merit is engine speed / bare speed
# (targets: >= 0.25 with fitting, >= 0.5 with parameters given).
# Each repetition runs the bare copy and then every case; the fastest of
# REPS repetitions of each is reported (the machines are shared and noisy).
# Every timed command writes to a fresh place, as a scheduled run writes a
# directory per shift: the previous repetition's output is deleted before
# the clock starts (deleting a gigabyte is a discard of its blocks on file
# systems mounted with `discard`, up to half a second here, and belongs to
# neither the copy nor the chain).
# Usage: [CASES='fit 2,given 2,carried 2'] [REPS=3] bash core/benches/chain_vs_bare.sh [HOURS] [TAGS...]
#   (defaults: fit, given and carried on 1 and 2 threads; 3 repetitions; 12 h; 2,000 tags)
# Files go to $BENCH_DIR (default: a temporary directory, removed at the end).
set -euo pipefail
repo="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$repo"
hours="${1:-12}"
reps="${REPS:-3}"
shift || true
tag_counts=("${@:-2000}")
# shellcheck disable=SC2206
tag_counts=(${tag_counts[*]})

cargo build --release -q -p tagwright-cli --bin tagwright
cargo build --release -q -p tagwright --example bare_copy --example gen_long
bin="$repo/target/release"
dir="${BENCH_DIR:-$(mktemp -d)}"
[ -n "${BENCH_DIR:-}" ] || trap 'rm -rf "$dir"' EXIT

# The generated tags wander as an AR(1) with phi 0.995 plus noise, all at
# one scale (core/examples/gen_long.rs --unit-scale); the given parameters
# are the generating ones, as parameters carried from earlier shifts would
# be. (With a scale per tag, one set of given parameters is wrong for most
# tags and the run spends its time on false alarms: that measures a
# misconfigured pipeline, not the chain.)
write_pipeline() {
    local faults="$1" fill="$2"
    cat <<YAML
version: 1
site: {timezone: UTC}
input: {format: long, columns: {tag: tag, time: ts, value: value, quality: quality}, quality: opc}
rules:
  - tags: "*"
    range: [-1000000, 1000000]
    period: 1s
    model: local-level+arma(1,0)
    steps: [quality, range, $faults, $fill]
YAML
}
params='{sigma2.obs: 0.0025, sigma2.level: 1.0e-10, phi.1: 0.995, sigma2.arma: 0.01}'
write_pipeline "faults" "fill" > "$dir/fit.yaml"
write_pipeline "faults: {params: $params}" "fill" > "$dir/given.yaml"

seconds() {
    local start end
    start=$(date +%s.%N)
    "$@" > "$dir/cmd.out" 2>&1 || { cat "$dir/cmd.out" >&2; exit 1; }
    end=$(date +%s.%N)
    awk -v a="$start" -v b="$end" 'BEGIN { printf "%.2f", b - a }'
}

printf '%-6s %-10s %-8s %-22s %-8s %-8s\n' tags rows bare_s run seconds speed_ratio
for tags in "${tag_counts[@]}"; do
    file="$dir/long_${tags}.parquet"
    "$bin/examples/gen_long" "$tags" "$hours" "$file" --unit-scale > /dev/null
    rows=$((tags * hours * 3600))
    IFS=, read -r -a cases <<< "${CASES:-fit 1,fit 2,given 1,given 2,carried 1,carried 2}"
    if [[ " ${cases[*]} " == *" carried "* ]]; then
        # The earlier shift: other draws of the same tags, fitted, state kept.
        "$bin/examples/gen_long" "$tags" "$hours" "$dir/earlier.parquet" --unit-scale --seed 7 > /dev/null
        rm -rf "$dir/earlier_state"
        "$bin/tagwright" run --pipeline "$dir/fit.yaml" --input "$dir/earlier.parquet" --out "$dir/earlier_run" \
            --state "$dir/earlier_state" > "$dir/cmd.out" 2>&1 || { cat "$dir/cmd.out" >&2; exit 1; }
        rm -rf "$dir/earlier.parquet" "$dir/earlier_run"
    fi
    # The generated file goes to disk before any timing: its writeback would
    # otherwise run during the first repetitions (seen: 0.1-0.4 s on a run).
    sync
    # Each repetition times the bare copy and then every case, so all of
    # them see the same machine; the fastest of each is reported.
    bare=""
    best=()
    for ((rep = 0; rep < reps; rep++)); do
        rm -f "$dir/copy.parquet"
        s=$(seconds "$bin/examples/bare_copy" "$file" "$dir/copy.parquet" zstd --reps 1 --only bare)
        bare=$(awk -v a="$s" -v b="$bare" 'BEGIN { print (b == "" || a < b) ? a : b }')
        for i in "${!cases[@]}"; do
            read -r kind threads <<< "${cases[$i]}"
            extra=()
            yaml="$kind"
            if [ "$kind" = carried ]; then
                rm -rf "$dir/state" && cp -r "$dir/earlier_state" "$dir/state"
                extra=(--state "$dir/state")
                yaml=fit
            fi
            rm -rf "$dir/run"
            s=$(seconds "$bin/tagwright" run --pipeline "$dir/$yaml.yaml" --input "$file" --out "$dir/run" --threads "$threads" "${extra[@]}")
            best[i]=$(awk -v a="$s" -v b="${best[$i]:-}" 'BEGIN { print (b == "" || a < b) ? a : b }')
        done
    done
    for i in "${!cases[@]}"; do
        read -r kind threads <<< "${cases[$i]}"
        ratio=$(awk -v a="${best[$i]}" -v b="$bare" 'BEGIN { printf "%.2f", b / a }')
        printf '%-6s %-10s %-8s %-22s %-8s %-8s\n' "$tags" "$rows" "$bare" "$kind params, $threads thr" "${best[$i]}" "$ratio"
    done
    rm -rf "$file" "$dir/copy.parquet" "$dir/run"
done
echo "speed_ratio = bare read+write seconds / engine seconds, fastest of $reps each (targets: >= 0.25 fitted, >= 0.5 given)."
