#!/usr/bin/env python3
"""Controller networks and their decisions by onnxruntime (the reference runtime of the
ONNX standard, PyPI), for engine/tests/it/decide_on_star.rs.

Usage:
  decide_reference.py nets OUT_DIR
      writes seeded random ReLU networks (float64 ONNX, onnx helper API):
      OUT_DIR/{name}.onnx for the names in NETS, and OUT_DIR/nets.json listing them.
  decide_reference.py eval QUERIES.json
      QUERIES.json: {"queries": [{"model", "inputs", "outputs", "count", "n_in"}]};
      `inputs` is a raw little-endian float64 file (count × n_in, row-major), and the
      network's outputs (count × n_out) are written to `outputs` the same way.
"""
import json
import os
import sys

import numpy as np
import onnxruntime as ort

from relu_nets import random_net, write_onnx

# name: widths (2 inputs, 3 commands).
NETS = {"bank0": [2, 8, 3], "bank1": [2, 6, 6, 3], "single": [2, 8, 3]}


def make(out_dir):
    rng = np.random.default_rng(20260419)
    os.makedirs(out_dir, exist_ok=True)
    for name, widths in NETS.items():
        write_onnx(os.path.join(out_dir, f"{name}.onnx"), random_net(rng, widths))
    json.dump({"nets": {name: f"{name}.onnx" for name in NETS}}, open(os.path.join(out_dir, "nets.json"), "w"))


def evaluate(path):
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    sessions = {}
    for q in json.load(open(path))["queries"]:
        if q["model"] not in sessions:
            sessions[q["model"]] = ort.InferenceSession(q["model"], opts, providers=["CPUExecutionProvider"])
        x = np.fromfile(q["inputs"], dtype="<f8").reshape(q["count"], q["n_in"])
        y = sessions[q["model"]].run(["y"], {"x": x})[0]
        np.asarray(y, dtype="<f8").tofile(q["outputs"])


if __name__ == "__main__":
    if sys.argv[1] == "nets":
        make(sys.argv[2])
    elif sys.argv[1] == "eval":
        evaluate(sys.argv[2])
    else:
        sys.exit(f"unknown mode {sys.argv[1]}")
