#!/usr/bin/python3
"""Time the log loss over a batch in numpy (the peer of Go's BenchmarkLogLoss).

Usage: /usr/bin/python3 bench/logloss_numpy.py DIR [REPEATS]

DIR holds the batch that `go test -bench 'LogLoss$' ./internal/model/kernel/`
writes when MODELGATE_BENCH_DUMP=DIR is set: p.f32 and y.f32 (16,384 float32
predictions and labels, little-endian) and loss.txt (Go's LogLoss32 of them).
Times -(y*np.log(p) + (1-y)*np.log1p(-p)).mean() on the float32 arrays,
REPEATS (default 300) times after a warm-up, and keeps the best (the fastest
run, the most favourable figure for numpy). No clipping: the batch has no p
outside Go's clipping bounds, so both compute the same loss.

Prints one line: "numpy logloss rows/s <best> loss <numpy's> go <Go's> diff <|numpy - Go|>".
"""

import os
import sys
import time

import numpy as np


def main(d, repeats):
    p = np.fromfile(os.path.join(d, "p.f32"), dtype="<f4")
    y = np.fromfile(os.path.join(d, "y.f32"), dtype="<f4")
    with open(os.path.join(d, "loss.txt")) as f:
        go = float(f.read())

    def loss():
        return -(y * np.log(p) + (1 - y) * np.log1p(-p)).mean()

    value = loss()  # warm-up
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        value = loss()
        best = min(best, time.perf_counter() - t0)
    print("numpy logloss rows/s %.0f loss %.9g go %.9g diff %.3g" % (len(p) / best, value, go, abs(float(value) - go)))


if __name__ == "__main__":
    main(sys.argv[1], int(sys.argv[2]) if len(sys.argv) > 2 else 300)
