"""scikit-learn estimators to modelgate models.

    enc = mx.sklearn.encoder(svd, shows, "listener-encoder", transform="log1p")
    sc = mx.sklearn.scorer(logreg, enc, "promo-scorer", encoder_name="listener-encoder:v1",
                           dense_inputs=["listener_tenure"])

Encoders: TruncatedSVD (code = x @ components_.T, reconstruction = code @
components_) and PCA (code = (x - mean_) @ components_.T, reconstruction
adds mean_ back; with whiten=True the code is divided by the singular
scale and no tied decoder exists, so none is written). `transform` must
say what you applied to the counts before fitting (identity, log1p,
binary): the runtime applies it to the raw values.

Scorers: LogisticRegression (binary) and MLPClassifier (binary, logistic
output), fitted on np.hstack([code, dense inputs...]) in that order.

Training state is recorded, not dropped (training_state=True): the
penalty as a regularisation term (LogisticRegression: weight 1/C, the
inverse of scikit-learn's C; MLPClassifier: weight alpha), and the MLP's
optimizer state (Adam's ms and vs as slots "m" and "v", SGD's velocities as
"momentum"). The gate's freeze check fails a scorer carrying them until
`modelgate freeze` strips them.
"""

import numpy as np

from . import core


def _version():
    import sklearn
    return "scikit-learn " + sklearn.__version__


def encoder(est, vocabulary, name, *, transform="identity", unknown="bucket", duplicates="sum", decoder=None, **kw):
    """An Encoder from a fitted TruncatedSVD or PCA over the vocabulary's columns."""
    from sklearn.decomposition import PCA, TruncatedSVD
    comps = np.asarray(est.components_, dtype=np.float64)
    if comps.shape[1] != len(vocabulary):
        raise ValueError("%s has %d input columns, the vocabulary %d ids" % (type(est).__name__, comps.shape[1], len(vocabulary)))
    w = comps.T
    if isinstance(est, TruncatedSVD):
        bias, dec = None, np.zeros(len(vocabulary))
    elif isinstance(est, PCA):
        mean = np.asarray(est.mean_, dtype=np.float64)
        if est.whiten:
            w = w / np.sqrt(est.explained_variance_)
            if decoder:
                raise ValueError("PCA(whiten=True): the reconstruction is not a decoder tied to the code's weight; pass decoder=False")
            dec = None
        else:
            dec = mean
        bias = -(mean @ w)
    else:
        raise ValueError("%s: the scikit-learn encoders understood are TruncatedSVD and PCA" % type(est).__name__)
    if decoder is False:
        dec = None
    return core.Encoder(name, vocabulary, [core.Dense(w, bias)], transform=transform, unknown=unknown,
                        duplicates=duplicates, decoder_bias=dec, source=kw.pop("source", _version()), **kw)


def scorer(est, encoder, name, *, training_state=True, **kw):
    """A Scorer from a fitted binary LogisticRegression or MLPClassifier."""
    from sklearn.linear_model import LogisticRegression
    from sklearn.neural_network import MLPClassifier
    if len(getattr(est, "classes_", [])) != 2:
        raise ValueError("%s: a scorer predicts one probability; the estimator has classes %s" % (type(est).__name__, list(getattr(est, "classes_", []))))
    if isinstance(est, LogisticRegression):
        reg = []
        if training_state and est.penalty not in (None, "none"):
            inv_c = 1.0 / est.C
            if est.penalty == "elasticnet":
                reg = [("l1", inv_c * est.l1_ratio), ("l2", inv_c * (1 - est.l1_ratio))]
            else:
                reg = [(est.penalty, inv_c)]
        layers = [core.Dense(np.asarray(est.coef_, dtype=np.float64).T, np.asarray(est.intercept_, dtype=np.float64),
                             "sigmoid", regularization=reg)]
    elif isinstance(est, MLPClassifier):
        if est.out_activation_ != "logistic":
            raise ValueError("MLPClassifier output %r: a scorer ends in one logistic unit" % est.out_activation_)
        act = {"relu": "relu", "tanh": "tanh", "logistic": "sigmoid", "identity": "identity"}[est.activation]
        n = len(est.coefs_)
        slots = [({}, {}) for _ in range(n)]
        opt = getattr(est, "_optimizer", None) if training_state else None
        if opt is not None:
            if hasattr(opt, "ms"):
                pairs = [("m", opt.ms), ("v", opt.vs)]
            elif getattr(opt, "momentum", 0):
                pairs = [("momentum", opt.velocities)]
            else:
                pairs = []
            for slot, arrays in pairs:
                for i in range(n):
                    slots[i][0][slot] = arrays[i]
                    slots[i][1][slot] = arrays[n + i]
        layers = []
        for i in range(n):
            layers.append(core.Dense(est.coefs_[i], est.intercepts_[i], act if i < n - 1 else "sigmoid",
                                     slots=slots[i][0], bias_slots=slots[i][1],
                                     regularization=[("l2", float(est.alpha))] if training_state and est.alpha > 0 else ()))
    else:
        raise ValueError("%s: the scikit-learn scorers understood are LogisticRegression and MLPClassifier" % type(est).__name__)
    return core.Scorer(name, encoder, layers, source=kw.pop("source", _version()), **kw)
