#!/usr/bin/env bash
# Wall time and peak RSS of the store commands on a large model: push,
# push again (nothing new to store), pull, verify, show, and score of two
# rows (which loads the whole model), each a fresh process.
# Usage: bench/store_rss.sh [MIB]   (size of the tensor file, default 200)
set -euo pipefail
cd "$(dirname "$0")/.."
MIB=${1:-200}
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
go build -o "$tmp/modelgate" ./cmd/modelgate
go run ./bench/genmodel -mib "$MIB" -out "$tmp/model"
ls -l "$tmp/model/encoder.safetensors" | awk '{print $5, "bytes of tensors"}'
printf '{"row_id":1,"items":["show-0000001","show-0000002"],"values":[1,2]}\n{"row_id":2,"items":[],"values":[]}\n' > "$tmp/rows.jsonl"
export MODELGATE_STORE="$tmp/store"

run() { local what=$1; shift
  sync
  /usr/bin/time -v "$tmp/modelgate" -q "$@" 2> "$tmp/time.txt" >/dev/null || { cat "$tmp/time.txt" >&2; exit 1; }
  awk -F': ' -v w="$what" '/Elapsed \(wall clock\)/{t=$2} /Maximum resident set size/{r=$2} END{printf "%-14s wall %s, peak RSS %.1f MB\n", w, t, r/1024}' "$tmp/time.txt"; }

run push        push "$tmp/model" bench-encoder:v1
run "push again" push "$tmp/model" bench-encoder:v2
run pull        pull bench-encoder:v1 "$tmp/pulled"
run verify      verify
run show        show bench-encoder:v1
run score       score bench-encoder:v1 --holdout "$tmp/rows.jsonl" --out "$tmp/p.jsonl"
cmp "$tmp/model/encoder.safetensors" "$tmp/pulled/encoder.safetensors" && echo "pulled tensors identical to the pushed ones"
