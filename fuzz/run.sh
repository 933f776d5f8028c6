#!/usr/bin/env bash
# Bounded coverage-guided fuzzing of the ingest decoder and the site config parser.
#
# Usage: bash fuzz/run.sh [SECONDS_PER_TARGET]     (default 60)
#
# Installs cargo-fuzz if it is missing, builds both targets (release, debug assertions and
# overflow checks on), runs each for SECONDS_PER_TARGET with the committed corpus and
# regressions as seeds, prints executions, exec/s and coverage per target, and exits non-zero
# if any target finds a crash, a panic (a broken property), a timeout or runs out of memory.
# New corpus entries go to fuzz/work/<target>/ (ignored by git); crash inputs to
# fuzz/artifacts/<target>/. The toolchain is stable: RUSTC_BOOTSTRAP=1 unlocks the nightly
# flags cargo-fuzz passes to rustc (sanitizer-coverage instrumentation).
set -euo pipefail

secs="${1:-60}"
if ! [[ "$secs" =~ ^[0-9]+$ ]] || [ "$secs" -lt 1 ]; then
    echo "usage: bash fuzz/run.sh [SECONDS_PER_TARGET] (a whole number >= 1, got '$secs')" >&2
    exit 2
fi
fuzz_dir="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
cd "$fuzz_dir/.."
export RUSTC_BOOTSTRAP=1
# cargo fuzz keeps its own target directory (fuzz/target); a CARGO_TARGET_DIR meant for the
# workspace would mix instrumented and plain builds.
unset CARGO_TARGET_DIR

if ! cargo fuzz --version >/dev/null 2>&1; then
    echo "fuzz/run.sh: installing cargo-fuzz" >&2
    cargo install cargo-fuzz --locked
fi

# Safe Rust under test: no address sanitizer (it costs exec/s for little gain here);
# -a turns on debug assertions and overflow checks, so an arithmetic overflow is a crash.
build_flags=(--sanitizer none -a)
start=$(date +%s)
cargo fuzz build "${build_flags[@]}"
echo "fuzz/run.sh: build took $(( $(date +%s) - start )) s"

status=0
for target in ingest_batch site_config; do
    case "$target" in
        ingest_batch) max_len=4096 ;;
        site_config) max_len=16384 ;;
    esac
    mkdir -p "fuzz/work/$target" "fuzz/artifacts/$target"
    log="fuzz/work/$target.log"
    echo "fuzz/run.sh: $target for $secs s"
    # The first corpus directory receives new inputs; the committed ones are only read.
    if cargo fuzz run "${build_flags[@]}" "$target" \
        "fuzz/work/$target" "fuzz/corpus/$target" "fuzz/regressions/$target" -- \
        -max_total_time="$secs" -max_len="$max_len" -timeout=10 -rss_limit_mb=2048 \
        -dict="fuzz/dicts/$target.dict" -print_final_stats=1 \
        -artifact_prefix="fuzz/artifacts/$target/" >"$log" 2>&1; then
        result=ok
    else
        result=FAILED
        status=1
    fi
    execs=$(sed -n 's/^stat::number_of_executed_units: *//p' "$log" | tail -1)
    rate=$(sed -n 's/^stat::average_exec_per_sec: *//p' "$log" | tail -1)
    cov=$(grep -Eo 'cov: [0-9]+ ft: [0-9]+' "$log" | tail -1 || true)
    echo "fuzz/run.sh: $target: $result; ${execs:-?} executions, ${rate:-?} exec/s, ${cov:-no coverage line}"
    if [ "$result" = FAILED ]; then
        echo "fuzz/run.sh: $target failed; the end of its log ($log):" >&2
        tail -n 40 "$log" >&2
        ls -l "fuzz/artifacts/$target" >&2 || true
    fi
done
echo "fuzz/run.sh: total $(( $(date +%s) - start )) s"
exit "$status"
