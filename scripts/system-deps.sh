#!/usr/bin/env bash
# Install the Debian packages the test suite needs, if any are missing.
#
#   bash scripts/system-deps.sh           the test suite's packages (make test)
#   bash scripts/system-deps.sh --bench   those and the benchmarks' (make bench)
#
# With every package present it does nothing. As root it installs what is
# missing; otherwise it prints the one command to run and fails, so a missing
# package is never mistaken for a passing suite.
set -euo pipefail

# Space-separated Debian package names: postgresql for the store's tests (a
# throwaway server is started by tests/service/conftest.py); chromium for the
# dashboard's browser tests (tests/web, driven by Playwright: never
# `playwright install`, which downloads a browser of its own).
PACKAGES="postgresql chromium"
# The benchmarks' packages: wrk, the HTTP load generator of bench/bench_service.py.
BENCH_PACKAGES="wrk"

wanted="$PACKAGES"
for arg in "$@"; do
    case "$arg" in
        --bench) wanted="$wanted $BENCH_PACKAGES" ;;
        *)
            echo "system-deps: unknown argument: $arg (usage: system-deps.sh [--bench])" >&2
            exit 2
            ;;
    esac
done

missing=()
for pkg in $wanted; do
    if ! dpkg -s "$pkg" >/dev/null 2>&1; then
        missing+=("$pkg")
    fi
done

if [ "${#missing[@]}" -eq 0 ]; then
    exit 0
fi

if [ "$(id -u)" -eq 0 ]; then
    echo "system-deps: installing ${missing[*]}"
    export DEBIAN_FRONTEND=noninteractive
    apt-get update -qq
    apt-get install -y -qq "${missing[@]}"
else
    echo "system-deps: missing Debian packages: ${missing[*]}" >&2
    echo "system-deps: run: sudo apt-get install -y ${missing[*]}" >&2
    exit 1
fi
