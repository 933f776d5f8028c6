#!/usr/bin/env bash
# Validate everything under deploy/ with the real tools; exit non-zero on any failure.
#
#   bash deploy/check.sh
#
# Needs (Debian packages): prometheus (for /usr/bin/promtool), python3 and python3-yaml;
# systemd (for systemd-analyze) is optional: its checks run when it is installed.
# PLOTWEAVE_BIN=path/to/plotweave adds a scrape of a running `plotweave demo` (every metric
# the alert rules use must exist), `plotweave check` of the Kubernetes site config, and lets
# systemd-analyze verify the unit against the real binary; without it, a built
# target/{debug,release}/plotweave (or the tests' plotweave-under-test) is used when one exists.
#
# The Containerfile is not built here (that needs a container engine); see its header.

set -uo pipefail

here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
root="$(cd "$here/.." && pwd)"
failed=0
passed=0

step() {
    local name="$1"
    shift
    echo "== $name"
    if "$@"; then
        passed=$((passed + 1))
        echo "ok: $name"
    else
        failed=$((failed + 1))
        echo "FAILED: $name"
    fi
}

need() {
    if ! command -v "$1" >/dev/null 2>&1; then
        echo "FAILED: $1 not found ($2)"
        failed=$((failed + 1))
        return 1
    fi
}

if [[ -z "${PLOTWEAVE_BIN:-}" ]]; then
    target="${CARGO_TARGET_DIR:-$root/target}"
    # The newest of the builds there; plotweave-under-test is the same main.rs, built by
    # `cargo test` for the end-to-end tests.
    newest=""
    for candidate in "$target/debug/plotweave" "$target/release/plotweave" \
        "$target/debug/plotweave-under-test"; do
        if [[ -x "$candidate" && ( -z "$newest" || "$candidate" -nt "$newest" ) ]]; then
            newest="$candidate"
        fi
    done
    PLOTWEAVE_BIN="$newest"
fi
if [[ -n "${PLOTWEAVE_BIN:-}" ]]; then
    echo "plotweave binary: $PLOTWEAVE_BIN"
    export PLOTWEAVE_BIN
else
    echo "plotweave binary: none (set PLOTWEAVE_BIN to include the checks that run it)"
fi

# ---- Prometheus ---------------------------------------------------------------------------
if need promtool "apt-get install prometheus"; then
    step "promtool check config prometheus.yml" \
        promtool check config "$here/prometheus/prometheus.yml"
    step "promtool check rules alerts.yml" \
        promtool check rules "$here/prometheus/alerts.yml"
    step "promtool test rules alerts_test.yml" \
        promtool test rules "$here/prometheus/alerts_test.yml"
fi
if [[ -n "${PLOTWEAVE_BIN:-}" ]] && command -v python3 >/dev/null 2>&1; then
    step "alert rules use only metrics the binary exposes" \
        python3 "$here/prometheus/check_metric_names.py"
else
    echo "skipped: metric names of the rules against a running demo (needs PLOTWEAVE_BIN and python3)"
fi

# ---- Kubernetes manifests -----------------------------------------------------------------
if need python3 "apt-get install python3 python3-yaml"; then
    if python3 -c 'import yaml, tomllib' 2>/dev/null; then
        step "Kubernetes manifests parse and agree" python3 "$here/k8s/check_manifests.py"
    else
        echo "FAILED: python3 lacks yaml (apt-get install python3-yaml) or tomllib (Python >= 3.11)"
        failed=$((failed + 1))
    fi
fi

# ---- systemd ------------------------------------------------------------------------------
verify_unit() {
    # verify also checks that ExecStart's binary exists, so check a copy whose ExecStart
    # points at the real binary when there is one (else at /bin/true: the rest still counts).
    local tmp rc exe
    tmp="$(mktemp -d)"
    exe="${PLOTWEAVE_BIN:-/bin/true}"
    sed "s|^ExecStart=/usr/local/bin/plotweave|ExecStart=$exe|" \
        "$here/systemd/plotweave.service" >"$tmp/plotweave.service"
    # verify prints problems but may still exit 0 for some of them: fail on any output.
    local out
    out="$(cd "$tmp" && SYSTEMD_LOG_LEVEL=notice systemd-analyze verify --man=no ./plotweave.service 2>&1)"
    rc=$?
    rm -rf "$tmp"
    [[ -n "$out" ]] && echo "$out"
    [[ $rc -eq 0 && -z "$out" ]]
}
security_unit() {
    # The exposure score of the hardening (0 = fully locked down, 10 = none); 1.1 today.
    # --threshold counts in tenths of the printed score (systemd 252): 20 = exposure 2.0.
    systemd-analyze security --offline=yes --threshold=20 "$here/systemd/plotweave.service" \
        | tail -n 1
    return "${PIPESTATUS[0]}"
}
if command -v systemd-analyze >/dev/null 2>&1; then
    step "systemd-analyze verify plotweave.service" verify_unit
    step "systemd-analyze security plotweave.service (exposure <= 2)" security_unit
else
    echo "skipped: systemd-analyze not installed (apt-get install systemd)"
fi

echo "deploy: $passed passed, $failed failed"
[[ $failed -eq 0 ]]
