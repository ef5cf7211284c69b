#!/usr/bin/env python3
"""Check the committed demo networks against the training code's own forward pass.

For every spec demo/*/spec.json and every network it references:
  * the ONNX graph must be Gemm / Relu nodes over DOUBLE tensors (what demo/train.py
    exports); its Gemm layers are read back following the ONNX operator definition
    Y = alpha * A' * B' + beta * C (A' = A or A^T by transA, B' likewise by transB);
  * onnxruntime (a general-purpose reference runtime from the package registry) and
    `forward` imported from demo/train.py (numpy, no retraining) are evaluated on 1000
    random inputs, uniform in [-3, 3] per normalized input (the normalization maps the
    envelope to roughly [-1.5, 1.5]); they must agree to a relative tolerance of 1e-10
    (|ort - numpy| <= 1e-10 * max(1, max |numpy|) per network; both are float64, so only
    summation order differs), and their argmax must agree wherever the top two scores
    differ by more than 1e-9;
  * the ONNX network agrees with the expert rule of demo/train.py (its training labels)
    on at least 90 % of 1000 samples drawn as in training: this ties the committed file
    to the trained network (a garbled export would fall to chance level).
Per spec, also: the committed spec equals the one demo/train.py generates (no stale
file), and its observation expressions, evaluated by tests/reference/spec_expressions.py
(an interpreter of the spec language of its own, not the demo simulator's), equal the
features the networks were trained on (`observe` in train.py) on 1000 sampled states, to
1e-12 relative.
Prints, as JSON on stdout, each spec's network references with the input and output
counts read from the graph's declared input/output dims, for the Rust side to check with
`Spec::check_networks`. Exits non-zero, loudly, on any failure or missing package.

Usage: python3 tests/reference/check_demo_networks.py REPO_ROOT
"""

import glob
import json
import os
import sys

try:
    import numpy as np
    import onnx
    import onnxruntime as ort
    from onnx import numpy_helper
except ImportError as e:  # fail, never skip
    sys.stderr.write(f"check_demo_networks: a required Python package is missing: {e}\n"
                     "install numpy, onnx and onnxruntime (pip install numpy onnx onnxruntime)\n")
    sys.exit(2)

REL_TOL = 1e-10
SAMPLES = 1000
MIN_AGREEMENT = 0.9


def fail(msg):
    sys.stderr.write(f"check_demo_networks: FAIL: {msg}\n")
    sys.exit(1)


def dims(value_info):
    t = value_info.type.tensor_type
    if t.elem_type != onnx.TensorProto.DOUBLE:
        fail(f"tensor '{value_info.name}' has element type {t.elem_type}, expected DOUBLE")
    return [d.dim_value if d.HasField("dim_value") else d.dim_param for d in t.shape.dim]


def layers_of(model, where):
    """(W, b) per Gemm, with W of shape (inputs, outputs), from the ONNX definition."""
    inits = {t.name: numpy_helper.to_array(t) for t in model.graph.initializer}
    layers = []
    expect_gemm = True
    for node in model.graph.node:
        if node.op_type == "Gemm" and expect_gemm:
            a = {x.name: onnx.helper.get_attribute_value(x) for x in node.attribute}
            if a.get("transA", 0) != 0:
                fail(f"{where}: node {node.name}: transA is not used by the demo export")
            w = inits[node.input[1]]
            w = w.T if a.get("transB", 0) else w
            c = inits[node.input[2]] if len(node.input) > 2 else np.zeros(w.shape[1])
            layers.append((a.get("alpha", 1.0) * w, a.get("beta", 1.0) * c))
            expect_gemm = False
        elif node.op_type == "Relu" and not expect_gemm:
            expect_gemm = True
        else:
            fail(f"{where}: unexpected node {node.op_type} '{node.name}'")
    if expect_gemm:
        fail(f"{where}: graph ends with a Relu; the last layer must be linear")
    return layers


def main():
    if len(sys.argv) != 2:
        fail("usage: check_demo_networks.py REPO_ROOT")
    root = os.path.abspath(sys.argv[1])
    sys.path.insert(0, os.path.join(root, "demo"))
    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    import train  # defines `forward`; trains nothing on import
    import spec_expressions  # the reference interpreter of the spec language

    rng_feat = np.random.default_rng(11)

    specs = sorted(glob.glob(os.path.join(root, "demo", "*", "spec.json")))
    if not specs:
        fail(f"no demo/*/spec.json under {root}")
    rng = np.random.default_rng(7)
    report = []
    for spec_path in specs:
        with open(spec_path) as f:
            spec = json.load(f)
        base = os.path.dirname(spec_path)
        cls = train.SCENARIOS.get(spec.get("name"))
        if cls is None:
            fail(f"{spec_path}: no scenario '{spec.get('name')}' in demo/train.py")
        if spec != cls.spec():
            fail(f"{spec_path} differs from what demo/train.py generates: rerun python3 demo/train.py")
        states = cls.sample_states(rng_feat, SAMPLES)
        names = [st["name"] for st in spec["states"]]
        exprs = [spec_expressions.expression(o["expr"], names) for o in spec["controller"]["observations"]]
        feats = np.array([[e(dict(zip(names, map(float, row)))) for e in exprs] for row in states])
        want = cls.observe(states)
        if not np.allclose(feats, want, rtol=1e-12, atol=1e-12):
            fail(f"{spec_path}: the spec's observations differ from the training features "
                 f"by up to {np.max(np.abs(feats - want)):.3e}")
        entry = {"spec": os.path.relpath(spec_path, root), "networks": []}
        for ref in spec["controller"]["networks"]:
            path = os.path.join(base, ref)
            where = os.path.relpath(path, root)
            model = onnx.load(path)
            onnx.checker.check_model(model)
            (inp,), (out,) = model.graph.input, model.graph.output
            din, dout = dims(inp), dims(out)
            if len(din) != 2 or len(dout) != 2:
                fail(f"{where}: expected (batch, n) input and output, got {din} and {dout}")
            n_in, n_out = din[1], dout[1]
            layers = layers_of(model, where)
            if layers[0][0].shape[0] != n_in or layers[-1][0].shape[1] != n_out:
                fail(f"{where}: declared dims {din} -> {dout} disagree with the weights")
            x = rng.uniform(-3.0, 3.0, (SAMPLES, n_in))
            sess = ort.InferenceSession(path, providers=["CPUExecutionProvider"])
            y_ort = sess.run(None, {inp.name: x})[0]
            y_np = train.forward(layers, x)
            scale = max(1.0, float(np.max(np.abs(y_np))))
            err = float(np.max(np.abs(y_ort - y_np)))
            if not err <= REL_TOL * scale:
                fail(f"{where}: onnxruntime and numpy differ by {err:.3e} (scale {scale:.3e})")
            top2 = np.sort(y_np, axis=1)[:, -2:]
            clear = (top2[:, 1] - top2[:, 0]) > 1e-9
            if not np.array_equal(np.argmax(y_ort, axis=1)[clear], np.argmax(y_np, axis=1)[clear]):
                fail(f"{where}: argmax differs between onnxruntime and numpy")
            cmd = spec["controller"]["selection"].get("network_of_command", [0]).index(len(entry["networks"]))
            z, labels = train.labelled_sample(train.SCENARIOS[spec["name"]], rng, SAMPLES, cmd)
            agree = float(np.mean(np.argmax(sess.run(None, {inp.name: z})[0], axis=1) == labels))
            if not agree >= MIN_AGREEMENT:
                fail(f"{where}: agrees with the expert on only {agree:.3f} of samples")
            entry["networks"].append({
                "expert_agreement": agree,
                "ref": ref, "inputs": int(n_in), "outputs": int(n_out),
                "samples": SAMPLES, "max_abs_err": err, "output_scale": scale,
            })
        report.append(entry)
    print(json.dumps({"specs": report}, indent=1))


if __name__ == "__main__":
    main()
