"""A tiny invented podcast network for the examples and tests: listeners,
the shows they play, episodes played, and whether a listener subscribed to
a promoted show. Every figure is invented here; use your own data.
"""

import numpy as np

SHOWS = ["show-%03d" % i for i in range(36)]


def network(seed=1, listeners=600):
    """(shows, rows, labels). Each listener follows 1 + Poisson(2.5) shows
    (at most 12), drawn by a taste for one of three genres of 12 shows;
    episodes played 1 + Poisson(exp(N(1, 0.8))), at most 200; tenure
    uniform in [0, 1]. One listener in 25 also played a show outside the
    catalogue. The label (subscribed to the promoted show) depends on the
    true-crime shows (0-11) played and on tenure."""
    rng = np.random.default_rng(seed)
    rows, labels = [], []
    for _ in range(listeners):
        genre = rng.integers(3)
        w = np.where(np.arange(36) // 12 == genre, 4.0, 1.0) / np.arange(1, 37) ** 0.6
        k = min(1 + rng.poisson(2.5), 12)
        items = list(rng.choice(36, size=k, replace=False, p=w / w.sum()))
        played = [float(min(200, 1 + rng.poisson(np.exp(rng.normal(1.0, 0.8))))) for _ in items]
        ids = [SHOWS[i] for i in items]
        tenure = float(np.round(rng.uniform(0, 1), 3))
        if rng.random() < 0.04:
            ids.append("show-new-%d" % rng.integers(1000))
            played.append(float(1 + rng.poisson(3)))
        crime = sum(np.log1p(v) for i, v in zip(items, played) if i < 12)
        p = 1 / (1 + np.exp(-(-1.6 + 0.8 * crime + 1.2 * tenure)))
        labels.append(int(rng.random() < p))
        rows.append({"items": ids, "values": played, "listener_tenure": [tenure]})
    return list(SHOWS), rows, np.array(labels)


def matrix(rows, shows=SHOWS):
    """log1p(episodes played) per listener x show; shows outside the
    catalogue left out (the exported encoder sends them to a zero row)."""
    index = {s: i for i, s in enumerate(shows)}
    x = np.zeros((len(rows), len(shows)))
    for r, row in enumerate(rows):
        for item, v in zip(row["items"], row["values"]):
            if item in index:
                x[r, index[item]] += v
    return np.log1p(x)


def tenure(rows):
    """The dense input listener_tenure, one column."""
    return np.array([r["listener_tenure"] for r in rows])
