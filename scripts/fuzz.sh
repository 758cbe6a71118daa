#!/usr/bin/env bash
# Fuzzes the input reader and validation with cargo-fuzz (libFuzzer).
#
#   scripts/fuzz.sh [SECONDS]     run each fuzz target for SECONDS (default 60)
#
# Environment: TARGETS (default "read_file compare_pair"), SANITIZER
# (address | none, default address), JOBS (build jobs, default 1).
# Needs cargo-fuzz (`cargo install cargo-fuzz`). On a stable toolchain the
# sanitizer flags need RUSTC_BOOTSTRAP=1, which this script sets.
# Findings land in fuzz/artifacts/TARGET/; the script exits 1 if there are any.
set -euo pipefail

cd "$(dirname "$0")/.."
secs="${1:-60}"
targets="${TARGETS:-read_file compare_pair}"
sanitizer="${SANITIZER:-address}"
export RUSTC_BOOTSTRAP=1
export CARGO_BUILD_JOBS="${JOBS:-1}"

if ! cargo fuzz --version >/dev/null 2>&1; then
    echo "fuzz.sh: cargo-fuzz is missing: cargo install cargo-fuzz" >&2
    exit 2
fi

# Seeds are added to the corpus (never replacing what earlier runs found).
python3 fuzz/make_seeds.py fuzz/corpus

# -a: debug assertions, so integer overflow is caught as well.
for t in $targets; do
    cargo fuzz build -a -s "$sanitizer" "$t"
done

status=0
for t in $targets; do
    mkdir -p "fuzz/artifacts/$t"
    before=$(find "fuzz/artifacts/$t" -type f | wc -l)
    echo "== $t: ${secs}s"
    cargo fuzz run -a -s "$sanitizer" "$t" "fuzz/corpus/$t" -- \
        -max_total_time="$secs" -dict=fuzz/safetensors.dict -max_len=4096 \
        -timeout=10 -rss_limit_mb=2048 -print_final_stats=1 2>&1 |
        grep -E "^(#[0-9]+[[:space:]]+(DONE|INITED)|stat::number_of_executed_units|stat::peak_rss|==[0-9]+==ERROR|SUMMARY|thread .* panicked|artifact_prefix|Test unit written)" || true
    after=$(find "fuzz/artifacts/$t" -type f | wc -l)
    corpus=$(find "fuzz/corpus/$t" -type f | wc -l)
    echo "== $t: corpus $corpus inputs, $((after - before)) new findings in fuzz/artifacts/$t"
    if [ "$after" -gt "$before" ]; then
        status=1
    fi
done
exit $status
