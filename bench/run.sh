#!/usr/bin/env bash
# Runs the runtime benchmark in Go and its numpy peers on the same workload,
# interleaved, and prints rows/s side by side with the ratios, plus the dense
# layers' GFLOP/s as a share of the FMA peak measured in the same run, and,
# on one thread, the log loss over a batch in Go (kernel.LogLoss32) against
# numpy's float32 expression.
# Usage: bench/run.sh [ROUNDS]
# ROUNDS (default 5): each round runs every implementation once per thread
# count (1, then 2), one after another, and records the load average before
# each; figures are medians over the rounds, and each ratio is the median of
# the ratios within a round (peers measured seconds apart).
# Needs Go and Debian's /usr/bin/python3 with numpy and scipy.
set -euo pipefail
cd "$(dirname "$0")/.."
rounds=${1:-5}
py=/usr/bin/python3
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

echo "building the benchmark binaries (go test -c ./internal/model/ ./internal/model/kernel/)" >&2
go test -c -o "$work/model.test" ./internal/model/
go test -c -o "$work/kernel.test" ./internal/model/kernel/
echo "writing the workload for numpy (BenchmarkForward with MODELGATE_BENCH_DUMP)" >&2
mkdir "$work/wl"
MODELGATE_BENCH_DUMP=$work/wl "$work/model.test" -test.run '^$' -test.bench 'Forward$' -test.cpu 1 -test.benchtime 1x -test.v >"$work/dump.txt"
echo "writing the log loss batch for numpy (BenchmarkLogLoss with MODELGATE_BENCH_DUMP)" >&2
mkdir "$work/ll"
MODELGATE_BENCH_DUMP=$work/ll "$work/kernel.test" -test.run '^$' -test.bench 'LogLoss$' -test.cpu 1 -test.benchtime 1x >/dev/null

gobench() { # FILE BINARY ARGS...: one go benchmark run, appended to FILE
	local f=$1 bin=$2
	shift 2
	"$bin" -test.run '^$' "$@" >>"$f"
}
for r in $(seq "$rounds"); do
	for t in 1 2; do
		d=$work/r$r-t$t
		mkdir "$d"
		cut -d' ' -f1-3 /proc/loadavg >"$d/load"
		echo "round $r, $t thread(s), load average $(cat "$d/load")" >&2
		gobench "$d/go.txt" "$work/model.test" -test.bench 'Forward$' -test.cpu "$t" -test.benchtime 5x
		OPENBLAS_NUM_THREADS=$t $py bench/runtime_numpy.py "$work/wl" 5 >"$d/numpy-default.txt"
		OPENBLAS_CORETYPE=SkylakeX OPENBLAS_NUM_THREADS=$t $py bench/runtime_numpy.py "$work/wl" 5 >"$d/numpy-SkylakeX.txt"
		gobench "$d/go.txt" "$work/model.test" -test.bench 'ForwardDensified' -test.cpu "$t" -test.benchtime 1x
		# The FMA peak just before and just after the dense layers: each round's
		# share is taken against the mean of the two.
		gobench "$d/peak.txt" "$work/kernel.test" -test.bench 'FMAPeak' -test.cpu "$t" -test.benchtime 300x
		gobench "$d/kernel.txt" "$work/kernel.test" -test.bench 'DenseLayers' -test.cpu "$t" -test.benchtime 20x
		gobench "$d/peak.txt" "$work/kernel.test" -test.bench 'FMAPeak' -test.cpu "$t" -test.benchtime 300x
		if [ "$t" = 1 ]; then
			# The log loss over a batch: one thread on both sides (numpy's
			# ufuncs are single-threaded), the fastest of 300 calls on each.
			gobench "$d/logloss.txt" "$work/kernel.test" -test.bench 'LogLoss$' -test.cpu 1 -test.benchtime 300x
			$py bench/logloss_numpy.py "$work/ll" 300 >"$d/logloss-numpy.txt"
		fi
		cut -d' ' -f1-3 /proc/loadavg >"$d/load-after"
		cat "$d/go.txt" "$d/numpy-default.txt" "$d/numpy-SkylakeX.txt" "$d/peak.txt" "$d/kernel.txt" "$d"/logloss*.txt 2>/dev/null | grep -E 'rows/s|GFLOP/s' >&2 || true
	done
done

$py - "$work" "$rounds" <<'PY'
import json, os, re, statistics, sys
d, rounds = sys.argv[1], int(sys.argv[2])
meta = json.load(open(os.path.join(d, "wl", "workload.json")))
dump = open(os.path.join(d, "dump.txt")).read()
kernel = re.search(r"kernel path (\S+),", dump)
kernel = kernel.group(1) if kernel else "?"
cpu = re.search(r"^cpu: (.*)$", dump, re.M)
cpu = cpu.group(1).strip() if cpu else "?"

def metric(text, name, unit):
    m = re.search(r"^%s(-\d+)?\s+\d+\s+.*?([\d.]+) %s" % (re.escape(name), re.escape(unit)), text, re.M)
    return float(m.group(2)) if m else float("nan")

rows = {}   # (impl, threads) -> [per-round values]
ratio = {}  # threads -> [per-round Go / best numpy]
share = {}  # (layer, threads) -> [per-round GFLOP/s / peak]
ll = {"go": [], "numpy": [], "ratio": []}  # log loss, one thread, per round
lldiff = 0.0
gflops = {}
loads = []
diff = 0.0
for r in range(1, rounds + 1):
    for t in (1, 2):
        p = os.path.join(d, "r%d-t%d" % (r, t))
        go = open(os.path.join(p, "go.txt")).read()
        ker = open(os.path.join(p, "kernel.txt")).read()
        loads.append((r, t, open(os.path.join(p, "load")).read().strip(), open(os.path.join(p, "load-after")).read().strip()))
        v = {"go": metric(go, "BenchmarkForward", "rows/s"), "dense": metric(go, "BenchmarkForwardDensified", "rows/s")}
        for core in ("default", "SkylakeX"):
            f = open(os.path.join(p, "numpy-%s.txt" % core)).read().split()
            v[core] = float(f[2])
            diff = max(diff, float(f[-1]))
        for k, x in v.items():
            rows.setdefault((k, t), []).append(x)
        ratio.setdefault(t, []).append(v["go"] / max(v["default"], v["SkylakeX"]))
        peaks = [float(m.group(2)) for m in re.finditer(r"^BenchmarkFMAPeak(-\d+)?\s+\d+\s+.*?([\d.]+) GFLOP/s", open(os.path.join(p, "peak.txt")).read(), re.M)]
        peak = statistics.mean(peaks) if peaks else float("nan")
        gflops.setdefault(("peak", t), []).append(peak)
        if t == 1:
            g = metric(open(os.path.join(p, "logloss.txt")).read(), "BenchmarkLogLoss", "rows/s")
            f = open(os.path.join(p, "logloss-numpy.txt")).read().split()
            ll["go"].append(g)
            ll["numpy"].append(float(f[3]))
            ll["ratio"].append(g / float(f[3]))
            lldiff = max(lldiff, float(f[-1]))
        for layer in ("code-768x128", "head-144x48"):
            g = metric(ker, "BenchmarkDenseLayers/" + layer, "GFLOP/s")
            gflops.setdefault((layer, t), []).append(g)
            share.setdefault((layer, t), []).append(g / peak)

med = statistics.median
nnz = meta["nnz"] / meta["rows"]
print("workload: %d rows, %d shows + the unknown bucket, %.2f nonzeros per row; forward pass only (no loss)" % (meta["rows"], meta["shows"], nnz))
print("CPU: %s; kernel path %s; %d interleaved rounds" % (cpu, kernel, rounds))
print()
print("rows/s, median over the rounds")
print("%-52s %12s %12s" % ("implementation", "1 thread", "2 threads"))
for key, name in (("go", "Go runtime"),
                  ("dense", "Go, rows densified to %d wide first" % meta["weightRows"]),
                  ("default", "numpy+scipy+OpenBLAS, default kernel"),
                  ("SkylakeX", "numpy+scipy+OpenBLAS, OPENBLAS_CORETYPE=SkylakeX")):
    print("%-52s %12.0f %12.0f" % (name, med(rows[(key, 1)]), med(rows[(key, 2)])))
print("%-52s %11.2fx %11.2fx" % ("Go runtime / best numpy (median of round ratios)", med(ratio[1]), med(ratio[2])))
for t in (1, 2):
    print("  ratio in each round, %d thread(s): %s" % (t, " ".join("%.2f" % x for x in ratio[t])))
print()
print("dense layers (BenchmarkDenseLayers, all rows) against the FMA peak (BenchmarkFMAPeak just before and after), GFLOP/s, medians")
print("%-52s %12s %12s" % ("", "1 thread", "2 threads"))
print("%-52s %12.1f %12.1f" % ("FMA peak", med(gflops[("peak", 1)]), med(gflops[("peak", 2)])))
for layer in ("code-768x128", "head-144x48"):
    print("%-52s %12.1f %12.1f" % (layer, med(gflops[(layer, 1)]), med(gflops[(layer, 2)])))
    print("%-52s %11.0f%% %11.0f%%" % ("  share of peak (median of round shares)", 100 * med(share[(layer, 1)]), 100 * med(share[(layer, 2)])))
print()
llrows = os.path.getsize(os.path.join(d, "ll", "p.f32")) // 4
print("log loss over a batch of %d rows (BenchmarkLogLoss, bench/logloss_numpy.py), one thread, rows/s, medians" % llrows)
print("%-52s %12.0f" % ("Go kernel.LogLoss32, fastest of 300 calls", med(ll["go"])))
print("%-52s %12.0f" % ("numpy float32, fastest of 300 calls", med(ll["numpy"])))
print("%-52s %11.2fx" % ("Go / numpy (median of round ratios)", med(ll["ratio"])))
print("  ratio in each round: %s" % " ".join("%.2f" % x for x in ll["ratio"]))
print("largest |loss_numpy - loss_go| over the rounds: %.3g" % lldiff)
print()
print("load average (1, 5, 15 min) before and after each round's runs:")
for r, t, a, b in loads:
    print("  round %d, %d thread(s): %s -> %s" % (r, t, a, b))
print("largest |p_numpy - p_go| over all numpy runs: %.3g" % diff)
PY
