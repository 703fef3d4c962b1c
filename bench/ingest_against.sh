#!/usr/bin/env bash
# Ingest load of this checkout against an earlier revision, runs alternating in
# one script so both see the same machine: builds REV's load bench in a
# temporary worktree, then runs `ingest_load` ROUNDS times for each and prints
# every run's JSON line and the median readings/s ratio (this ÷ REV).
#   bash bench/ingest_against.sh REV [ROUNDS] [GATEWAYS METERS DAYS]
set -euo pipefail
cd "$(dirname "$0")/.."
rev=${1:?usage: bench/ingest_against.sh REV [ROUNDS] [GATEWAYS METERS DAYS]}
rounds=${2:-3}
args=("${@:3}")
[ ${#args[@]} -gt 0 ] || args=(1000 4 1)
work=$(mktemp -d /tmp/meterveil-against.XXXXXX)
trap 'git worktree remove --force "$work/tree" >/dev/null 2>&1 || true; rm -rf "$work"' EXIT
git worktree add -q --detach "$work/tree" "$rev"
bench_exe() { # the load bench executable cargo builds in the current folder
    cargo bench -q -p meterveil-service --bench ingest_load --no-run --message-format=json 2>/dev/null |
        python3 -c 'import sys, json
for l in sys.stdin:
    m = json.loads(l)
    if m.get("reason") == "compiler-artifact" and m["target"]["name"] == "ingest_load" and m.get("executable"):
        print(m["executable"])'
}
now=$(bench_exe)
then=$(cd "$work/tree" && CARGO_TARGET_DIR="${AGAINST_TARGET_DIR:-$work/target}" bench_exe)
for i in $(seq "$rounds"); do
    printf 'this %s\n' "$("$now" "${args[@]}" | tail -1)" | tee -a "$work/runs"
    printf 'rev  %s\n' "$("$then" "${args[@]}" | tail -1)" | tee -a "$work/runs"
done
python3 - "$work/runs" <<'PY'
import json, statistics, sys
runs = {"this": [], "rev": []}
for line in open(sys.argv[1]):
    who, js = line.split(" ", 1)
    runs[who.strip()].append(json.loads(js))
med = {k: statistics.median(r["readings_per_s"] for r in v) for k, v in runs.items()}
cpu = {k: statistics.median(r["service_cpu_us_per_reading"] for r in v) for k, v in runs.items()}
print(json.dumps({"median_readings_per_s": med, "ratio_this_over_rev": med["this"] / med["rev"],
                  "median_service_cpu_us_per_reading": cpu, "cpu_ratio_this_over_rev": cpu["this"] / cpu["rev"]}))
PY
