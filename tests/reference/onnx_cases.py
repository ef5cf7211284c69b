#!/usr/bin/env python3
"""Reference cases for the ONNX importer, built with the `onnx` helper API and
evaluated with `onnxruntime` (both from PyPI; general-purpose reference libraries).

Usage: onnx_cases.py OUT_DIR

Writes OUT_DIR/*.onnx and OUT_DIR/manifest.json:
  {"models": [{"file", "float32", "ops", "cases": [{"input": [...], "output": [...]}]}],
   "bad":    [{"file", "must_contain": [...]}]}
`input` is the flat input vector (row-major), `output` the flat onnxruntime output.
Random networks use a fixed seed, so the files are the same on every run.
"""
import json
import os
import sys

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper

OPSET = 13
IR_VERSION = 8
rng = np.random.default_rng(20261202)


def tensor(name, arr, raw):
    """An initializer, stored as raw_data (numpy_helper) or in float_data/double_data."""
    if raw:
        return numpy_helper.from_array(arr, name)
    dtype = TensorProto.FLOAT if arr.dtype == np.float32 else TensorProto.DOUBLE
    return helper.make_tensor(name, dtype, list(arr.shape), arr.flatten().tolist(), raw=False)


def model(nodes, inits, in_shape, out_shape, elem, name="net", inputs=None, outputs=None):
    if inputs is None:
        inputs = [helper.make_tensor_value_info("x", elem, in_shape)]
    if outputs is None:
        outputs = [helper.make_tensor_value_info("y", elem, out_shape)]
    g = helper.make_graph(nodes, name, inputs, outputs, inits)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", OPSET)])
    m.ir_version = IR_VERSION
    return m


class Builder:
    """Builds one graph from x to y, naming values v0, v1, ..."""

    def __init__(self, dtype, raw):
        self.dtype = dtype
        self.raw = raw
        self.nodes, self.inits, self.ops = [], [], []
        self.k = 0
        self.cur = "x"

    def fresh(self, p="v"):
        self.k += 1
        return f"{p}{self.k}"

    def w(self, shape, scale=None):
        n = self.fresh("w")
        fan_in = shape[0] if len(shape) > 0 else 1
        s = scale if scale is not None else 1.0 / np.sqrt(max(fan_in, 1))
        arr = (rng.standard_normal(shape) * s).astype(self.dtype)
        self.inits.append(tensor(n, arr, self.raw))
        return n

    def node(self, op, inputs, name=None, **attrs):
        out = self.fresh()
        self.nodes.append(helper.make_node(op, inputs, [out], name=name or f"{op.lower()}{self.k}", **attrs))
        self.ops.append(op)
        self.cur = out
        return out

    def const_node(self, arr):
        out = self.fresh("c")
        t = numpy_helper.from_array(arr, out + "_t")
        self.nodes.append(helper.make_node("Constant", [], [out], name=f"const{self.k}", value=t))
        self.ops.append("Constant")
        return out

    def finish(self):
        # rename the last value to y
        self.nodes[-1].output[0] = "y"


def act(b, kind):
    return b.node(kind, [b.cur])


def net_gemm(dtype, raw, trans_a, trans_b, alpha, beta, depth=2, acts=("Relu",)):
    b = Builder(dtype, raw)
    n_in = 4
    # transA takes A as [K, M]: feed the input as a column [4, 1].
    in_shape = [n_in, 1] if trans_a else ["N", n_in]
    width = n_in
    ta = trans_a
    for d in range(depth):
        out = 6 if d < depth - 1 else 3
        wshape = [out, width] if trans_b else [width, out]
        wn = b.w(wshape)
        cn = b.w([out], scale=0.5)
        b.node("Gemm", [b.cur, wn, cn], alpha=alpha, beta=beta, transA=ta, transB=trans_b)
        ta = 0
        width = out
        if d < depth - 1:
            act(b, acts[d % len(acts)])
    b.finish()
    return b, in_shape, [1, 3]


def net_matmul(dtype, raw):
    # MatMul + Add, Sub of a constant, c - x, Sigmoid, Tanh, Identity, Constant weights.
    b = Builder(dtype, raw)
    b.node("MatMul", [b.cur, b.w([5, 7])])
    b.node("Add", [b.cur, b.w([7], 0.3)])
    act(b, "Relu")
    b.node("Identity", [b.cur])
    wc = b.const_node((rng.standard_normal([7, 6]) / 3).astype(dtype))
    b.node("MatMul", [b.cur, wc])
    b.node("Sub", [b.cur, b.w([1, 6], 0.3)])
    act(b, "Tanh")
    b.node("Sub", [b.w([6], 0.3), b.cur])  # c - x
    b.node("Gemm", [b.cur, b.w([6, 4]), b.w([1, 4], 0.2)])
    act(b, "Sigmoid")
    b.node("MatMul", [b.cur, b.w([4, 2])])
    b.finish()
    return b, [1, 5], [1, 2]


def net_flatten_reshape(dtype, raw):
    # x [1, 2, 3] -> Flatten -> Gemm -> Relu -> Reshape [-1] -> MatMul (1-D) -> Add.
    b = Builder(dtype, raw)
    b.node("Flatten", [b.cur], axis=1)
    b.node("Gemm", [b.cur, b.w([5, 6]), b.w([5], 0.3)], transB=1)
    act(b, "Relu")
    shape = b.const_node(np.array([-1], dtype=np.int64))
    b.node("Reshape", [b.cur, shape])
    b.node("MatMul", [b.cur, b.w([5, 3])])
    b.node("Add", [b.cur, b.w([3], 0.3)])
    act(b, "Relu")
    b.node("Reshape", [b.cur, b.const_node(np.array([1, 3], dtype=np.int64))])
    b.node("Gemm", [b.cur, b.w([3, 2]), b.w([2], 0.3)])
    b.finish()
    return b, [1, 2, 3], [1, 2]


def net_const_left(dtype, raw):
    # x [4, 1] column; W·x with the constant on the left (MatMul and Gemm with B computed).
    b = Builder(dtype, raw)
    b.node("MatMul", [b.w([6, 4]), b.cur])  # [6, 1]
    b.node("Add", [b.cur, b.w([6, 1], 0.3)])
    act(b, "Relu")
    b.node("Gemm", [b.w([6, 3]), b.cur, b.w([3, 1], 0.3)], transA=1, alpha=0.75, beta=-1.25)  # [3, 1]
    b.finish()
    return b, [4, 1], [3, 1]


def net_random_relu(dtype, raw, widths):
    b = Builder(dtype, raw)
    for i in range(len(widths) - 1):
        b.node("Gemm", [b.cur, b.w([widths[i + 1], widths[i]]), b.w([widths[i + 1]], 0.3)], transB=1)
        if i < len(widths) - 2:
            act(b, "Relu")
    b.finish()
    return b, [1, widths[0]], [1, widths[-1]]


def run_ort(m, inputs, in_shape, dtype):
    sess = ort.InferenceSession(m.SerializeToString(), providers=["CPUExecutionProvider"])
    shape = [1 if d == "N" else d for d in in_shape]
    outs = []
    for x in inputs:
        y = sess.run(None, {"x": np.array(x, dtype=dtype).reshape(shape)})[0]
        outs.append([float(v) for v in y.flatten()])
    return outs


def main():
    out_dir = sys.argv[1]
    os.makedirs(out_dir, exist_ok=True)
    manifest = {"models": [], "bad": []}
    specs = []
    for dtype in (np.float64, np.float32):
        tag = "f32" if dtype == np.float32 else "f64"
        for raw in (True, False):
            for ta in (0, 1):
                for tb in (0, 1):
                    alpha = float(np.float32(rng.uniform(0.3, 1.7)))
                    beta = float(np.float32(rng.uniform(-1.5, 1.5)))
                    specs.append((f"gemm_{tag}_raw{int(raw)}_a{ta}_b{tb}", net_gemm(dtype, raw, ta, tb, alpha, beta)))
            specs.append((f"gemm_unit_{tag}_raw{int(raw)}", net_gemm(dtype, raw, 0, 1, 1.0, 1.0, depth=3, acts=("Relu", "Tanh"))))
            specs.append((f"matmul_{tag}_raw{int(raw)}", net_matmul(dtype, raw)))
            specs.append((f"flatten_{tag}_raw{int(raw)}", net_flatten_reshape(dtype, raw)))
            specs.append((f"constleft_{tag}_raw{int(raw)}", net_const_left(dtype, raw)))
        specs.append((f"deep_{tag}", net_random_relu(dtype, True, [3, 16, 16, 16, 4])))
    for name, (b, in_shape, out_shape) in specs:
        elem = TensorProto.FLOAT if b.dtype == np.float32 else TensorProto.DOUBLE
        m = model(b.nodes, b.inits, in_shape, out_shape, elem, name=name)
        n_in = int(np.prod([1 if d == "N" else d for d in in_shape]))
        inputs = [[float(v) for v in rng.standard_normal(n_in).astype(b.dtype) * 2.0] for _ in range(8)]
        outputs = run_ort(m, inputs, in_shape, b.dtype)
        fname = name + ".onnx"
        onnx.save(m, os.path.join(out_dir, fname))
        manifest["models"].append({
            "file": fname,
            "float32": bool(b.dtype == np.float32),
            "ops": sorted(set(b.ops)),
            "cases": [{"input": x, "output": y} for x, y in zip(inputs, outputs)],
        })

    def bad(fname, m, must):
        data = m if isinstance(m, bytes) else m.SerializeToString()
        with open(os.path.join(out_dir, fname), "wb") as f:
            f.write(data)
        manifest["bad"].append({"file": fname, "must_contain": must})

    f64 = TensorProto.DOUBLE
    w44 = numpy_helper.from_array(rng.standard_normal([4, 4]), "w44")
    # An unsupported operator (Conv), named.
    conv_w = numpy_helper.from_array(rng.standard_normal([1, 1, 3, 3]), "conv_w")
    bad("bad_conv.onnx", model([helper.make_node("Conv", ["x", "conv_w"], ["y"], name="conv_layer")], [conv_w],
                               [1, 1, 4, 4], [1, 1, 2, 2], f64), ["conv_layer", "unsupported operator Conv"])
    # An unsupported operator (Softmax), unnamed: op type and index.
    bad("bad_softmax.onnx", model([helper.make_node("Gemm", ["x", "w44"], ["h"], name="fc"),
                                   helper.make_node("Softmax", ["h"], ["y"])], [w44], [1, 4], [1, 4], f64),
        ["Softmax #1", "unsupported operator Softmax"])
    # An INT64 initializer used as a weight.
    wint = numpy_helper.from_array(np.ones([4, 2], dtype=np.int64), "int_weights")
    bad("bad_int_weight.onnx", model([helper.make_node("MatMul", ["x", "int_weights"], ["y"], name="mm_int")], [wint],
                                     [1, 4], [1, 2], f64), ["mm_int", "int_weights", "INT64"])
    # A shape mismatch: weights for 5 inputs on a 4-input vector.
    w53 = numpy_helper.from_array(rng.standard_normal([5, 3]), "w53")
    bad("bad_shape.onnx", model([helper.make_node("Gemm", ["x", "w53"], ["y"], name="fc_mismatch")], [w53],
                                [1, 4], [1, 3], f64), ["fc_mismatch", "shape mismatch"])
    # A cycle: a -> b -> a.
    bad("bad_cycle.onnx", model([helper.make_node("Relu", ["x2"], ["x1"], name="loop_a"),
                                 helper.make_node("Add", ["x1", "x"], ["x2"], name="loop_b"),
                                 helper.make_node("Identity", ["x2"], ["y"], name="out")], [], [1, 4], [1, 4], f64),
        ["cycle", "loop_"])
    # A missing input.
    bad("bad_missing.onnx", model([helper.make_node("Add", ["x", "nowhere"], ["y"], name="add_missing")], [],
                                  [1, 4], [1, 4], f64), ["add_missing", "nowhere"])
    # Two graph inputs.
    two = [helper.make_tensor_value_info("x", f64, [1, 4]), helper.make_tensor_value_info("x_extra", f64, [1, 4])]
    bad("bad_two_inputs.onnx", model([helper.make_node("Relu", ["x"], ["y"], name="r")], [], [1, 4], [1, 4], f64,
                                     inputs=two), ["exactly one input", "x_extra"])
    # Two graph outputs.
    outs = [helper.make_tensor_value_info("y", f64, [1, 4]), helper.make_tensor_value_info("y2", f64, [1, 4])]
    bad("bad_two_outputs.onnx", model([helper.make_node("Relu", ["x"], ["y"], name="r"),
                                       helper.make_node("Relu", ["x"], ["y2"], name="r2")], [], [1, 4], [1, 4], f64,
                                      outputs=outs), ["exactly one output", "y2"])
    # A declared output size the nodes do not compute: 4 outputs declared as 3.
    bad("bad_declared_output.onnx", model([helper.make_node("Gemm", ["x", "w44"], ["y"], name="fc")], [w44],
                                          [1, 4], [1, 3], f64), ["graph output 'y'", "declared as [1, 3]"])
    # An empty graph.
    bad("bad_empty.onnx", model([], [], [1, 4], [1, 4], f64), ["empty graph"])
    # Not ONNX at all.
    bad("bad_text.onnx", b"this is not a protobuf file at all \xff\xfe", ["not an ONNX model"])

    with open(os.path.join(out_dir, "manifest.json"), "w") as f:
        json.dump(manifest, f)


if __name__ == "__main__":
    main()
