#!/usr/bin/env python3
"""Random ReLU networks evaluated by onnxruntime (the reference runtime of the ONNX
standard, from PyPI) at many random points of input boxes, for
engine/tests/it/relaxation_points.rs.

Usage: relax_points_reference.py OUT_DIR
Writes OUT_DIR/net*.onnx (float64, onnx helper API), for every box two raw
little-endian float64 files (points row-major N×n_in, onnxruntime outputs N×n_out) and
OUT_DIR/manifest.json: {"nets": [{"file", "widths", "boxes": [{"lo", "hi", "count",
"points", "outputs"}]}]}. Each box gets 10,000 uniform points (clipped into the box) and
its corners. Seeded: the same files on every run.
"""
import json
import os
import sys

import numpy as np
import onnxruntime as ort

from relu_nets import random_net, write_onnx

POINTS_PER_BOX = 10_000
SHAPES = [[2, 4, 2], [2, 8, 3], [3, 6, 2], [3, 5, 7, 3], [2, 8, 8, 2], [3, 4, 4, 3], [3, 8, 6, 2], [2, 6, 6, 6, 3]]
rng = np.random.default_rng(20260418)


def main():
    out_dir = sys.argv[1]
    os.makedirs(out_dir, exist_ok=True)
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    nets = []
    for t, widths in enumerate(SHAPES):
        layers = random_net(rng, widths)
        name = f"net{t}.onnx"
        path = os.path.join(out_dir, name)
        write_onnx(path, layers)
        sess = ort.InferenceSession(path, opts, providers=["CPUExecutionProvider"])
        boxes = []
        n = widths[0]
        for b in range(2):
            # A small box and a wide one (wide boxes make many neurons unstable).
            centre = rng.uniform(-1.5, 1.5, n)
            radius = rng.uniform(0.05, 0.3, n) if b == 0 else rng.uniform(0.5, 2.0, n)
            lo, hi = centre - radius, centre + radius
            pts = lo + (hi - lo) * rng.random((POINTS_PER_BOX, n))
            corners = np.array([[hi[k] if (mask >> k) & 1 else lo[k] for k in range(n)] for mask in range(1 << n)])
            pts = np.clip(np.vstack([corners, pts]), lo, hi)
            y = sess.run(["y"], {"x": pts})[0]
            pf, yf = f"net{t}_box{b}_x.f64", f"net{t}_box{b}_y.f64"
            pts.astype("<f8").tofile(os.path.join(out_dir, pf))
            np.asarray(y, dtype="<f8").tofile(os.path.join(out_dir, yf))
            boxes.append({"lo": lo.tolist(), "hi": hi.tolist(), "count": len(pts), "points": pf, "outputs": yf})
        nets.append({"file": name, "widths": widths, "boxes": boxes})
    json.dump({"nets": nets}, open(os.path.join(out_dir, "manifest.json"), "w"))


if __name__ == "__main__":
    main()
