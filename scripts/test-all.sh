#!/usr/bin/env bash
# The full test suite, runnable on a fresh machine with only the Rust toolchain
# and CPython: it installs the Python reference packages it needs itself.
set -euo pipefail
cd "$(dirname "$0")/.."

# Debian's Chromium for the dashboard's browser test.
if ! command -v chromium >/dev/null 2>&1; then
    if [ "$(id -u)" = 0 ]; then apt_get="apt-get"; else apt_get="sudo apt-get"; fi
    $apt_get update -q
    DEBIAN_FRONTEND=noninteractive $apt_get install -y -q chromium
fi

venv=target/reference-venv
if [ ! -x "$venv/bin/python" ]; then
    python3 -m venv "$venv"
fi
"$venv/bin/python" -m pip install --quiet --disable-pip-version-check -r tests/reference/requirements.txt
export METERVEIL_PYTHON="$PWD/$venv/bin/python"

cargo fmt --all --check
cargo clippy --workspace --all-targets -- -D warnings
cargo test --workspace
