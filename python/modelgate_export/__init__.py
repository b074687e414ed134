"""modelgate_export: write model directories that `modelgate push` accepts.

    import modelgate_export as mx
    enc = mx.Encoder("listener-encoder", shows, mx.Dense(W, b), transform="log1p", decoder_bias=mean)
    enc.write("out/encoder", sample=rows)

Adapters (imported on use, each needs its framework):
    mx.torch    encoder(...) / scorer(...) from torch modules or state_dicts
    mx.sklearn  encoder(...) from TruncatedSVD / PCA, scorer(...) from
                LogisticRegression / MLPClassifier
    mx.onnx     encoder(...) / scorer(...) from ONNX graphs
"""

import importlib

from .core import VERSION as __version__
from . import sample
from .core import Dense, DenseInput, Encoder, Scorer, load_encoder, write_holdout

__all__ = ["sample", "Dense", "DenseInput", "Encoder", "Scorer", "load_encoder", "write_holdout", "torch", "sklearn", "onnx"]


def __getattr__(name):
    if name in ("torch", "sklearn", "onnx"):
        return importlib.import_module("." + name + "_adapter", __name__)
    raise AttributeError(name)
