"""Small random ReLU networks for the reference checks: seeded weights, ONNX files
written with the `onnx` helper API (float64, Gemm + Relu), and an exact evaluation in
rational arithmetic (Python's `fractions`; every f64 weight is a dyadic rational).

A network is a list of (W, b) numpy float64 pairs, ReLU between consecutive pairs.
"""
from fractions import Fraction

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

OPSET = 13
IR_VERSION = 8


def random_net(rng, widths):
    """Weights ~ N(0, 2/fan_in), biases ~ N(0, 0.3²)."""
    layers = []
    for n, m in zip(widths[:-1], widths[1:]):
        w = rng.standard_normal((m, n)) * np.sqrt(2.0 / n)
        b = rng.standard_normal(m) * 0.3
        layers.append((w, b))
    return layers


def write_onnx(path, layers):
    """y = Gemm(… Relu(Gemm(x, W1ᵀ, b1)) …) in float64, batch dimension "N"."""
    nodes, inits = [], []
    cur = "x"
    for k, (w, b) in enumerate(layers):
        inits.append(numpy_helper.from_array(np.ascontiguousarray(w), f"w{k}"))
        inits.append(numpy_helper.from_array(np.ascontiguousarray(b), f"b{k}"))
        out = "y" if k == len(layers) - 1 else f"z{k}"
        nodes.append(helper.make_node("Gemm", [cur, f"w{k}", f"b{k}"], [out], name=f"gemm{k}", transB=1))
        cur = out
        if k < len(layers) - 1:
            nodes.append(helper.make_node("Relu", [cur], [f"h{k}"], name=f"relu{k}"))
            cur = f"h{k}"
    n_in = layers[0][0].shape[1]
    n_out = layers[-1][0].shape[0]
    graph = helper.make_graph(
        nodes,
        "relu_net",
        [helper.make_tensor_value_info("x", TensorProto.DOUBLE, ["N", n_in])],
        [helper.make_tensor_value_info("y", TensorProto.DOUBLE, ["N", n_out])],
        inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)])
    model.ir_version = IR_VERSION
    onnx.checker.check_model(model)
    onnx.save(model, path)


def exact_eval(layers, x):
    """The real-arithmetic network value at x (a list of Fractions), exactly."""
    a = list(x)
    for k, (w, b) in enumerate(layers):
        a = [sum((Fraction(float(wij)) * aj for wij, aj in zip(row, a)), Fraction(float(bi))) for row, bi in zip(w, b)]
        if k < len(layers) - 1:
            a = [v if v > 0 else Fraction(0) for v in a]
    return a


def interval_preactivations(layers, lo, hi, widen=1e-9):
    """Interval bounds [l, u] of every hidden pre-activation over the box, widened by
    a relative 1e-9 plus 1e-12 so that float rounding cannot make them invalid (they
    serve as big-M constants, which only need to be valid bounds)."""
    lo = np.asarray(lo, dtype=float)
    hi = np.asarray(hi, dtype=float)
    out = []
    for k, (w, b) in enumerate(layers[:-1]):
        mid = (lo + hi) / 2
        rad = (hi - lo) / 2
        c = w @ mid + b
        r = np.abs(w) @ rad
        l = c - r
        u = c + r
        pad = widen * (np.abs(c) + r) + 1e-12
        l, u = l - pad, u + pad
        out.append((l, u))
        lo, hi = np.maximum(l, 0.0), np.maximum(u, 0.0)
    return out
