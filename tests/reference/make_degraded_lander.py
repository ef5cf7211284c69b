"""Write a deliberately degraded copy of the lander demo network and check it with
onnxruntime (the reference ONNX runtime).

The copy's output layer is rewired: 1000 is added to the bias of output 0, the score
of the weakest thrust command ('cut'), so the controller picks 'cut' whatever it
observes. onnxruntime evaluates both networks on 4000 random observations (normalised
inputs uniform in [-6, 6]^2, wider than anything the envelope and noise produce) and
the script prints, as JSON, how often each network picks command 0.

Usage: python3 make_degraded_lander.py IN.onnx OUT.onnx
"""
import json
import sys

import numpy as np
import onnx
import onnxruntime as ort
from onnx import numpy_helper


def picks_cut(path, x):
    sess = ort.InferenceSession(path, providers=["CPUExecutionProvider"])
    name = sess.get_inputs()[0].name
    scores = sess.run(None, {name: x})[0]
    return float(np.mean(np.argmax(scores, axis=1) == 0))


def main():
    src, dst = sys.argv[1], sys.argv[2]
    model = onnx.load(src)
    last = model.graph.node[-1]
    if last.op_type != "Gemm" or len(last.input) < 3:
        raise SystemExit(f"expected the last node to be a Gemm with a bias, got {last.op_type}")
    bias_name = last.input[2]
    for k, init in enumerate(model.graph.initializer):
        if init.name == bias_name:
            b = numpy_helper.to_array(init).copy()
            b[0] += 1000.0
            model.graph.initializer[k].CopyFrom(numpy_helper.from_array(b, bias_name))
            break
    else:
        raise SystemExit(f"bias {bias_name} not found")
    onnx.checker.check_model(model)
    onnx.save(model, dst)
    dtype = np.float64 if model.graph.input[0].type.tensor_type.elem_type == onnx.TensorProto.DOUBLE else np.float32
    x = np.random.default_rng(11).uniform(-6.0, 6.0, size=(4000, 2)).astype(dtype)
    print(json.dumps({"degraded_picks_cut": picks_cut(dst, x), "original_picks_cut": picks_cut(src, x)}))


if __name__ == "__main__":
    main()
