#!/usr/bin/env bash
# Time and peak RSS of `score` over a 2,000,000-row Parquet holdout and of
# `gate` over a 1,000,000-row holdout, on the demo scorer (issue figures:
# score under 300 MB peak RSS; gate time with the holdout check's split).
# Usage: bench/holdout_rss.sh [SCORE_ROWS] [GATE_ROWS]
set -euo pipefail
cd "$(dirname "$0")/.."
SCORE_ROWS=${1:-2000000}
GATE_ROWS=${2:-1000000}
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
go build -o "$tmp/modelgate" ./cmd/modelgate
export MODELGATE_STORE="$tmp/store"
"$tmp/modelgate" -q demo --work "$tmp/scenario" >/dev/null
model="$tmp/scenario/models/promo-scorer-better"
[ -d "$model" ] || model=$(ls -d "$tmp"/scenario/models/promo-scorer-* | head -1)
go run ./bench/genholdout -model "$model" -rows "$SCORE_ROWS" -out "$tmp/score.parquet"
go run ./bench/genholdout -model "$model" -rows "$GATE_ROWS" -out "$tmp/gate.parquet" -seed 2
ls -l "$tmp"/*.parquet | awk '{print $5, $9}'

rss() { /usr/bin/time -v "$@" 2> "$tmp/time.txt" >/dev/null || true
  awk -F': ' '/Elapsed \(wall clock\)/{w=$2} /Maximum resident set size/{r=$2} END{printf "wall %s, peak RSS %.1f MB\n", w, r/1024}' "$tmp/time.txt"; }

echo "score, $SCORE_ROWS rows:"
rss "$tmp/modelgate" score promo-scorer:cand-better --holdout "$tmp/score.parquet" --out "$tmp/p.parquet"
echo "score, $GATE_ROWS rows (the forward pass of one model in the gate):"
rss "$tmp/modelgate" score promo-scorer:cand-better --holdout "$tmp/gate.parquet" --out "$tmp/p2.parquet"
"$tmp/modelgate" -q push --kind holdout "$tmp/gate.parquet" promo-holdout:big >/dev/null
echo "gate, $GATE_ROWS rows:"
rss "$tmp/modelgate" gate promo-scorer:cand-better --to promo-scorer:prod --holdout promo-holdout:big --no-push
"$tmp/modelgate" gate --json promo-scorer:cand-better --to promo-scorer:prod --holdout promo-holdout:big --no-push \
  | /usr/bin/python3 -c 'import json,sys; r=json.load(sys.stdin)["report"]; print("check seconds:", {c["name"]: round(c["seconds"],3) for c in r["checks"]}); print("holdout phases (s):", {k: round(v,3) for c in r["checks"] for k, v in (c.get("phases") or {}).items()})' || true
