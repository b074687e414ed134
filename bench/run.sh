#!/usr/bin/env bash
# Runs the runtime benchmark in Go and its numpy peer on the same workload and
# prints rows/s side by side. Usage: bench/run.sh [COUNT]
# COUNT (default 3) is how many runs each figure is the median of (go test -count for Go,
# separate processes for numpy).
# Needs Go and Debian's /usr/bin/python3 with numpy and scipy.
set -euo pipefail
cd "$(dirname "$0")/.."
count=${1:-3}
py=/usr/bin/python3
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

echo "Go: go test -run '^\$' -bench 'Forward\$' -cpu 1,2 -benchtime 5x -count $count ./internal/model/" >&2
MODELGATE_BENCH_DUMP=$work go test -run '^$' -bench 'Forward$' -cpu 1,2 -benchtime 5x -count "$count" ./internal/model/ | tee "$work/go.txt" >&2
echo "Go, densified: go test -run '^\$' -bench 'ForwardDensified' -cpu 1,2 -benchtime 2x -count $count ./internal/model/" >&2
go test -run '^$' -bench 'ForwardDensified' -cpu 1,2 -benchtime 2x -count "$count" ./internal/model/ | tee -a "$work/go.txt" >&2

for core in default SkylakeX; do
	for threads in 1 2; do
		for _ in $(seq "$count"); do
			if [ "$core" = default ]; then
				OPENBLAS_NUM_THREADS=$threads $py bench/runtime_numpy.py "$work" 5
			else
				OPENBLAS_CORETYPE=$core OPENBLAS_NUM_THREADS=$threads $py bench/runtime_numpy.py "$work" 5
			fi
		done | tee -a "$work/numpy-$core-$threads.txt" >&2
	done
done

$py - "$work" <<'PY'
import json, os, re, statistics, sys
d = sys.argv[1]
meta = json.load(open(os.path.join(d, "workload.json")))
go = {}
for line in open(os.path.join(d, "go.txt")):
    m = re.match(r"(BenchmarkForward\w*?)(-(\d+))?\s+\d+\s+.*?([\d.]+) rows/s", line)
    if m:
        go.setdefault((m.group(1), int(m.group(3) or 1)), []).append(float(m.group(4)))
kernel = "?"
for line in open(os.path.join(d, "go.txt")):
    m = re.search(r"kernel path (\S+),", line)
    if m:
        kernel = m.group(1)
def numpy(core, t):
    vals, diffs = [], []
    for line in open(os.path.join(d, "numpy-%s-%d.txt" % (core, t))):
        f = line.split()
        vals.append(float(f[2]))
        diffs.append(float(f[-1]))
    return statistics.median(vals), max(diffs)
med = lambda v: statistics.median(v) if v else float("nan")
rows = [
    ("Go runtime (kernel path %s)" % kernel, [med(go.get(("BenchmarkForward", t), [])) for t in (1, 2)]),
    ("Go, rows densified to 6,000 wide first", [med(go.get(("BenchmarkForwardDensified", t), [])) for t in (1, 2)]),
]
diff = 0.0
for core in ("default", "SkylakeX"):
    r = []
    for t in (1, 2):
        v, dd = numpy(core, t)
        r.append(v)
        diff = max(diff, dd)
    rows.append(("numpy+scipy+OpenBLAS, %s kernel" % ("default" if core == "default" else "OPENBLAS_CORETYPE=SkylakeX"), r))
best = [max(rows[2][1][i], rows[3][1][i]) for i in (0, 1)]
print("workload: %d rows, vocabulary %d, %d nonzeros; forward pass only (no loss)" % (meta["rows"], meta["vocab"], meta["nnz"]))
print("rows/s, median of %d runs (Go: go test -count; numpy: separate processes)" % len(go.get(("BenchmarkForward", 1), [])))
print("%-58s %12s %12s" % ("implementation", "1 thread", "2 threads"))
for name, (a, b) in rows:
    print("%-58s %12.0f %12.0f" % (name, a, b))
print("%-58s %11.2fx %11.2fx" % ("Go runtime / best numpy", rows[0][1][0] / best[0], rows[0][1][1] / best[1]))
print("largest |p_numpy - p_go| over all numpy runs: %.3g" % diff)
PY
