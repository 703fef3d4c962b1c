#!/usr/bin/env bash
# The full test suite, runnable on a fresh machine with only the Rust toolchain
# and CPython: it installs what its tests need itself (Debian's chromium, chromium-driver and
# postgresql, the Python reference packages), starts a private PostgreSQL server,
# and runs the end-to-end tests once per database backend.
set -euo pipefail
cd "$(dirname "$0")/.."

# Debian's Chromium and its WebDriver server for the dashboard's browser test.
if ! command -v chromium >/dev/null 2>&1 || ! command -v chromedriver >/dev/null 2>&1; then
    if [ "$(id -u)" = 0 ]; then apt_get="apt-get"; else apt_get="sudo apt-get"; fi
    $apt_get update -q
    DEBIAN_FRONTEND=noninteractive $apt_get install -y -q chromium chromium-driver
fi

venv=target/reference-venv
if [ ! -x "$venv/bin/python" ]; then
    python3 -m venv "$venv"
fi
"$venv/bin/python" -m pip install --quiet --disable-pip-version-check -r tests/reference/requirements.txt
export METERVEIL_PYTHON="$PWD/$venv/bin/python"

# Test populations the team did not design (CREST households, a mixed feeder, the
# UCI household in blocks), cached under target/reference-data by their
# parameters; on a fresh checkout about 3 minutes on 2 cores, made while the
# build below runs. The tests would make them too, one at a time.
(
    for kind in "crest --meters 300" "mixed --meters 500" "uci --meters 200"; do
        # shellcheck disable=SC2086
        "$METERVEIL_PYTHON" tests/reference/populations.py $kind >/dev/null
    done
) &
populations=$!

# A private PostgreSQL server (stopped when this script exits).
source scripts/test-postgres.sh

cargo fmt --all --check
# Every feature: the demo (the only target that links the gateway crate) included.
cargo clippy --workspace --all-targets --all-features -- -D warnings
cargo clippy -p meterveil-service --all-targets -- -D warnings
wait "$populations"
# Every test, the end-to-end ones on SQLite...
cargo test --workspace --all-features
# ...then the end-to-end tests (store, jobs, crash and SIGKILL tests) again on
# PostgreSQL, with the same features so that the build above is reused.
METERVEIL_TEST_BACKEND=postgres cargo test -p meterveil-service --all-features --test end_to_end
