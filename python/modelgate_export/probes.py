"""Probe rows chosen to catch what goes wrong between training and serving.

Built-in rows: the empty row; one id; the vocabulary's last id (a vocabulary
shifted by one row); several ids with distinct values (values swapped
between ids); an id given twice (the duplicates rule); an id outside the
vocabulary (the unknown rule). Then the heaviest sample rows (most ids) and
sample rows with distinct values, up to `extra`. A row with distinct
values whose output does not move when its values are rotated against its
ids (a saturated unit, every ReLU off) is left out: it cannot show values
bound to the wrong ids. A row the model's own rules refuse (unknown or
duplicate ids under "refuse") is not a probe.
"""

import numpy as np

from . import reference

UNKNOWN_ID = "modelgate-probe-unknown-id"


def _dense_for(graph, rows, k):
    out = {}
    for j, d in enumerate(graph.dense):
        if rows and d.name in rows[k % len(rows)]:
            out[d.name] = [float(v) for v in np.asarray(rows[k % len(rows)][d.name], dtype=np.float32).reshape(-1)]
        else:
            out[d.name] = [round(0.25 + 0.125 * ((k + j + i) % 6), 3) for i in range(d.size)]
    return out


def choose(graph, rows, extra=12, seed=0):
    vocab = graph.vocabulary
    sp = graph.sparse
    unknown = UNKNOWN_ID
    while unknown in set(vocab):
        unknown += "-x"
    n = len(vocab)
    pick = lambda i: vocab[i % n]
    built = [
        ([], []),
        ([pick(0)], [3.0]),
        ([vocab[-1]], [2.0]),
        ([pick(1), pick(2), pick(3), pick(4)][:min(4, n)], [1.0, 2.0, 5.0, 11.0][:min(4, n)]),
        ([pick(1), pick(2), pick(1)], [2.0, 5.0, 7.0]),
        ([pick(3), unknown], [4.0, 9.0]),
    ]
    index = {s: i for i, s in enumerate(vocab)}
    kept = []

    def add(items, values, informative_only):
        r = {"items": list(items), "values": list(values)}
        r.update(_dense_for(graph, rows, len(kept)))
        try:
            reference.sparse_row(sp, index, r["items"], r["values"])
        except reference.Refused:
            return False
        if len(set(r["values"])) >= 2 and not _rotation_shows(graph, r):
            if informative_only:
                return False
        kept.append(r)
        return True

    for items, values in built:
        add(items, values, informative_only=len(set(values)) >= 2)
    # Sample rows: the heaviest first, then rows with distinct values whose
    # output moves when their values are rotated against their ids.
    order = sorted(range(len(rows)), key=lambda i: (-len(rows[i]["items"]), i))
    heavy = []
    for i in order[:20]:
        if len(heavy) >= min(2, extra):
            break
        if add(rows[i]["items"], rows[i]["values"], informative_only=True):
            heavy.append(i)
    rng = np.random.default_rng(seed)
    n_more = max(0, extra - len(heavy))
    for i in rng.permutation(len(rows)):
        if n_more == 0:
            break
        if i in heavy or len(set(rows[i]["values"])) < 2:
            continue
        if add(rows[i]["items"], rows[i]["values"], informative_only=True):
            n_more -= 1
    return kept


def _rotation_shows(graph, r):
    """Whether rotating the row's values against its ids (the gate's
    contract test) changes the output by more than float32 rounding: a row
    whose output does not move (a saturated unit, every ReLU off) cannot
    reveal values bound to the wrong ids."""
    rot = dict(r)
    v = r["values"]
    rot["values"] = v[1:] + v[:1]
    try:
        out = reference.forward(graph, [r, rot], graph.output)
    except reference.Refused:
        return False
    return bool(np.max(np.abs(out[0] - out[1])) > 1e-5 * (1 + np.max(np.abs(out[0]))))
