"""ONNX graphs to modelgate models.

    enc = mx.onnx.encoder("encoder.onnx", shows, "listener-encoder", transform="log1p")
    sc = mx.onnx.scorer("head.onnx", enc, "promo-scorer", encoder_name="listener-encoder:v1")

The graph may use only the operators modelgate's runtime has:

  encoder  input x [batch, vocabulary] (the row after the transform) through
           MatMul (x @ W) or Gemm, or ids [batch, n] through Gather(W, ids)
           then ReduceSum over axis 1 (an embedding bag; every id counts its
           transformed value, so use transform="binary" to match a graph
           that sums rows once per id); then MatMul/Gemm, Add (a bias
           initializer), Relu, Sigmoid, Tanh
  scorer   inputs: the code and the dense inputs, joined by one Concat
           (axis 1) in any order; then MatMul/Gemm, Add, Relu, Sigmoid, Tanh,
           ending in one sigmoid unit

Weights must be initializers. Anything else is refused with the node
named. Dense inputs are the graph inputs other than the code, with their
widths from the graph; describes="user" unless dense_inputs says otherwise.
"""

import numpy as np

from . import core

ACTS = {"Relu": "relu", "Sigmoid": "sigmoid", "Tanh": "tanh"}
KNOWN = "Gather, MatMul, Gemm, Add, Relu, Sigmoid, Tanh, Concat"


def _load(model):
    import onnx
    if isinstance(model, (str, bytes)) or hasattr(model, "__fspath__"):
        model = onnx.load(model)
    return model


def _attrs(node):
    import onnx.helper
    return {a.name: onnx.helper.get_attribute_value(a) for a in node.attribute}


def _node_name(node, i):
    return "%s (op %s, node %d)" % (node.name or "unnamed", node.op_type, i)


def _walk(model, start, dense_names=()):
    """Dense layers from the graph's nodes, starting at value `start`;
    returns (layers, dense order in the Concat, sparse form)."""
    from onnx import numpy_helper
    g = model.graph
    inits = {t.name: numpy_helper.to_array(t).astype(np.float64) for t in g.initializer}
    const = {}
    for i, n in enumerate(g.node):
        if n.op_type == "Constant":
            const[n.output[0]] = numpy_helper.to_array(_attrs(n)["value"])
    layers, cur, concat_order, form = [], start, None, None
    pending_gather = None

    def weight_of(name, node, i):
        if name not in inits:
            raise ValueError("node %s: weight %r is not an initializer" % (_node_name(node, i), name))
        return inits[name]

    for i, n in enumerate(g.node):
        op = n.op_type
        if op == "Constant":
            continue
        if op == "Gather":
            if layers or pending_gather is not None or n.input[1] != start or n.input[0] not in inits:
                raise ValueError("node %s: Gather must take an initializer's rows by the graph input's ids, as the first layer" % _node_name(n, i))
            pending_gather = (inits[n.input[0]], n.output[0])
            continue
        if op == "ReduceSum" and pending_gather is not None and n.input[0] == pending_gather[1]:
            axes = _attrs(n).get("axes")
            if axes is None and len(n.input) > 1:
                axes = const.get(n.input[1], inits.get(n.input[1]))
            if axes is None or list(np.asarray(axes).reshape(-1)) != [1] or _attrs(n).get("keepdims", 1) != 0:
                raise ValueError("node %s: after Gather, a ReduceSum over axis 1 with keepdims=0 makes an embedding bag" % _node_name(n, i))
            layers.append(core.Dense(pending_gather[0]))
            pending_gather, cur, form = None, n.output[0], "ids"
            continue
        if op in ("MatMul", "Gemm"):
            a, w = n.input[0], n.input[1]
            if not layers:
                form = "x"
            if a != cur:
                raise ValueError("node %s: takes %r, but the chain is at %r" % (_node_name(n, i), a, cur))
            W = weight_of(w, n, i)
            b = None
            if op == "Gemm":
                at = _attrs(n)
                if at.get("transA", 0):
                    raise ValueError("node %s: transA=1 is not supported" % _node_name(n, i))
                if at.get("transB", 0):
                    W = W.T
                W = W * at.get("alpha", 1.0)
                if len(n.input) > 2 and n.input[2]:
                    b = weight_of(n.input[2], n, i).reshape(-1) * at.get("beta", 1.0)
            layers.append(core.Dense(W, b))
            cur = n.output[0]
            continue
        if op == "Add":
            x, y = n.input
            other = y if x == cur else x if y == cur else None
            if other is None or other not in inits or not layers or layers[-1].bias is not None or layers[-1].activation != "identity":
                raise ValueError("node %s: Add is understood only as a bias initializer right after MatMul" % _node_name(n, i))
            layers[-1].bias = core._vector("bias of " + _node_name(n, i), inits[other], layers[-1].width)
            cur = n.output[0]
            continue
        if op in ACTS:
            if n.input[0] != cur or not layers or layers[-1].activation != "identity":
                raise ValueError("node %s: an activation must follow a layer of the chain" % _node_name(n, i))
            layers[-1].activation = ACTS[op]
            cur = n.output[0]
            continue
        if op == "Concat":
            if concat_order is not None or layers or start not in n.input:
                raise ValueError("node %s: one Concat joining the code and the dense inputs, before the first layer" % _node_name(n, i))
            if _attrs(n).get("axis") not in (1, -1):
                raise ValueError("node %s: Concat axis %r; want 1" % (_node_name(n, i), _attrs(n).get("axis")))
            concat_order = list(n.input)
            cur = n.output[0]
            continue
        raise ValueError("node %s: modelgate's runtime has %s only" % (_node_name(n, i), KNOWN))
    if pending_gather is not None:
        raise ValueError("a Gather not followed by ReduceSum over axis 1")
    outs = [o.name for o in g.output]
    if outs != [cur]:
        raise ValueError("the graph's outputs %s are not the end of the layer chain %r" % (outs, cur))
    return layers, concat_order, form


def _dims(value_info):
    return [d.dim_value if d.HasField("dim_value") else None for d in value_info.type.tensor_type.shape.dim]


def encoder(model, vocabulary, name, *, transform="identity", unknown="bucket", duplicates="sum", decoder_bias=None, **kw):
    """An Encoder from an ONNX graph with one input: x [batch, vocabulary]
    (MatMul/Gemm first) or ids [batch, n] (Gather + ReduceSum first)."""
    m = _load(model)
    inputs = [i.name for i in m.graph.input if i.name not in {t.name for t in m.graph.initializer}]
    if len(inputs) != 1:
        raise ValueError("an encoder graph has one input (the sparse row), this one has %s" % inputs)
    layers, concat, _ = _walk(m, inputs[0])
    if concat is not None:
        raise ValueError("an encoder graph has no Concat")
    return core.Encoder(name, vocabulary, layers, transform=transform, unknown=unknown, duplicates=duplicates,
                        decoder_bias=decoder_bias, source=kw.pop("source", "onnx opset %d" % _opset(m)), **kw)


def scorer(model, encoder, name, *, code_input="code", dense_inputs=None, **kw):
    """A Scorer from an ONNX head graph whose inputs are the code
    (named code_input) and the dense inputs."""
    m = _load(model)
    init = {t.name for t in m.graph.initializer}
    inputs = {i.name: i for i in m.graph.input if i.name not in init}
    if code_input not in inputs:
        raise ValueError("the head graph has no input %r (its inputs: %s); pass code_input=" % (code_input, sorted(inputs)))
    layers, concat, _ = _walk(m, code_input)
    given = {d.name: d for d in core._dense_inputs(dense_inputs)}
    order = [x for x in (concat or [code_input]) if x != code_input]
    dense = []
    for nm in order:
        if nm not in inputs:
            raise ValueError("Concat input %r is not a graph input" % nm)
        dims = _dims(inputs[nm])
        size = dims[-1] if len(dims) == 2 and dims[-1] else None
        d = given.get(nm) or core.DenseInput(nm, size or 1, "user")
        if size and d.size != size:
            raise ValueError("dense input %r: the graph says width %d, dense_inputs %d" % (nm, size, d.size))
        dense.append(d)
    if concat:
        # Put the code first: the rows of the first weight follow the Concat's order.
        widths = {nm: next(d.size for d in dense if d.name == nm) for nm in order}
        widths[code_input] = encoder.layers[-1].width if not isinstance(encoder, str) else core.load_encoder(encoder).layers[-1].width
        starts, pos = {}, 0
        for nm in concat:
            starts[nm] = pos
            pos += widths[nm]
        idx = []
        for nm in [code_input] + order:
            idx += list(range(starts[nm], starts[nm] + widths[nm]))
        layers[0].weight = layers[0].weight[idx]
    return core.Scorer(name, encoder, layers, dense_inputs=dense, source=kw.pop("source", "onnx opset %d" % _opset(m)), **kw)


def _opset(m):
    return max((o.version for o in m.opset_import if o.domain in ("", "ai.onnx")), default=0)
