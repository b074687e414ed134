"""Encoders and scorers from plain arrays, written as modelgate model directories.

A model directory (what `modelgate push DIR NAME:TAG` reads):

    spec.json            the spec (schemas/spec.schema.json in the modelgate repository)
    encoder.safetensors  an encoder's weights, float32, every weight [in, out]
    decoder.safetensors  an encoder's tied-decoder bias, when it has one
    head.safetensors     a scorer's head
    training.safetensors optimizer slots the training side left attached (part "training")
    vocabulary.txt       one item id per line; line i names weight row i
    stats.json           training statistics (rows, nonzeros per row, positive rate)
    probes.jsonl         probe rows with the outputs this package's float64
                         reference forward pass computed for them
"""

import datetime
import hashlib
import json
import os

import numpy as np

from . import probes as _probes
from . import reference
from . import safetensors

__all__ = ["Dense", "DenseInput", "Encoder", "Scorer", "load_encoder", "write_holdout"]

VERSION = "0.1.0"
ACTIVATIONS = ("identity", "relu", "sigmoid", "tanh")
TRANSFORMS = ("identity", "log1p", "binary")
UNKNOWN_RULES = ("bucket", "drop", "refuse")
DUPLICATE_RULES = ("sum", "max", "refuse")


def _check_enum(what, value, allowed):
    if value not in allowed:
        raise ValueError("%s %r: use one of %s" % (what, value, ", ".join(allowed)))


def _matrix(what, a):
    a = np.asarray(a, dtype=np.float64)
    if a.ndim != 2:
        raise ValueError("%s: want a matrix [in, out], got shape %s" % (what, a.shape))
    if not np.all(np.isfinite(a)):
        raise ValueError("%s holds NaN or infinite values" % what)
    return a


def _vector(what, a, size):
    a = np.asarray(a, dtype=np.float64).reshape(-1)
    if a.shape != (size,):
        raise ValueError("%s: want %d values, got shape %s" % (what, size, a.shape))
    if not np.all(np.isfinite(a)):
        raise ValueError("%s holds NaN or infinite values" % what)
    return a


class Dense:
    """One layer: activation(input @ weight + bias), weight [in, out].

    A PyTorch Linear stores its weight [out, in]: pass weight.T (the torch
    adapter does). Training-only state is recorded, not dropped:

      trainable       the tensor is still a variable on the training side
      slots           optimizer state of the weight, {slot name: array shaped like it}
      bias_slots      the same for the bias
      regularization  [(type, weight)] penalty terms on the weight: type "l1" or "l2"
      dropout         the dropout rate applied after this layer in training

    The gate's freeze check fails a scorer that carries any of them; `modelgate
    freeze` strips them.
    """

    def __init__(self, weight, bias=None, activation="identity", *, trainable=False,
                 slots=None, bias_slots=None, regularization=(), dropout=None):
        self.weight = _matrix("weight", weight)
        self.bias = None if bias is None else _vector("bias", bias, self.weight.shape[1])
        _check_enum("activation", activation, ACTIVATIONS)
        self.activation = activation
        self.trainable = bool(trainable)
        self.slots = {k: _matrix("optimizer slot %r" % k, v) for k, v in (slots or {}).items()}
        for k, v in self.slots.items():
            if v.shape != self.weight.shape:
                raise ValueError("optimizer slot %r has shape %s, the weight %s" % (k, v.shape, self.weight.shape))
        self.bias_slots = {k: _vector("bias slot %r" % k, v, self.weight.shape[1]) for k, v in (bias_slots or {}).items()}
        for kind, w in regularization:
            _check_enum("regularization type", kind, ("l1", "l2"))
            if not w >= 0:
                raise ValueError("regularization weight %r: want a number >= 0" % (w,))
        self.regularization = [(k, float(w)) for k, w in regularization]
        if dropout is not None and not 0 <= dropout < 1:
            raise ValueError("dropout rate %r: want 0 <= rate < 1" % (dropout,))
        self.dropout = dropout

    @property
    def width(self):
        return self.weight.shape[1]


class DenseInput:
    """A fixed-width float input of a scorer: describes "user" or "item"."""

    def __init__(self, name, size=1, describes="user"):
        _check_enum("describes", describes, ("user", "item"))
        self.name, self.size, self.describes = name, int(size), describes

    def spec(self):
        return {"name": self.name, "size": self.size, "describes": self.describes}


def _dense_inputs(items):
    out = []
    for d in items or ():
        if isinstance(d, DenseInput):
            out.append(d)
        elif isinstance(d, str):
            out.append(DenseInput(d))
        else:
            out.append(DenseInput(*d))
    return out


def _vocabulary(vocab):
    ids = [str(int(v)) if isinstance(v, (int, np.integer)) else str(v) for v in vocab]
    seen = {}
    for i, s in enumerate(ids):
        if s == "" or s != s.strip() or any(ord(c) < 32 for c in s):
            raise ValueError("vocabulary[%d] %r: an item id may not be empty, start or end with white space, or hold control characters" % (i, s))
        if s in seen:
            raise ValueError("vocabulary[%d] %r repeats vocabulary[%d]" % (i, s, seen[s]))
        seen[s] = i
    if not ids:
        raise ValueError("the vocabulary is empty")
    return ids


def _created(created):
    if created:
        return created
    epoch = os.environ.get("SOURCE_DATE_EPOCH")
    t = datetime.datetime.fromtimestamp(int(epoch), datetime.timezone.utc) if epoch else datetime.datetime.now(datetime.timezone.utc)
    return t.strftime("%Y-%m-%dT%H:%M:%SZ")


def _rows(rows):
    """Rows as dicts {"items": [...], "values": [...], dense name: [...]}; a
    row may be given as a pair (items, values)."""
    out = []
    for r in rows or ():
        if isinstance(r, dict):
            d = dict(r)
        else:
            items, values = r
            d = {"items": items, "values": values}
        d["items"] = [str(int(i)) if isinstance(i, (int, np.integer)) else str(i) for i in d["items"]]
        d["values"] = [float(v) for v in np.asarray(d["values"], dtype=np.float32).reshape(-1)]
        if len(d["items"]) != len(d["values"]):
            raise ValueError("a row has %d items but %d values" % (len(d["items"]), len(d["values"])))
        out.append(d)
    return out


def _digest_rows(rows):
    h = hashlib.sha256()
    for r in rows:
        h.update(json.dumps(r, sort_keys=True, separators=(",", ":")).encode("utf-8"))
        h.update(b"\n")
    return "sha256:" + h.hexdigest()


def _nonzero_stats(rows):
    nnz = np.array([len(set(r["items"])) for r in rows], dtype=np.float64)
    if len(nnz) == 0:
        return None
    q = np.quantile(nnz, [0.5, 0.9, 0.99])  # numpy's default: linear (type 7)
    return {"mean": float(nnz.mean()), "q50": float(q[0]), "q90": float(q[1]), "q99": float(q[2]), "max": float(nnz.max())}


class _Model:
    kind = None

    def _spec_common(self, created):
        lineage = {"createdBy": "modelgate_export %s%s" % (VERSION, (" (" + self.source + ")") if self.source else ""),
                   "created": _created(created)}
        lineage.update({k: v for k, v in (self.lineage or {}).items() if v})
        return lineage

    def reference(self, rows, layer=None):
        """The package's float64 forward pass on the stored float32 weights:
        {layer name: array [rows, width]} for the given rows."""
        return reference.forward(self._graph(), _rows(rows), layer)

    def write(self, out, sample=(), labels=None, created=None, probes=12, seed=0):
        """Write the model directory `out`.

        sample   training rows (pairs (items, values) or dicts with "items",
                 "values" and the dense inputs): their statistics go to
                 stats.json, the training-data digest to the lineage (unless
                 lineage names one), and some of them (the heaviest, rows with
                 distinct values) become probe rows
        labels   the sample's labels (0/1), for the positive rate in stats.json
        created  the lineage's creation time (RFC 3339); default
                 SOURCE_DATE_EPOCH, else now
        probes   how many sample rows to use as probes beside the built-in
                 ones (empty row, one id, the last vocabulary id, distinct
                 values, a duplicate id, an unknown id)
        """
        rows = _rows(sample)
        os.makedirs(out, exist_ok=True)
        path = lambda name: os.path.join(out, name)
        graph = self._graph()
        spec, files = self._spec(created)
        if rows and "trainingData" not in spec["lineage"]:
            spec["lineage"]["trainingData"] = _digest_rows(rows)
        for fname, tensors in files.items():
            safetensors.write(path(fname), tensors)
        with open(path("vocabulary.txt"), "w", encoding="utf-8", newline="\n") as f:
            f.write("".join(s + "\n" for s in self.vocabulary))
        stats = {"rows": len(rows)}
        nz = _nonzero_stats(rows)
        if nz:
            stats["nonzerosPerRow"] = nz
        if labels is not None:
            lab = np.asarray(labels, dtype=np.float64).reshape(-1)
            stats["positiveRate"] = float(lab.mean()) if len(lab) else 0.0
        stats.update(self.stats or {})
        with open(path("stats.json"), "w") as f:
            json.dump(stats, f, indent=2, sort_keys=True)
            f.write("\n")
        chosen = _probes.choose(graph, rows, extra=probes, seed=seed)
        outs = reference.forward(graph, chosen, None)
        expect_layers = [graph.output] + ([graph.reconstruction] if graph.reconstruction else [])
        with open(path("probes.jsonl"), "w") as f:
            for i, r in enumerate(chosen):
                line = {"items": r["items"], "values": r["values"]}
                if graph.dense:
                    line["dense"] = {d.name: [float(v) for v in np.asarray(r[d.name], dtype=np.float32).reshape(-1)] for d in graph.dense}
                line["expect"] = {name: [float(v) for v in outs[name][i]] for name in expect_layers}
                f.write(json.dumps(line) + "\n")
        spec["files"] = {"stats": "stats.json", "probes": "probes.jsonl"}
        with open(path("spec.json"), "w") as f:
            json.dump(spec, f, indent=2)
            f.write("\n")
        return out


def _training_spec(entries):
    """(tensors of part "training", the spec's training object) from
    [(tensor name, layer name, Dense)]."""
    slots_t, spec = [], {"regularization": [], "optimizerSlots": [], "dropout": []}
    for wname, bname, lname, d in entries:
        for slot, a in d.slots.items():
            slots_t.append((wname + "." + slot, a))
            spec["optimizerSlots"].append({"tensor": wname + "." + slot, "of": wname, "slot": slot})
        if bname:
            for slot, a in d.bias_slots.items():
                slots_t.append((bname + "." + slot, a))
                spec["optimizerSlots"].append({"tensor": bname + "." + slot, "of": bname, "slot": slot})
        for kind, w in d.regularization:
            spec["regularization"].append({"tensor": wname, "type": kind, "weight": w})
        if d.dropout:
            spec["dropout"].append({"layer": lname, "rate": float(d.dropout)})
    spec = {k: v for k, v in spec.items() if v}
    return slots_t, spec


def _layer_entries(layers, names, prefix):
    """Tensor and layer declarations for a chain of Dense layers."""
    out = []
    for i, (d, lname) in enumerate(zip(layers, names)):
        w, b = "%s.w%d" % (prefix, i + 1), ("%s.b%d" % (prefix, i + 1) if d.bias is not None else None)
        out.append((w, b, lname, d))
    return out


class Encoder(_Model):
    """A listener encoder: a sparse input through one sparse_dense layer and
    optional dense layers to the code, and optionally a decoder tied to the
    first weight (reconstruction = code @ W1.T + decoder_bias).

    vocabulary     the item ids, in weight-row order
    layers         Dense layers; the first one's weight has one row per
                   vocabulary id (the package adds a zero row for the unknown
                   bucket when unknown="bucket"), or one more row when you
                   trained the bucket yourself
    transform      what the runtime applies to values after combining
                   duplicates: "identity", "log1p" or "binary"
    unknown        ids outside the vocabulary: "bucket", "drop", "refuse"
    duplicates     an id twice in one row: "sum", "max", "refuse"
    decoder_bias   one value per weight row (or per vocabulary id): adds the
                   tied decoder, whose output is the reconstruction the gate
                   scores an encoder by
    lineage        sourceRepository, sourceCommit, trainingData, createdBy, created
    stats          extra entries for stats.json
    """

    kind = "encoder"

    def __init__(self, name, vocabulary, layers, *, input_name="episodes_played", transform="identity",
                 unknown="bucket", duplicates="sum", decoder_bias=None, description=None,
                 lineage=None, stats=None, source=None):
        self.name = name
        self.vocabulary = _vocabulary(vocabulary)
        if isinstance(layers, Dense):
            layers = [layers]
        self.layers = list(layers)
        if not self.layers:
            raise ValueError("an encoder needs at least one layer")
        _check_enum("transform", transform, TRANSFORMS)
        _check_enum("unknown", unknown, UNKNOWN_RULES)
        _check_enum("duplicates", duplicates, DUPLICATE_RULES)
        self.input_name, self.transform, self.unknown, self.duplicates = input_name, transform, unknown, duplicates
        v = len(self.vocabulary)
        rows = v + (1 if unknown == "bucket" else 0)
        first = self.layers[0]
        if first.weight.shape[0] == v and rows == v + 1:
            first.weight = np.vstack([first.weight, np.zeros((1, first.width))])
            for k in first.slots:
                first.slots[k] = np.vstack([first.slots[k], np.zeros((1, first.width))])
        if first.weight.shape[0] != rows:
            raise ValueError("the first layer's weight has %d rows; the vocabulary has %d ids%s" % (
                first.weight.shape[0], v, " (+1 for the unknown bucket)" if unknown == "bucket" else ""))
        for i in range(1, len(self.layers)):
            if self.layers[i].weight.shape[0] != self.layers[i - 1].width:
                raise ValueError("layer %d takes %d inputs, layer %d gives %d" % (i + 1, self.layers[i].weight.shape[0], i, self.layers[i - 1].width))
        self.decoder_bias = None
        if decoder_bias is not None:
            if self.layers[-1].width != first.width:
                raise ValueError("a tied decoder multiplies the code by the first weight transposed: the code is %d wide, the first layer %d" % (self.layers[-1].width, first.width))
            db = np.asarray(decoder_bias, dtype=np.float64).reshape(-1)
            if db.shape == (v,) and rows == v + 1:
                db = np.append(db, 0.0)
            self.decoder_bias = _vector("decoder_bias", db, rows)
        self.description, self.lineage, self.stats, self.source = description, lineage, stats, source

    def _names(self):
        n = len(self.layers)
        return ["hidden%d" % (i + 1) for i in range(n - 1)] + ["code"]

    def _graph(self):
        names = self._names()
        layers = []
        for i, (d, lname) in enumerate(zip(self.layers, names)):
            layers.append(reference.Layer(lname, "sparse_dense" if i == 0 else "dense",
                                          self.input_name if i == 0 else names[i - 1], d.weight, d.bias, d.activation))
        recon = None
        if self.decoder_bias is not None:
            layers.append(reference.Layer("reconstruction", "tied_decoder", "code", self.layers[0].weight, self.decoder_bias, "identity", tied=True))
            recon = "reconstruction"
        return reference.Graph(self.sparse(), self.vocabulary, [], layers, "code", recon, None)

    def sparse(self):
        return {"name": self.input_name, "vocabularySize": len(self.vocabulary), "unknown": self.unknown,
                "transform": self.transform, "duplicates": self.duplicates, "vocabulary": "vocabulary.txt"}

    def _spec(self, created):
        names = self._names()
        entries = _layer_entries(self.layers, names, "enc")
        tensors, layers, files = [], [], {"encoder.safetensors": []}
        for i, (w, b, lname, d) in enumerate(entries):
            tensors.append({"name": w, "file": "encoder.safetensors", "shape": list(d.weight.shape), "dtype": "F32", "trainable": d.trainable, "part": "encoder"})
            files["encoder.safetensors"].append((w, d.weight))
            l = {"name": lname, "op": "sparse_dense" if i == 0 else "dense", "input": self.input_name if i == 0 else names[i - 1], "weight": w}
            if b:
                tensors.append({"name": b, "file": "encoder.safetensors", "shape": [d.width], "dtype": "F32", "trainable": d.trainable, "part": "encoder"})
                files["encoder.safetensors"].append((b, d.bias))
                l["bias"] = b
            l["activation"] = d.activation
            layers.append(l)
        spec = {"schemaVersion": 1, "kind": "encoder", "name": self.name}
        if self.description:
            spec["description"] = self.description
        spec["inputs"] = {"sparse": [self.sparse()]}
        if self.decoder_bias is not None:
            tensors.append({"name": "dec.b", "file": "decoder.safetensors", "shape": [len(self.decoder_bias)], "dtype": "F32", "trainable": self.layers[0].trainable, "part": "decoder"})
            files["decoder.safetensors"] = [("dec.b", self.decoder_bias)]
            layers.append({"name": "reconstruction", "op": "tied_decoder", "input": "code", "tiedTo": entries[0][0], "bias": "dec.b", "activation": "identity"})
        slot_tensors, training = _training_spec(entries)
        if slot_tensors:
            files["training.safetensors"] = slot_tensors
            for n, a in slot_tensors:
                tensors.append({"name": n, "file": "training.safetensors", "shape": list(a.shape), "dtype": "F32", "trainable": True, "part": "training"})
        spec["tensors"], spec["layers"] = tensors, layers
        spec["code"] = "code"
        if self.decoder_bias is not None:
            spec["reconstruction"] = "reconstruction"
        spec["output"] = "code"
        if training:
            spec["training"] = training
        spec["lineage"] = self._spec_common(created)
        return spec, files


def load_encoder(path):
    """An Encoder read back from a model directory this package (or any
    exporter) wrote: the weights, vocabulary and input rules a scorer's
    reference forward pass needs."""
    with open(os.path.join(path, "spec.json")) as f:
        spec = json.load(f)
    if spec.get("kind") != "encoder":
        raise ValueError("%s: spec.json kind is %r, not an encoder" % (path, spec.get("kind")))
    tensors = {}
    for fname in sorted({t["file"] for t in spec["tensors"]}):
        tensors.update(safetensors.read(os.path.join(path, fname)))
    sp = spec["inputs"]["sparse"][0]
    with open(os.path.join(path, sp["vocabulary"]), encoding="utf-8") as f:
        vocab = f.read().split("\n")[:-1]
    layers, decoder_bias = [], None
    for l in spec["layers"]:
        if l["op"] in ("sparse_dense", "dense"):
            layers.append(Dense(tensors[l["weight"]], tensors[l["bias"]] if l.get("bias") else None, l.get("activation") or "identity"))
        elif l["op"] == "tied_decoder":
            decoder_bias = tensors[l["bias"]] if l.get("bias") else np.zeros(tensors[l["tiedTo"]].shape[0])
        else:
            raise ValueError("%s: layer %r (%s): load_encoder reads chains of dense layers" % (path, l["name"], l["op"]))
        if l["name"] == spec["code"]:
            break
    enc = Encoder(spec["name"], vocab, layers, input_name=sp["name"], transform=sp["transform"],
                  unknown=sp["unknown"], duplicates=sp["duplicates"], decoder_bias=decoder_bias)
    enc.path = path
    return enc


class Scorer(_Model):
    """A scorer: a head of Dense layers on the encoder's code, side by side
    with the dense inputs (in the order given), ending in one sigmoid unit.

    encoder         the Encoder (or a path to an encoder's model directory): its
                    sparse input and vocabulary are the scorer's, and its
                    weights run in the reference forward pass
    encoder_name    NAME:TAG of the pushed encoder, e.g. "listener-encoder:v1".
                    Without encoder_digest, `modelgate push` resolves the tag
                    and stores the digest it points at
    encoder_digest  sha256:... of the encoder artifact, when known
    dense_inputs    DenseInput(name, size, describes) (or names: size 1, user)
    """

    kind = "scorer"

    def __init__(self, name, encoder, layers, *, encoder_name=None, encoder_digest=None, dense_inputs=(),
                 description=None, lineage=None, stats=None, source=None):
        self.name = name
        self.encoder = load_encoder(encoder) if isinstance(encoder, (str, os.PathLike)) else encoder
        if encoder_name is None and encoder_digest is None:
            raise ValueError("name the encoder: encoder_name=\"NAME:TAG\" (resolved at push) or encoder_digest=\"sha256:...\"")
        if encoder_digest is not None and not (isinstance(encoder_digest, str) and encoder_digest.startswith("sha256:") and len(encoder_digest) == 71):
            raise ValueError("encoder_digest %r: want sha256: and 64 hex digits" % (encoder_digest,))
        self.encoder_name, self.encoder_digest = encoder_name, encoder_digest
        self.vocabulary = self.encoder.vocabulary
        if isinstance(layers, Dense):
            layers = [layers]
        self.layers = list(layers)
        self.dense = _dense_inputs(dense_inputs)
        width = self.encoder.layers[-1].width + sum(d.size for d in self.dense)
        if self.layers[0].weight.shape[0] != width:
            raise ValueError("the head's first layer takes %d inputs; the code (%d) and the dense inputs (%s) give %d" % (
                self.layers[0].weight.shape[0], self.encoder.layers[-1].width, ", ".join("%s %d" % (d.name, d.size) for d in self.dense) or "none", width))
        for i in range(1, len(self.layers)):
            if self.layers[i].weight.shape[0] != self.layers[i - 1].width:
                raise ValueError("head layer %d takes %d inputs, layer %d gives %d" % (i + 1, self.layers[i].weight.shape[0], i, self.layers[i - 1].width))
        last = self.layers[-1]
        if last.width != 1 or last.activation != "sigmoid":
            raise ValueError("the head's last layer gives %d output(s) with %s; a scorer ends in one sigmoid unit (a probability)" % (last.width, last.activation))
        self.description, self.lineage, self.stats, self.source = description, lineage, stats, source

    def _names(self):
        n = len(self.layers)
        return ["hidden%d" % (i + 1) for i in range(n - 1)] + ["p"]

    def _first_input(self):
        return "features" if self.dense else "encoder/code"

    def _graph(self):
        eg = self.encoder._graph()
        layers = [reference.Layer("encoder/" + l.name, l.op, l.input if l.op == "sparse_dense" else "encoder/" + l.input,
                                  l.weight, l.bias, l.activation, tied=l.tied) for l in eg.layers if l.op != "tied_decoder"]
        if self.dense:
            layers.append(reference.Layer("features", "concat", ["encoder/code"] + [d.name for d in self.dense], None, None, None))
        names = self._names()
        for i, (d, lname) in enumerate(zip(self.layers, names)):
            layers.append(reference.Layer(lname, "dense", self._first_input() if i == 0 else names[i - 1], d.weight, d.bias, d.activation))
        return reference.Graph(self.encoder.sparse(), self.vocabulary, self.dense, layers, "p", None, None)

    def _spec(self, created):
        names = self._names()
        entries = _layer_entries(self.layers, names, "head")
        tensors, layers, files = [], [], {"head.safetensors": []}
        if self.dense:
            layers.append({"name": "features", "op": "concat", "inputs": ["encoder/code"] + [d.name for d in self.dense]})
        for i, (w, b, lname, d) in enumerate(entries):
            tensors.append({"name": w, "file": "head.safetensors", "shape": list(d.weight.shape), "dtype": "F32", "trainable": d.trainable, "part": "head"})
            files["head.safetensors"].append((w, d.weight))
            l = {"name": lname, "op": "dense", "input": self._first_input() if i == 0 else names[i - 1], "weight": w}
            if b:
                tensors.append({"name": b, "file": "head.safetensors", "shape": [d.width], "dtype": "F32", "trainable": d.trainable, "part": "head"})
                files["head.safetensors"].append((b, d.bias))
                l["bias"] = b
            l["activation"] = d.activation
            layers.append(l)
        slot_tensors, training = _training_spec(entries)
        if slot_tensors:
            files["training.safetensors"] = slot_tensors
            for n, a in slot_tensors:
                tensors.append({"name": n, "file": "training.safetensors", "shape": list(a.shape), "dtype": "F32", "trainable": True, "part": "training"})
        spec = {"schemaVersion": 1, "kind": "scorer", "name": self.name}
        if self.description:
            spec["description"] = self.description
        spec["inputs"] = {"sparse": [self.encoder.sparse()]}
        if self.dense:
            spec["inputs"]["dense"] = [d.spec() for d in self.dense]
        spec["tensors"], spec["layers"], spec["output"] = tensors, layers, "p"
        enc = {}
        if self.encoder_name:
            enc["name"] = self.encoder_name
        if self.encoder_digest:
            enc["digest"] = self.encoder_digest
        enc["embedded"] = False
        enc["output"] = "code"
        spec["encoder"] = enc
        if training:
            spec["training"] = training
        spec["lineage"] = self._spec_common(created)
        return spec, files


def write_holdout(path, rows, labels=None, weights=None, slices=None, first_row_id=0):
    """Write a JSON Lines holdout `modelgate push --kind holdout` accepts:
    one line per row with items, values, the dense inputs, label (0/1),
    optional weight and slice, and row_id."""
    rows = _rows(rows)
    with open(path, "w", encoding="utf-8", newline="\n") as f:
        for i, r in enumerate(rows):
            line = {"row_id": first_row_id + i}
            for k, v in r.items():
                line[k] = [float(x) for x in np.asarray(v, dtype=np.float32).reshape(-1)] if k not in ("items",) else v
            if labels is not None:
                line["label"] = int(labels[i])
            if weights is not None:
                line["weight"] = float(weights[i])
            if slices is not None:
                line["slice"] = str(slices[i])
            f.write(json.dumps(line) + "\n")
    return path
