#!/usr/bin/env bash
# One recovery iteration, Rust against the numpy/scipy reference, in the same run,
# plus a full Rust fit; prints both JSON lines and the speed ratio.
# usage: bench/iteration_speed.sh [M N RANK]   (default 10000 2880 50)
set -euo pipefail
cd "$(dirname "$0")/.."
m=${1:-10000}; n=${2:-2880}; r=${3:-50}
py=${METERVEIL_PYTHON:-target/reference-venv/bin/python}
rust=$(cargo bench -q -p meterveil-shared --bench recovery_speed -- "$m" "$n" "$r" fit 2>/dev/null | tail -n 1)
ref=$("$py" bench/iteration_speed.py "$m" "$n" "$r")
echo "$rust"
echo "$ref"
"$py" - "$rust" "$ref" <<'PY'
import json, sys
a, b = json.loads(sys.argv[1]), json.loads(sys.argv[2])
print(f"one iteration at {a['m']}x{a['n']} rank {a['rank']}: Rust {a['rust_iteration_s']:.3f} s, numpy {b['numpy_iteration_s']:.3f} s, "
      f"Rust is {b['numpy_iteration_s'] / a['rust_iteration_s']:.1f}x faster; full fit {a['fit']['wall_s']:.1f} s "
      f"({a['fit']['iterations']} iterations); peak memory {a['peak_rss_over_dense_matrix']:.1f}x one dense matrix")
PY
