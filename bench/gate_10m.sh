#!/usr/bin/env bash
# Gate over a 10,000,000-row Parquet holdout on the demo scorer (the
# gate's memory is bounded by the batch size, not by the holdout size; peak
# RSS must stay under 500 MB). Prints the wall time and peak RSS of one
# `gate` run (/usr/bin/time -v) and the holdout check's phases (read,
# forward, statistics) from the JSON report, and exits 1 if the peak RSS is
# over the limit. Generating the holdout takes minutes; the holdout, its
# copy in the store and the gate's local copy take about 3 x 600 MB of disk
# in a temporary directory, removed at the end.
# Usage: bench/gate_10m.sh [ROWS] [LIMIT_MB]
# With GATE_PROFILE=FILE the gate also writes a CPU profile there (--cpuprofile)
# and the script prints the profile's top functions (go tool pprof -top).
set -euo pipefail
cd "$(dirname "$0")/.."
ROWS=${1:-10000000}
LIMIT_MB=${2:-500}
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
export TMPDIR="$tmp"
load() { echo "load average $(cut -d' ' -f1-3 /proc/loadavg) on $(nproc) cores"; }
echo "before: $(load)"

go build -o "$tmp/modelgate" ./cmd/modelgate
export MODELGATE_STORE="$tmp/store"
"$tmp/modelgate" -q demo --work "$tmp/scenario" >/dev/null
model="$tmp/scenario/models/promo-scorer-better"
[ -d "$model" ] || model=$(ls -d "$tmp"/scenario/models/promo-scorer-* | head -1)

start=$(date +%s)
go run ./bench/genholdout -model "$model" -rows "$ROWS" -out "$tmp/gate.parquet"
echo "generated $ROWS rows in $(( $(date +%s) - start ))s: $(stat -c %s "$tmp/gate.parquet") bytes"
"$tmp/modelgate" -q push --kind holdout "$tmp/gate.parquet" promo-holdout:big >/dev/null
rm "$tmp/gate.parquet"

echo "gate, $ROWS rows: $(load)"
code=0
prof=()
[ -n "${GATE_PROFILE:-}" ] && prof=(--cpuprofile "$GATE_PROFILE")
/usr/bin/time -v "$tmp/modelgate" "${prof[@]}" -q gate --json promo-scorer:cand-better --to promo-scorer:prod \
  --holdout promo-holdout:big --no-push \
  >"$tmp/report.json" 2>"$tmp/time.txt" || code=$?
echo "after: $(load)"
if [ "$code" -ne 0 ] && [ "$code" -ne 1 ]; then
  echo "gate exited $code" >&2
  cat "$tmp/time.txt" >&2
  exit "$code"
fi
rss_kb=$(awk -F': ' '/Maximum resident set size/{print $2}' "$tmp/time.txt")
awk -F': ' '/Elapsed \(wall clock\)/{w=$2} /Maximum resident set size/{r=$2} /User time/{u=$2} /System time/{s=$2}
  END{printf "gate: wall %s, user %ss, system %ss, peak RSS %.1f MB\n", w, u, s, r/1024}' "$tmp/time.txt"
/usr/bin/python3 - "$tmp/report.json" "$code" <<'EOF'
import json, sys
r = json.load(open(sys.argv[1]))["report"]
print("verdict:", r["verdict"], "(exit %s)" % sys.argv[2], "; ".join(r.get("reasons") or []))
for c in r["checks"]:
    phases = c.get("phases") or {}
    extra = ", phases (s): " + ", ".join("%s %.2f" % kv for kv in phases.items()) if phases else ""
    print("  %-9s %7.2fs%s" % (c["name"], c["seconds"], extra))
EOF
if [ -n "${GATE_PROFILE:-}" ]; then
  go tool pprof -top -nodecount=12 "$tmp/modelgate" "$GATE_PROFILE" 2>/dev/null | sed -n 1,20p
fi
if (( rss_kb > LIMIT_MB * 1024 )); then
  echo "peak RSS $(( rss_kb / 1024 )) MB is over the $LIMIT_MB MB limit" >&2
  exit 1
fi
