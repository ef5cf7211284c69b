"""Write small ONNX models with the `onnx` package and report their input and output
widths as onnxruntime sees them (reference for the server's model sniff and for the
model checks of `tessera-worker validate`).

Usage: python3 make_onnx_model.py OUT_DIR
Prints one JSON object: {file: {"inputs": n, "outputs": m}, ...}.
"""
import json
import os
import sys

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper


def dense_relu(n_in, hidden, n_out, batch, initializers_as_inputs):
    rng = np.random.default_rng(7)
    w1 = numpy_helper.from_array(rng.standard_normal((n_in, hidden)).astype(np.float32), "w1")
    b1 = numpy_helper.from_array(np.zeros(hidden, np.float32), "b1")
    w2 = numpy_helper.from_array(rng.standard_normal((hidden, n_out)).astype(np.float32), "w2")
    b2 = numpy_helper.from_array(np.zeros(n_out, np.float32), "b2")
    nodes = [
        helper.make_node("MatMul", ["obs", "w1"], ["z1"]),
        helper.make_node("Add", ["z1", "b1"], ["a1"]),
        helper.make_node("Relu", ["a1"], ["h1"]),
        helper.make_node("MatMul", ["h1", "w2"], ["z2"]),
        helper.make_node("Add", ["z2", "b2"], ["scores"]),
    ]
    inputs = [helper.make_tensor_value_info("obs", TensorProto.FLOAT, [batch, n_in])]
    inits = [w1, b1, w2, b2]
    if initializers_as_inputs:
        # Older exporters list initializers among the graph inputs, sometimes first.
        inputs = [helper.make_tensor_value_info(t.name, TensorProto.FLOAT, list(t.dims)) for t in inits] + inputs
    graph = helper.make_graph(
        nodes, "policy", inputs,
        [helper.make_tensor_value_info("scores", TensorProto.FLOAT, [batch, n_out])],
        initializer=inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model


def main():
    out = sys.argv[1]
    report = {}
    for name, args in {
        "fixed_batch.onnx": (3, 16, 5, 1, False),
        "symbolic_batch.onnx": (2, 8, 4, "N", False),
        "inits_as_inputs.onnx": (4, 8, 3, 1, True),
        # For the two-tank spec of worker/tests/it/spec_cli.rs (2 observations, 2 commands).
        "pump_2_outputs.onnx": (2, 8, 2, 1, False),
        "pump_3_outputs.onnx": (2, 8, 3, 1, False),
    }.items():
        path = os.path.join(out, name)
        onnx.save(dense_relu(*args), path)
        sess = ort.InferenceSession(path, providers=["CPUExecutionProvider"])
        real_inputs = [i for i in sess.get_inputs()]
        report[name] = {
            "inputs": int(real_inputs[0].shape[-1]),
            "outputs": int(sess.get_outputs()[0].shape[-1]),
        }
    print(json.dumps(report))


if __name__ == "__main__":
    main()
