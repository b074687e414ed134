#!/usr/bin/python3
"""Independent numpy implementation of modelgate's forward-pass semantics.

The Go runtime's cross-check test (runtime_numpy_test.go) writes models and
batches as JSON plus raw little-endian files into a directory and runs

    /usr/bin/python3 forward_ref.py DIR

which reads DIR/cases.json and, for each run and each requested layer k,
writes DIR/<out>.<k>.ref.f64 (the layer's values, rows x width, float64) and
DIR/<out>.<k>.mag.f64 (a forward error scale, see below). When a run asks for
"recon_at", it also writes DIR/<out>.at.ref.f64 / .at.mag.f64: the
reconstruction layer at each stored (row, index) pair in CSR order.

Semantics (written from the spec's documentation, not from the Go code):
  * The sparse input is CSR; indices are weight rows in [0, rows), rows =
    vocabularySize (+1 when unknown == "bucket": the bucket is index
    vocabularySize). Pairs with equal index in a row are merged: "sum" adds,
    "max" keeps the largest, "refuse" is an error; the unknown bucket is
    always summed. Then the transform: identity, log1p, binary (1 if v > 0).
  * sparse_dense: act(x W + b); dense: act(a W + b); concat: side by side;
    tied_decoder: act(a T^T + b) with T the tiedTo tensor [rows, H].
  * A scorer whose encoder is not embedded gets the encoder's layers and
    tensors merged first under the prefix "encoder/".
Everything is computed in float64.

The error scale "mag" bounds how far a float32 evaluation may drift from the
float64 value: it is the same forward pass on absolute values
(|x| |W| + |b|), through which each activation passes its Lipschitz constant
(1 for relu, tanh and identity, 1/4 for sigmoid) times the input scale plus
the output's own magnitude (for the rounding of the activation itself). This
follows the standard forward error bound of a dot product,
|fl(x.y) - x.y| <= gamma_n |x|.|y| (Higham, "Accuracy and Stability of
Numerical Algorithms", 2nd ed., section 3.1), applied layer by layer.
"""

import json
import os
import sys

import numpy as np

PREFIX = "encoder/"


def read(d, name, dtype, shape=None):
    a = np.fromfile(os.path.join(d, name), dtype=dtype)
    return a if shape is None else a.reshape(shape)


def load_model(d, m):
    """Returns (spec, {tensor name: float64 array of its declared shape})."""
    spec = m["spec"]
    shapes = {t["name"]: t["shape"] for t in spec["tensors"]}
    tensors = {}
    for name, f in m["weights"].items():
        tensors[name] = read(d, f, "<f4", shapes[name]).astype(np.float64)
    return spec, tensors


def merged_layers(spec, tensors, enc):
    """The layer list and tensor table of a model, with a referenced
    encoder merged in under the prefix."""
    if enc is None:
        return list(spec["layers"]), dict(tensors)
    espec, etensors = enc
    inputs = {espec["inputs"]["sparse"][0]["name"]}
    inputs |= {d["name"] for d in espec["inputs"].get("dense") or []}

    def ren(ref):
        return ref if ref in inputs else PREFIX + ref

    layers = []
    for l in espec["layers"]:
        m = dict(l)
        m["name"] = PREFIX + l["name"]
        if l.get("input"):
            m["input"] = ren(l["input"])
        if l.get("inputs"):
            m["inputs"] = [ren(r) for r in l["inputs"]]
        for k in ("weight", "tiedTo", "bias"):
            if l.get(k):
                m[k] = PREFIX + l[k]
        layers.append(m)
    table = {PREFIX + k: v for k, v in etensors.items()}
    table.update(tensors)
    return layers + list(spec["layers"]), table


def sparse_matrix(sp, indptr, indices, values):
    vocab = sp["vocabularySize"]
    bucket = sp["unknown"] == "bucket"
    nrows = vocab + (1 if bucket else 0)
    n = len(indptr) - 1
    x = np.zeros((n, nrows))
    for r in range(n):
        idx = indices[indptr[r]:indptr[r + 1]]
        val = values[indptr[r]:indptr[r + 1]].astype(np.float64)
        for i in np.unique(idx):
            v = val[idx == i]
            if len(v) == 1:
                m = v[0]
            elif (bucket and i == vocab) or sp["duplicates"] == "sum":
                m = v.sum()
            elif sp["duplicates"] == "max":
                m = v.max()
            else:
                raise ValueError("row %d repeats index %d under duplicates=refuse" % (r, i))
            t = sp["transform"]
            if t == "log1p":
                m = np.log1p(m)
            elif t == "binary":
                m = 1.0 if m > 0 else 0.0
            x[r, i] = m
    return x


def activate(act, pre, mag):
    act = act or "identity"
    if act == "identity":
        return pre, mag
    if act == "relu":
        return np.maximum(pre, 0.0), mag
    if act == "sigmoid":
        out = 1.0 / (1.0 + np.exp(-pre))
        return out, 0.25 * mag + np.abs(out)
    if act == "tanh":
        out = np.tanh(pre)
        return out, mag + np.abs(out)
    raise ValueError("activation " + act)


def forward(layers, tensors, sp, x, dense, wanted):
    vals = {sp["name"]: (x, np.abs(x))}
    for name, a in dense.items():
        vals[name] = (a, np.abs(a))
    for l in layers:
        op = l["op"]
        bias = tensors[l["bias"]] if l.get("bias") else None
        if op == "concat":
            parts = [vals[r] for r in l["inputs"]]
            vals[l["name"]] = (np.hstack([p[0] for p in parts]), np.hstack([p[1] for p in parts]))
            continue
        a, am = vals[l["input"]]
        if op in ("sparse_dense", "dense"):
            w = tensors[l["weight"]]
        elif op == "tied_decoder":
            w = tensors[l["tiedTo"]].T
        else:
            raise ValueError("op " + op)
        pre = a @ w
        mag = am @ np.abs(w)
        if bias is not None:
            pre = pre + bias
            mag = mag + np.abs(bias)
        vals[l["name"]] = activate(l.get("activation"), pre, mag)
    return {k: vals[k] for k in wanted}


def main(d):
    with open(os.path.join(d, "cases.json")) as f:
        cases = json.load(f)
    for run in cases:
        spec, tensors = load_model(d, run["model"])
        enc = load_model(d, run["encoder"]) if run.get("encoder") else None
        layers, table = merged_layers(spec, tensors, enc)
        sp = spec["inputs"]["sparse"][0]
        b = run["batch"]
        n = b["rows"]
        indptr = read(d, b["indptr"], "<i4")
        indices = read(d, b["indices"], "<i4")
        values = read(d, b["values"], "<f4")
        assert len(indptr) == n + 1
        sizes = {di["name"]: di["size"] for di in spec["inputs"].get("dense") or []}
        dense = {k: read(d, f, "<f4", (n, sizes[k])).astype(np.float64) for k, f in b["dense"].items() if k in sizes}
        x = sparse_matrix(sp, indptr, indices, values)
        wanted = list(run["layers"])
        if run.get("recon_at"):
            wanted.append(spec["reconstruction"])
        out = forward(layers, table, sp, x, dense, wanted)
        for k, name in enumerate(run["layers"]):
            ref, mag = out[name]
            ref.astype("<f8").tofile(os.path.join(d, "%s.%d.ref.f64" % (run["out"], k)))
            mag.astype("<f8").tofile(os.path.join(d, "%s.%d.mag.f64" % (run["out"], k)))
        if run.get("recon_at"):
            ref, mag = out[spec["reconstruction"]]
            rows = np.repeat(np.arange(n), np.diff(indptr))
            ref[rows, indices].astype("<f8").tofile(os.path.join(d, "%s.at.ref.f64" % run["out"]))
            mag[rows, indices].astype("<f8").tofile(os.path.join(d, "%s.at.mag.f64" % run["out"]))


if __name__ == "__main__":
    main(sys.argv[1])
