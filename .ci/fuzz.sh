#!/usr/bin/env bash
# Runs every fuzz target in the repository (func FuzzXxx in a _test.go file)
# for a short fixed budget each, one after another, and prints the time each
# took. Exits non-zero if any target fails; a failing input is written by
# `go test` under the package's testdata/fuzz/FuzzXxx/ (commit it as a seed
# once the bug is fixed).
# Usage: .ci/fuzz.sh [FUZZTIME]   (default 5s; also $FUZZTIME)
# With FUZZ_UNTIL=T (seconds since the epoch) no target is started after T:
# the rest are listed as skipped, and the script still passes (CI sets it to
# keep its whole run inside its time limit on a machine with a cold build
# cache, where the first target's instrumented build takes minutes).
set -uo pipefail
cd "$(dirname "$0")/.."
budget=${1:-${FUZZTIME:-5s}}

mapfile -t targets < <(grep -r --include='*_test.go' -o '^func Fuzz[A-Za-z0-9_]*' . \
  | sed -E 's#^\./(.*)/[^/]*_test\.go:func (Fuzz[A-Za-z0-9_]*)$#\1 \2#' | sort -u)
if ((${#targets[@]} == 0)); then
  echo "fuzz: no targets found" >&2
  exit 1
fi

failed=()
races=0
log=$(mktemp)
# secs T: seconds since the $EPOCHREALTIME value T.
secs() { awk -v a="$1" -v b="$EPOCHREALTIME" 'BEGIN{printf "%.1f", b - a}'; }
total_start=$EPOCHREALTIME
skipped=()
for t in "${targets[@]}"; do
  pkg=${t% *}
  name=${t#* }
  if [ -n "${FUZZ_UNTIL:-}" ] && (( $(date +%s) >= FUZZ_UNTIL )); then
    skipped+=("$pkg $name")
    printf 'fuzz %-4s %-28s %-24s\n' skip "./$pkg" "$name"
    continue
  fi
  start=$EPOCHREALTIME
  if go test -run '^$' -fuzz "^${name}\$" -fuzztime "$budget" "./$pkg" >"$log" 2>&1; then
    status=ok
  elif grep -q '^    context deadline exceeded$' "$log" && ! grep -q 'Failing input written' "$log"; then
    # Go before 1.27: the coordinator can report its own -fuzztime deadline
    # as a failure, with no failing input (go.dev/issue/75804). A crash or
    # a failing check always writes its input (so does a hung input), so
    # this is not one.
    status='ok*'
    races=$((races + 1))
  else
    status=FAIL
    failed+=("$pkg $name")
    cat "$log"
  fi
  printf 'fuzz %-4s %-28s %-24s %6ss\n' "$status" "./$pkg" "$name" "$(secs "$start")"
done
rm -f "$log"
printf 'fuzz: %d target(s), %d failed, %ss in all (budget %s each)\n' \
  "${#targets[@]}" "${#failed[@]}" "$(secs "$total_start")" "$budget"
if ((${#skipped[@]})); then
  echo "fuzz: ${#skipped[@]} target(s) not started: past FUZZ_UNTIL (their seed corpora ran in go test)"
fi
if ((races)); then
  echo "fuzz: ok*: $races target(s) ended with Go's own deadline error and no failing input (go.dev/issue/75804), counted as passed"
fi
if ((${#failed[@]})); then
  printf 'fuzz: failed: %s\n' "${failed[@]}" >&2
  exit 1
fi
