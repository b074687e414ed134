#!/usr/bin/python3
"""Train tiny models in one framework, export them with modelgate_export,
and record the framework's own outputs on a holdout.

    journey.py OUT FRAMEWORK      FRAMEWORK: numpy, torch, sklearn, onnx

Writes into OUT:
    encoder/ scorer/          model directories (the scorer names its encoder
                              as listener-encoder-FRAMEWORK:v1, resolved at push)
    scorer-trainstate/        (torch, sklearn) the same scorer exported with the
                              training-only state the framework left attached
    holdout.jsonl             listeners the models never trained on
    reference.json            {"framework": ..., "reference": how the outputs were
                              computed, "code": [[...]], "p": [[...]], ...}: the
                              framework's own forward pass on the holdout rows
    refused.json              (onnx) the message a graph with an unsupported
                              node got

The scenario is the project's own podcast network: listeners x shows,
episodes played, and whether a listener subscribed to a promoted show.
Every figure is invented here.
"""

import json
import os
import sys

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))
import modelgate_export as mx  # noqa: E402

from modelgate_export.sample import SHOWS, matrix, tenure  # noqa: E402
from modelgate_export import sample  # noqa: E402

CODE = 4
CREATED = "2026-03-02T08:00:00Z"


def network(seed, listeners):
    """The package's invented podcast network (modelgate_export.sample)."""
    _, rows, labels = sample.network(seed, listeners)
    return rows, labels


def run_numpy(train, y, hold):
    """PCA by numpy's SVD, a logistic regression by gradient descent."""
    x = matrix(train)
    mean = x.mean(axis=0)
    _, _, vt = np.linalg.svd(x - mean, full_matrices=False)
    comps = vt[:CODE]
    w = comps.T
    b = -(mean @ w)
    enc = mx.Encoder("listener-encoder", SHOWS, mx.Dense(w, b), transform="log1p", decoder_bias=mean)
    # The head is fitted on the code as the runtime computes it: float32 weights.
    w32, b32 = w.astype(np.float32).astype(np.float64), b.astype(np.float32).astype(np.float64)
    f = np.hstack([x @ w32 + b32, tenure(train)])
    beta, c = np.zeros(f.shape[1]), 0.0
    for _ in range(3000):
        p = 1 / (1 + np.exp(-(f @ beta + c)))
        beta -= 0.5 * f.T @ (p - y) / len(y)
        c -= 0.5 * np.mean(p - y)
    sc = mx.Scorer("promo-scorer", enc, mx.Dense(beta[:, None], [c], "sigmoid"),
                   encoder_name="listener-encoder-numpy:v1", dense_inputs=[mx.DenseInput("listener_tenure", 1, "user")])
    xh = matrix(hold)
    code = xh @ w32 + b32
    recon = code @ w32.T + mean.astype(np.float32).astype(np.float64)
    fh = np.hstack([code, tenure(hold)])
    ph = 1 / (1 + np.exp(-(fh @ beta.astype(np.float32) + np.float32(c))))
    return enc, sc, None, {"code": code, "reconstruction": recon, "p": ph[:, None]}, "numpy: x @ W + b, the tied decoder and the logistic head written out in numpy"


def run_torch(train, y, hold):
    """An EmbeddingBag encoder (sum of log1p(episodes) x row) with a tanh
    layer on top, trained end to end with a Linear-ReLU-Linear-Sigmoid head."""
    import torch
    import torch.nn as nn
    torch.manual_seed(11)
    index = {s: i for i, s in enumerate(SHOWS)}

    def bag(rows):
        ids, w, offs = [], [], []
        for r in rows:
            offs.append(len(ids))
            for item, v in zip(r["items"], r["values"]):
                if item in index:  # unknown shows: the bucket row, zeros
                    ids.append(index[item])
                    w.append(np.log1p(v))
        return torch.tensor(ids, dtype=torch.long), torch.tensor(w, dtype=torch.float32), torch.tensor(offs, dtype=torch.long)

    encoder = nn.Sequential(nn.EmbeddingBag(len(SHOWS), 6, mode="sum"), nn.Linear(6, CODE), nn.Tanh())
    head = nn.Sequential(nn.Linear(CODE + 1, 8), nn.ReLU(), nn.Linear(8, 1), nn.Sigmoid())
    params = list(encoder.parameters()) + list(head.parameters())
    opt = torch.optim.Adam(params, lr=0.01, weight_decay=1e-3)
    ids, w, offs = bag(train)
    t = torch.tensor(tenure(train), dtype=torch.float32)
    target = torch.tensor(y, dtype=torch.float32)[:, None]
    for _ in range(80):
        opt.zero_grad()
        e = encoder[0](ids, offs, per_sample_weights=w)
        p = head(torch.cat([encoder[2](encoder[1](e)), t], dim=1))
        loss = nn.functional.binary_cross_entropy(p, target)
        loss.backward()
        opt.step()
    with torch.no_grad():
        ids, w, offs = bag(hold)
        code = encoder[2](encoder[1](encoder[0](ids, offs, per_sample_weights=w)))
        p = head(torch.cat([code, torch.tensor(tenure(hold), dtype=torch.float32)], dim=1))
    enc = mx.torch.encoder(encoder, SHOWS, "listener-encoder", transform="log1p")
    dense = [mx.DenseInput("listener_tenure", 1, "user")]
    sc = mx.torch.scorer(head, enc, "promo-scorer", encoder_name="listener-encoder-torch:v1", dense_inputs=dense)
    sc_state = mx.torch.scorer(head, enc, "promo-scorer", optimizer=opt, encoder_name="listener-encoder-torch:v1", dense_inputs=dense)
    # The same model from state_dicts: what the modules give, bit for bit.
    enc_sd = mx.torch.encoder(encoder.state_dict(), SHOWS, "listener-encoder", activations=["identity", "tanh"], transform="log1p")
    sc_sd = mx.torch.scorer(head.state_dict(), enc_sd, "promo-scorer", activations=["relu", "sigmoid"],
                            encoder_name="listener-encoder-torch:v1", dense_inputs=dense)
    sd_diff = float(np.max(np.abs(sc_sd.reference(hold, "p") - sc.reference(hold, "p"))))
    # What the runtime cannot compute is refused, naming the module.
    refusals = []
    for bad in (nn.Sequential(nn.EmbeddingBag(len(SHOWS), 4, mode="mean")),
                nn.Sequential(nn.EmbeddingBag(len(SHOWS), 4, mode="sum"), nn.LayerNorm(4))):
        try:
            mx.torch.encoder(bad, SHOWS, "listener-encoder")
            refusals.append(None)
        except ValueError as e:
            refusals.append(str(e))
    ref = {"code": code.double().numpy(), "p": p.double().numpy()}
    return enc, sc, sc_state, ref, "PyTorch %s: the modules' forward pass (float32)" % torch.__version__, {"stateDictMaxAbs": sd_diff, "torchRefusals": refusals}


def run_sklearn(train, y, hold):
    """TruncatedSVD encoder, MLPClassifier head (LogisticRegression checked too)."""
    import warnings
    from sklearn.decomposition import TruncatedSVD
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.linear_model import LogisticRegression
    from sklearn.neural_network import MLPClassifier
    x = matrix(train)
    svd = TruncatedSVD(n_components=CODE, random_state=5).fit(x)
    f = np.hstack([svd.transform(x), tenure(train)])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        mlp = MLPClassifier(hidden_layer_sizes=(8,), alpha=1e-3, max_iter=300, random_state=5).fit(f, y)
    lr = LogisticRegression(C=2.0).fit(f, y)
    enc = mx.sklearn.encoder(svd, SHOWS, "listener-encoder", transform="log1p")
    dense = [mx.DenseInput("listener_tenure", 1, "user")]
    sc = mx.sklearn.scorer(mlp, enc, "promo-scorer", encoder_name="listener-encoder-sklearn:v1", dense_inputs=dense, training_state=False)
    sc_state = mx.sklearn.scorer(mlp, enc, "promo-scorer", encoder_name="listener-encoder-sklearn:v1", dense_inputs=dense)
    sc_lr = mx.sklearn.scorer(lr, enc, "promo-scorer", encoder_name="listener-encoder-sklearn:v1", dense_inputs=dense, training_state=False)
    xh = matrix(hold)
    code = svd.transform(xh)
    fh = np.hstack([code, tenure(hold)])
    ref = {"code": code, "reconstruction": svd.inverse_transform(code), "p": mlp.predict_proba(fh)[:, 1:], "p_logreg": lr.predict_proba(fh)[:, 1:]}
    import sklearn
    return enc, sc, sc_state, ref, "scikit-learn %s: TruncatedSVD.transform/inverse_transform, MLPClassifier and LogisticRegression predict_proba" % sklearn.__version__, sc_lr


def run_onnx(train, y, hold, out):
    """A Linear encoder over log1p(episodes played) and a head over
    concat(tenure, code), trained in PyTorch, exported with
    torch.onnx.export and read back from the ONNX files."""
    import onnx
    import onnx.helper as oh
    import torch
    import torch.nn as nn
    torch.manual_seed(13)

    class Head(nn.Module):
        def __init__(self):
            super().__init__()
            self.net = nn.Sequential(nn.Linear(1 + CODE, 6), nn.ReLU(), nn.Linear(6, 1), nn.Sigmoid())

        def forward(self, code, listener_tenure):
            return self.net(torch.cat([listener_tenure, code], dim=1))  # tenure first: the adapter reorders

    encoder = nn.Sequential(nn.Linear(len(SHOWS), CODE), nn.Tanh())
    head = Head()
    opt = torch.optim.Adam(list(encoder.parameters()) + list(head.parameters()), lr=0.01, weight_decay=1e-3)
    x = torch.tensor(matrix(train), dtype=torch.float32)
    t = torch.tensor(tenure(train), dtype=torch.float32)
    target = torch.tensor(y, dtype=torch.float32)[:, None]
    for _ in range(80):
        opt.zero_grad()
        loss = nn.functional.binary_cross_entropy(head(encoder(x), t), target)
        loss.backward()
        opt.step()
    encoder.eval(), head.eval()
    enc_path, head_path = os.path.join(out, "encoder.onnx"), os.path.join(out, "head.onnx")
    torch.onnx.export(encoder, (x[:2],), enc_path, input_names=["x"], output_names=["code"],
                      dynamic_axes={"x": {0: "batch"}, "code": {0: "batch"}}, opset_version=13)
    torch.onnx.export(head, (torch.zeros(2, CODE), t[:2]), head_path, input_names=["code", "listener_tenure"],
                      output_names=["p"], dynamic_axes={"code": {0: "batch"}, "listener_tenure": {0: "batch"}, "p": {0: "batch"}}, opset_version=13)
    enc = mx.onnx.encoder(enc_path, SHOWS, "listener-encoder", transform="log1p")
    sc = mx.onnx.scorer(head_path, enc, "promo-scorer", encoder_name="listener-encoder-onnx:v1")
    with torch.no_grad():
        xh = torch.tensor(matrix(hold), dtype=torch.float32)
        code = encoder(xh)
        p = head(code, torch.tensor(tenure(hold), dtype=torch.float32))
    ops = sorted({n.op_type for n in onnx.load(enc_path).graph.node} | {n.op_type for n in onnx.load(head_path).graph.node})

    # A graph with a node the runtime does not have is refused, naming it.
    g = onnx.load(head_path)
    g.graph.node[-1].op_type = "Softmax"
    g.graph.node[-1].name = "promo_softmax"
    try:
        mx.onnx.scorer(g, enc, "promo-scorer", encoder_name="listener-encoder-onnx:v1")
        refused = None
    except ValueError as e:
        refused = str(e)

    # An embedding bag as Gather + ReduceSum, built with onnx.helper and
    # evaluated with numpy (np.take, sum over the bag) as its reference.
    rng = np.random.default_rng(17)
    table = rng.normal(size=(len(SHOWS), CODE)).astype(np.float32)
    bias = rng.normal(size=CODE).astype(np.float32)
    graph = oh.make_graph(
        [oh.make_node("Gather", ["table", "ids"], ["rows"], name="lookup"),
         oh.make_node("ReduceSum", ["rows"], ["bag"], name="bag", axes=[1], keepdims=0),
         oh.make_node("Add", ["bag", "bias"], ["pre"], name="bias"),
         oh.make_node("Relu", ["pre"], ["code"], name="relu")],
        "bag", [oh.make_tensor_value_info("ids", onnx.TensorProto.INT64, ["batch", 3])],
        [oh.make_tensor_value_info("code", onnx.TensorProto.FLOAT, ["batch", CODE])],
        [onnx.numpy_helper.from_array(table, "table"), onnx.numpy_helper.from_array(bias, "bias")])
    bag_model = oh.make_model(graph, opset_imports=[oh.make_opsetid("", 11)])
    bag_enc = mx.onnx.encoder(bag_model, SHOWS, "listener-encoder-bag", transform="binary")
    bag_rows = [{"items": [SHOWS[a], SHOWS[b], SHOWS[c]], "values": [float(a % 5 + 1), 2.0, 7.0]}
                for a, b, c in rng.choice(36, size=(20, 3))]
    bag_rows = [r for r in bag_rows if len(set(r["items"])) == 3]
    bag_ref = np.maximum(np.array([np.take(table, [SHOWS.index(i) for i in r["items"]], axis=0).astype(np.float64).sum(axis=0) for r in bag_rows]) + bias, 0)
    bag_got = bag_enc.reference(bag_rows, "code")
    extra = {"refused": refused, "ops": ops, "gatherBagMaxAbs": float(np.max(np.abs(bag_ref - bag_got)))}
    ref = {"code": code.double().numpy(), "p": p.double().numpy()}
    return enc, sc, None, ref, "PyTorch %s: forward pass of the modules exported with torch.onnx.export (onnx %s; no ONNX evaluator in this onnx version)" % (torch.__version__, onnx.__version__), extra


def main():
    out, fw = sys.argv[1], sys.argv[2]
    os.makedirs(out, exist_ok=True)
    train, y = network(1, 600)
    hold, yh = network(2, 240)
    extra, sc_lr = {}, None
    if fw == "numpy":
        enc, sc, sc_state, ref, how = run_numpy(train, y, hold)
    elif fw == "torch":
        enc, sc, sc_state, ref, how, extra = run_torch(train, y, hold)
    elif fw == "sklearn":
        enc, sc, sc_state, ref, how, sc_lr = run_sklearn(train, y, hold)
    elif fw == "onnx":
        enc, sc, sc_state, ref, how, extra = run_onnx(train, y, hold, out)
    else:
        sys.exit("unknown framework " + fw)
    lineage = {"sourceRepository": "https://example.invalid/podcast-models", "sourceCommit": "0123abc"}
    enc.lineage = sc.lineage = lineage
    enc.write(os.path.join(out, "encoder"), sample=train, created=CREATED)
    sc.write(os.path.join(out, "scorer"), sample=train, labels=y, created=CREATED)
    if sc_state is not None:
        sc_state.write(os.path.join(out, "scorer-trainstate"), sample=train, labels=y, created=CREATED)
    if sc_lr is not None:
        sc_lr.write(os.path.join(out, "scorer-logreg"), sample=train, labels=y, created=CREATED)
    mx.write_holdout(os.path.join(out, "holdout.jsonl"), hold, labels=yh)
    doc = {"framework": fw, "reference": how, "rows": len(hold)}
    doc.update({k: np.asarray(v, dtype=np.float64).tolist() for k, v in ref.items()})
    doc.update(extra)
    with open(os.path.join(out, "reference.json"), "w") as f:
        json.dump(doc, f)


if __name__ == "__main__":
    main()
