"""The package's own forward pass, in float64, on the float32 weights it stores.

Semantics (modelgate's spec): each row's (id, value) pairs are mapped
through the vocabulary (unknown ids to the bucket row, dropped, or refused);
pairs with the same row are combined ("sum" adds, "max" keeps the largest,
"refuse" refuses the row; the unknown bucket always sums); then the
transform (identity, log1p, binary: 1 when the value is > 0). sparse_dense
and dense are activation(x @ W + b), concat puts inputs side by side,
tied_decoder is x @ T.T + b with T the tied weight.
"""

from collections import namedtuple

import numpy as np

Graph = namedtuple("Graph", "sparse vocabulary dense layers output reconstruction extra")


class Layer:
    def __init__(self, name, op, input, weight, bias, activation, tied=False):
        self.name, self.op, self.input = name, op, input
        # What the model directory stores: float32. The pass runs on those
        # values, widened to float64.
        self.weight = None if weight is None else np.asarray(weight, dtype=np.float32).astype(np.float64)
        self.bias = None if bias is None else np.asarray(bias, dtype=np.float32).astype(np.float64)
        self.activation, self.tied = activation, tied


class Refused(ValueError):
    """A row the model's own input rules refuse."""


def sparse_row(sp, index, items, values):
    """One row as a dense float64 vector over the weight rows."""
    v = sp["vocabularySize"]
    bucket = sp["unknown"] == "bucket"
    x = np.zeros(v + (1 if bucket else 0))
    seen = {}
    for item, val in zip(items, values):
        val = float(np.float32(val))
        i = index.get(item)
        if i is None:
            if sp["unknown"] == "refuse":
                raise Refused("item id %r is not in the vocabulary (unknown: refuse)" % item)
            if sp["unknown"] == "drop":
                continue
            x[v] += val
            continue
        if i in seen:
            if sp["duplicates"] == "refuse":
                raise Refused("item id %r appears twice (duplicates: refuse)" % item)
            x[i] = x[i] + val if sp["duplicates"] == "sum" else max(x[i], val)
        else:
            x[i] = val
            seen[i] = True
    t = sp["transform"]
    if t == "log1p":
        x = np.log1p(x)
    elif t == "binary":
        x = (x > 0).astype(np.float64)
    return x


def activate(act, a):
    if act in (None, "identity"):
        return a
    if act == "relu":
        return np.maximum(a, 0.0)
    if act == "sigmoid":
        return 1.0 / (1.0 + np.exp(-a))
    if act == "tanh":
        return np.tanh(a)
    raise ValueError("activation %r" % act)


def forward(graph, rows, layer=None):
    """{layer name: float64 array [len(rows), width]} for every layer, or
    just the one asked for."""
    index = {s: i for i, s in enumerate(graph.vocabulary)}
    x = np.array([sparse_row(graph.sparse, index, r["items"], r["values"]) for r in rows]).reshape(len(rows), -1)
    vals = {graph.sparse["name"]: x}
    for d in graph.dense:
        vals[d.name] = np.array([np.asarray(r[d.name], dtype=np.float32).astype(np.float64).reshape(-1) for r in rows]).reshape(len(rows), d.size)
    for l in graph.layers:
        if l.op == "concat":
            vals[l.name] = np.hstack([vals[i] for i in l.input])
            continue
        a = vals[l.input]
        w = l.weight.T if l.tied else l.weight
        out = a @ w
        if l.bias is not None:
            out = out + l.bias
        vals[l.name] = activate(l.activation, out)
    if layer is not None:
        return vals[layer]
    return vals
