"""PyTorch modules and state_dicts to modelgate models.

    enc = mx.torch.encoder(model.bag, shows, "listener-encoder", transform="log1p")
    sc = mx.torch.scorer(model.head, enc, "promo-scorer", encoder_name="listener-encoder:v1",
                         dense_inputs=["listener_tenure"])

Modules understood: nn.EmbeddingBag (mode="sum"; its weight [rows, dim] is
already [in, out]) or nn.Linear (weight [out, in], transposed here) as the
sparse first layer of an encoder; nn.Linear for every later layer, each
optionally followed by nn.ReLU, nn.Sigmoid, nn.Tanh or nn.Identity, and
nn.Dropout (recorded as training state); nn.Sequential nests them. Anything
else is refused with its name.

A state_dict (name -> tensor) is read in its order as "<prefix>.weight"
(+ "<prefix>.bias") pairs: the first is an EmbeddingBag weight when it has
no bias, else a Linear weight; pass activations=[...] one per layer.

Training state is recorded, not dropped: requires_grad as the tensor's
trainable flag, an optimizer's per-parameter state (Adam's exp_avg and
exp_avg_sq as slots "m" and "v", SGD's momentum_buffer as "momentum") and
its weight_decay (an l2 term), nn.Dropout rates.
"""

import numpy as np

from . import core

_SLOTS = {"exp_avg": "m", "exp_avg_sq": "v", "momentum_buffer": "momentum", "square_avg": "square_avg", "sum": "sum"}


def _np(t):
    return t.detach().cpu().double().numpy()


def _flatten(module, prefix=""):
    import torch.nn as nn
    if isinstance(module, nn.Sequential):
        out = []
        for name, child in module.named_children():
            out += _flatten(child, prefix + name + ".")
        return out
    return [(prefix.rstrip(".") or type(module).__name__, module)]


def _optimizer_state(optimizer, param):
    slots, decay = {}, 0.0
    if optimizer is None:
        return slots, decay
    for g in optimizer.param_groups:
        if any(p is param for p in g["params"]):
            decay = float(g.get("weight_decay", 0.0) or 0.0)
    for k, v in optimizer.state.get(param, {}).items():
        if k in _SLOTS and hasattr(v, "shape") and tuple(v.shape) == tuple(param.shape):
            slots[_SLOTS[k]] = _np(v)
    return slots, decay


def _layers(module, *, sparse_first, optimizer=None, activations=None):
    """Dense layers from a module (or state_dict), layout converted."""
    import torch.nn as nn
    if isinstance(module, dict):
        return _state_dict_layers(module, activations, sparse_first)
    acts = {nn.ReLU: "relu", nn.Sigmoid: "sigmoid", nn.Tanh: "tanh", nn.Identity: None}
    layers = []
    for i, (name, m) in enumerate(_flatten(module)):
        if isinstance(m, nn.EmbeddingBag):
            if not (sparse_first and i == 0):
                raise ValueError("module %s (EmbeddingBag): only the first layer of an encoder can be an embedding" % name)
            if m.mode != "sum":
                raise ValueError("module %s: EmbeddingBag mode=%r; modelgate's sparse layer sums value x row: use mode=\"sum\" (per_sample_weights carry the values)" % (name, m.mode))
            slots, decay = _optimizer_state(optimizer, m.weight)
            layers.append(core.Dense(_np(m.weight), None, trainable=m.weight.requires_grad, slots=slots,
                                     regularization=[("l2", decay)] if decay else ()))
        elif isinstance(m, nn.Linear):
            slots, decay = _optimizer_state(optimizer, m.weight)
            bslots = _optimizer_state(optimizer, m.bias)[0] if m.bias is not None else {}
            layers.append(core.Dense(_np(m.weight).T, None if m.bias is None else _np(m.bias),
                                     trainable=m.weight.requires_grad, slots={k: v.T for k, v in slots.items()},
                                     bias_slots=bslots, regularization=[("l2", decay)] if decay else ()))
        elif type(m) in acts:
            if not layers:
                raise ValueError("module %s (%s) comes before any layer" % (name, type(m).__name__))
            if acts[type(m)]:
                if layers[-1].activation != "identity":
                    raise ValueError("module %s (%s): a second activation after one layer" % (name, type(m).__name__))
                layers[-1].activation = acts[type(m)]
        elif isinstance(m, nn.Dropout):
            if not layers:
                raise ValueError("module %s (Dropout) on the input: modelgate records dropout after a layer" % name)
            if m.p > 0:
                layers[-1].dropout = float(m.p)
        else:
            raise ValueError("module %s (%s): not a layer modelgate's runtime has (EmbeddingBag, Linear, ReLU, Sigmoid, Tanh, Identity, Dropout)" % (name, type(m).__name__))
    if not layers:
        raise ValueError("the module holds no layer")
    return layers


def _state_dict_layers(sd, activations, sparse_first):
    names = list(sd.keys())
    prefixes = []
    for k in names:
        if k.endswith(".weight"):
            prefixes.append(k[: -len(".weight")])
        elif not k.endswith(".bias"):
            raise ValueError("state_dict key %r: want <prefix>.weight and <prefix>.bias entries" % k)
    if activations is None:
        activations = ["identity"] * len(prefixes)
    if len(activations) != len(prefixes):
        raise ValueError("%d activations for %d layers (%s)" % (len(activations), len(prefixes), ", ".join(prefixes)))
    layers = []
    for i, (p, act) in enumerate(zip(prefixes, activations)):
        w = _np(sd[p + ".weight"])
        b = sd.get(p + ".bias")
        if i == 0 and sparse_first and b is None:
            layers.append(core.Dense(w, None, act or "identity"))  # EmbeddingBag: [rows, dim]
        else:
            layers.append(core.Dense(w.T, None if b is None else _np(b), act or "identity"))  # Linear: [out, in]
    return layers


def encoder(module, vocabulary, name, *, optimizer=None, activations=None, transform="identity", unknown="bucket",
            duplicates="sum", decoder_bias=None, **kw):
    """An Encoder from an EmbeddingBag or Linear first layer (module or
    state_dict) and optional Linear layers after it."""
    layers = _layers(module, sparse_first=True, optimizer=optimizer, activations=activations)
    if decoder_bias is not None and hasattr(decoder_bias, "detach"):
        decoder_bias = _np(decoder_bias)
    return core.Encoder(name, vocabulary, layers, transform=transform, unknown=unknown, duplicates=duplicates,
                        decoder_bias=decoder_bias, source=kw.pop("source", "torch %s" % _version()), **kw)


def scorer(module, encoder, name, *, optimizer=None, activations=None, logits=False, **kw):
    """A Scorer from a head of Linear layers fed with the code and the dense
    inputs side by side (torch.cat([code, *dense], dim=1)). A head that ends
    in a Linear producing logits (trained with BCEWithLogitsLoss) needs
    logits=True: the stored model then applies the sigmoid."""
    layers = _layers(module, sparse_first=False, optimizer=optimizer, activations=activations)
    if logits:
        if layers[-1].activation != "identity":
            raise ValueError("logits=True but the head already ends in %s" % layers[-1].activation)
        layers[-1].activation = "sigmoid"
    elif layers[-1].activation != "sigmoid":
        raise ValueError("the head ends in %s, not a sigmoid: pass logits=True if it outputs logits" % layers[-1].activation)
    return core.Scorer(name, encoder, layers, source=kw.pop("source", "torch %s" % _version()), **kw)


def _version():
    import torch
    return torch.__version__
