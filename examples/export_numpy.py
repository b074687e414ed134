#!/usr/bin/env python3
"""Write a modelgate model directory from numpy arrays.

The example fits a small listener encoder for a fictional podcast network in
numpy (a PCA of log1p episodes played: a linear autoencoder at its optimum)
and writes it as a model directory that `modelgate push` accepts:

    spec.json            the spec (schemas/spec.schema.json)
    encoder.safetensors  enc.w [V+1, K] (row V: the unknown-id bucket, zeros), enc.b [K]
    decoder.safetensors  dec.b [V+1]
    vocabulary.txt       one show id per line; line i names weight row i
    stats.json           rows and nonzeros-per-row quantiles of the training data
    probes.jsonl         probe inputs with the code and reconstruction numpy computed

Needs only numpy. The safetensors files are written by hand, following the
format's published layout: an unsigned 64-bit little-endian header length N,
N bytes of JSON header (padded with spaces), then the tensors' bytes in C
order, little-endian.

Usage: python3 export_numpy.py OUT_DIR [--seed N] [--shows V] [--listeners N] [--code K]
"""

import argparse
import hashlib
import json
import os
import struct

import numpy as np

UNKNOWN = "show-99999"  # an id outside the catalogue: probes use it


def write_safetensors(path, tensors, metadata=None):
    """Write [(name, array)] as float32 tensors, in the given order."""
    header, chunks, offset = {}, [], 0
    for name, arr in tensors:
        a = np.ascontiguousarray(arr, dtype="<f4")
        b = a.tobytes(order="C")
        header[name] = {"dtype": "F32", "shape": list(a.shape), "data_offsets": [offset, offset + len(b)]}
        chunks.append(b)
        offset += len(b)
    if metadata:
        header["__metadata__"] = metadata
    h = json.dumps(header, separators=(",", ":")).encode("utf-8")
    h += b" " * (-len(h) % 8)  # the buffer starts 8-byte aligned
    with open(path, "wb") as f:
        f.write(struct.pack("<Q", len(h)))
        f.write(h)
        f.write(b"".join(chunks))


def generate(rng, listeners, shows, latent=4):
    """Episodes played per (listener, show): a few tastes, Zipf-like popularity.

    The figures are the demo's listening model (internal/demo/listening),
    invented for the demo: a listener follows 1 + Poisson(0.9 x sessions per
    week) shows (sessions 2 x Gamma(2, 1)), at most 60; popularity rank^-1.05;
    a median of about 2.5 episodes played per show, at most 300.
    """
    pop = 1.0 / np.arange(1, shows + 1) ** 1.05
    taste = rng.normal(size=(latent, shows))
    rows = []
    for _ in range(listeners):
        u = rng.normal(size=latent)
        w = pop * np.exp(u @ taste)
        n = min(1 + rng.poisson(0.9 * 2 * rng.gamma(2.0)), 60)
        picked = rng.choice(shows, size=min(n, shows), replace=False, p=w / w.sum())
        counts = np.minimum(300, np.maximum(1, np.round(np.exp(0.9 + 1.0 * rng.normal(size=len(picked))))))
        rows.append((picked, counts))
    return rows


def pca(x, k):
    """Top-k components of x's centred columns, largest-|entry| positive."""
    mean = x.mean(axis=0)
    _, s, vt = np.linalg.svd(x - mean, full_matrices=False)
    comps = vt[:k].copy()
    for c in comps:
        if c[np.argmax(np.abs(c))] < 0:
            c *= -1
    return mean, comps, s[:k] ** 2 / (x.shape[0] - 1)


def forward(vocab_index, w, b, dec_b, items, values):
    """The encoder in float64 on the stored float32 weights: ids through the
    vocabulary (unknown ids to the bucket), duplicates summed, log1p."""
    rows = w.shape[0]
    summed = np.zeros(rows)
    for item, v in zip(items, values):
        summed[vocab_index.get(item, rows - 1)] += v
    x = np.log1p(summed)
    w64, b64, d64 = w.astype(np.float64), b.astype(np.float64), dec_b.astype(np.float64)
    code = x @ w64 + b64
    return code, code @ w64.T + d64


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("out")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--shows", type=int, default=60)
    ap.add_argument("--listeners", type=int, default=2000)
    ap.add_argument("--code", type=int, default=4)
    ap.add_argument("--created", default="2026-01-20T12:00:00Z")
    args = ap.parse_args()

    rng = np.random.default_rng(args.seed)
    vocab = ["show-%05d" % j for j in range(args.shows)]
    index = {s: i for i, s in enumerate(vocab)}
    rows = generate(rng, args.listeners, args.shows)
    x = np.zeros((len(rows), args.shows))
    for r, (picked, counts) in enumerate(rows):
        x[r, picked] = np.log1p(counts)
    mean, comps, variance = pca(x, args.code)

    v, k = args.shows, args.code
    w = np.zeros((v + 1, k), dtype=np.float32)
    w[:v] = comps.T
    b = (-(mean @ w[:v].astype(np.float64))).astype(np.float32)
    dec_b = np.zeros(v + 1, dtype=np.float32)
    dec_b[:v] = mean

    os.makedirs(args.out, exist_ok=True)
    path = lambda name: os.path.join(args.out, name)
    write_safetensors(path("encoder.safetensors"), [("enc.w", w), ("enc.b", b)])
    write_safetensors(path("decoder.safetensors"), [("dec.b", dec_b)])
    with open(path("vocabulary.txt"), "w", encoding="utf-8", newline="\n") as f:
        f.write("".join(s + "\n" for s in vocab))

    nnz = np.array([len(p) for p, _ in rows], dtype=np.float64)
    q = np.quantile(nnz, [0.5, 0.9, 0.99])  # numpy's default: linear (type 7)
    stats = {"rows": len(rows), "explainedVariance": variance.tolist(),
             "nonzerosPerRow": {"mean": float(nnz.mean()), "q50": q[0], "q90": q[1], "q99": q[2], "max": float(nnz.max())}}
    with open(path("stats.json"), "w") as f:
        json.dump(stats, f, indent=2)
        f.write("\n")

    probe_rows = [
        ([], []),                                  # no activity
        ([vocab[0]], [3]),                         # one show
        ([vocab[1], vocab[2], vocab[1]], [2, 5, 7]),  # a duplicate id
        ([vocab[3], UNKNOWN], [4, 9]),             # an unknown id
    ] + [([vocab[j] for j in p], [float(c) for c in cs]) for p, cs in rows[:8]]
    with open(path("probes.jsonl"), "w") as f:
        for items, values in probe_rows:
            code, recon = forward(index, w, b, dec_b, items, values)
            f.write(json.dumps({"items": items, "values": values,
                                "expect": {"code": code.tolist(), "reconstruction": recon.tolist()}}) + "\n")

    in_sparse = {"name": "episodes_played", "vocabularySize": v, "unknown": "bucket",
                 "transform": "log1p", "duplicates": "sum", "vocabulary": "vocabulary.txt"}
    spec = {
        "schemaVersion": 1, "kind": "encoder", "name": "numpy-listener-encoder",
        "description": "A listener encoder fitted in numpy (PCA of log1p episodes played) for a fictional podcast network.",
        "inputs": {"sparse": [in_sparse]},
        "tensors": [
            {"name": "enc.w", "file": "encoder.safetensors", "shape": [v + 1, k], "dtype": "F32", "trainable": False, "part": "encoder"},
            {"name": "enc.b", "file": "encoder.safetensors", "shape": [k], "dtype": "F32", "trainable": False, "part": "encoder"},
            {"name": "dec.b", "file": "decoder.safetensors", "shape": [v + 1], "dtype": "F32", "trainable": False, "part": "decoder"},
        ],
        "layers": [
            {"name": "code", "op": "sparse_dense", "input": "episodes_played", "weight": "enc.w", "bias": "enc.b", "activation": "identity"},
            {"name": "reconstruction", "op": "tied_decoder", "input": "code", "tiedTo": "enc.w", "bias": "dec.b", "activation": "identity"},
        ],
        "code": "code", "reconstruction": "reconstruction", "output": "code",
        "lineage": {"trainingData": "sha256:" + hashlib.sha256(x.tobytes()).hexdigest(),
                    "createdBy": "examples/export_numpy.py", "created": args.created},
        "files": {"stats": "stats.json", "probes": "probes.jsonl"},
    }
    with open(path("spec.json"), "w") as f:
        json.dump(spec, f, indent=2)
        f.write("\n")


if __name__ == "__main__":
    main()
