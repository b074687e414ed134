#!/usr/bin/python3
"""Time the runtime benchmark workload in numpy/scipy (the peer baseline).

Usage: /usr/bin/python3 bench/runtime_numpy.py DIR [REPEATS]

DIR holds the workload that `go test -bench Forward` writes when
MODELGATE_BENCH_DUMP=DIR is set (workload.json plus raw little-endian
arrays), so numpy and Go compute the same model on the same rows. The
forward pass is the Go one in numpy terms: CSR build with duplicate ids
summed, log1p of the values, scipy CSR x dense for the sparse layer, OpenBLAS
sgemm for the dense layers, bias and relu in place, concat, sigmoid. Everything
is float32. Thread count: OPENBLAS_NUM_THREADS (scipy's sparse product is
single-threaded regardless); kernel choice: OPENBLAS_CORETYPE.

Prints one line: "numpy rows/s <median> max|p_numpy - p_go| <diff>".
"""

import json
import os
import sys
import time

import numpy as np
import scipy.sparse as sps


def main(d, repeats):
    with open(os.path.join(d, "workload.json")) as f:
        meta = json.load(f)
    files = meta["files"]

    def load(name, dtype):
        return np.fromfile(os.path.join(d, name), dtype=dtype).reshape(files[name])

    n, vocab = meta["rows"], meta["weightRows"]
    indptr = load("indptr.i32", "<i4")
    indices = load("indices.i32", "<i4")
    values = load("values.f32", "<f4")
    feats = load("features.f32", "<f4")
    w = {k: load(k + ".f32", "<f4") for k in ("w1", "b1", "w2", "b2", "w3", "b3", "w4", "b4")}
    p_go = load("p_go.f32", "<f4")

    def forward():
        # copy=True: sum_duplicates and log1p below work in place and must
        # not change the input arrays between repeats.
        x = sps.csr_matrix((values, indices, indptr), shape=(n, vocab), copy=True)
        x.sum_duplicates()
        np.log1p(x.data, out=x.data)
        h1 = x @ w["w1"]
        h1 += w["b1"]
        np.maximum(h1, 0, out=h1)
        code = h1 @ w["w2"]
        code += w["b2"]
        np.maximum(code, 0, out=code)
        joined = np.hstack([code, feats])
        h = joined @ w["w3"]
        h += w["b3"]
        np.maximum(h, 0, out=h)
        z = h @ w["w4"]
        z += w["b4"]
        return 1 / (1 + np.exp(-z[:, 0]))

    p = forward()  # warm-up
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        p = forward()
        times.append(time.perf_counter() - t0)
    med = float(np.median(times))
    diff = float(np.max(np.abs(p.astype(np.float64) - p_go.astype(np.float64))))
    print("numpy rows/s %.0f max|p_numpy - p_go| %.3g" % (n / med, diff))


if __name__ == "__main__":
    main(sys.argv[1], int(sys.argv[2]) if len(sys.argv) > 2 else 5)
