#!/usr/bin/env python3
"""Replay closed-loop trajectories of a demo scenario outside the engine.

Input (stdin, JSON): {"spec": path, "runs": [{"x0": [...], "initial_command": name,
"noise": [[...] per period], "disturbances": [[...] per period], "commands": [names]}]}.

Nothing here comes from the engine or from the demo's own simulator (demo/simulate.py):
  * the spec's expressions (dynamics, observations, unsafe constraints) are read by
    tests/reference/spec_expressions.py, an interpreter of the spec language built on
    Python's `ast` module and evaluated point by point with the `math` module;
  * the networks are evaluated by onnxruntime (a reference ONNX runtime from the package
    registry) on the ONNX files the spec names;
  * the plant is integrated with classical RK4 (a textbook method; 200 steps per control
    period, an independent integrator), disturbances held constant over each period as
    recorded.
What is shared with the engine is only the spec's stated semantics (DEVELOPERS.md, spec
v1, latency 0): with c_{-1} the initial command, at each period k the controller observes
x(kT) plus the recorded noise, normalises it with (obs - offset) / scale, feeds it to the
network of the previous command, and takes the argmax (argmin) of its scores; the inputs
of the command hold over the period.

For each run, at every period: the runtime's pick is compared with the recorded command,
and the recorded command drives the plant; the unsafe set is tested at the start and at
every fine step. Output (stdout, JSON): per run, whether every recorded command is the
runtime's pick, the first unsafe time (or null) and the index of the unsafe region
entered, the number of periods integrated to their end without entering the unsafe set
(all of them for a run that stays safe), the networks used in order, and the smallest margin between the top two scores
seen (how far from a tie the decisions were).

Fails loudly when numpy or onnxruntime is missing.
"""

import json
import os
import sys

import numpy as np
import onnxruntime as ort

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import spec_expressions as sx  # noqa: E402

STEPS = 200


class Loop:
    def __init__(self, spec_path):
        with open(spec_path) as f:
            s = json.load(f)
        base = os.path.dirname(os.path.abspath(spec_path))
        self.states = [x["name"] for x in s["states"]]
        self.inputs = [x["name"] for x in s["inputs"]]
        self.dists = [d["name"] for d in s.get("disturbances", [])]
        every = self.states + self.inputs + self.dists
        self.rhs = [sx.expression(s["dynamics"][n], every) for n in self.states]
        c = s["controller"]
        if c.get("latency_periods", 0) != 0:
            raise SystemExit("the replay implements latency 0 only")
        self.period = float(c["period"])
        self.obs = [sx.expression(o["expr"], self.states) for o in c["observations"]]
        nz = c.get("normalization") or {"offset": [0.0] * len(self.obs), "scale": [1.0] * len(self.obs)}
        self.offset, self.scale = list(nz["offset"]), list(nz["scale"])
        opts = ort.SessionOptions()
        opts.intra_op_num_threads = 1
        opts.inter_op_num_threads = 1
        self.sessions = [
            ort.InferenceSession(os.path.join(base, ref), opts, providers=["CPUExecutionProvider"])
            for ref in c["networks"]
        ]
        self.names = [k["name"] for k in c["commands"]]
        self.command_inputs = [[float(k["set"][i]) for i in self.inputs] for k in c["commands"]]
        sel = c["selection"]
        self.network_of = [0] * len(self.names) if sel["mode"] == "single" else list(sel["network_of_command"])
        self.argmax = c["decision"] == "argmax"
        self.unsafe_region = sx.unsafe_set(s)

    def env(self, x, u=None, d=None):
        e = dict(zip(self.states, x))
        if u is not None:
            e.update(zip(self.inputs, u))
        if d is not None:
            e.update(zip(self.dists, d))
        return e

    def f(self, x, u, d):
        e = self.env(x, u, d)
        return [r(e) for r in self.rhs]

    def rk4_step(self, x, u, d, h):
        k1 = self.f(x, u, d)
        k2 = self.f([a + 0.5 * h * b for a, b in zip(x, k1)], u, d)
        k3 = self.f([a + 0.5 * h * b for a, b in zip(x, k2)], u, d)
        k4 = self.f([a + h * b for a, b in zip(x, k3)], u, d)
        return [a + h / 6.0 * (p + 2.0 * q + 2.0 * r + s) for a, p, q, r, s in zip(x, k1, k2, k3, k4)]

    def scores(self, net, x, noise):
        e = self.env(x)
        z = [(o(e) + n - off) / sc for o, n, off, sc in zip(self.obs, noise, self.offset, self.scale)]
        sess = self.sessions[net]
        return sess.run(None, {sess.get_inputs()[0].name: np.array([z], dtype=np.float64)})[0][0]


def replay(loop, run):
    x = [float(v) for v in run["x0"]]
    prev = loop.names.index(run["initial_command"])
    agree, nets, margin = True, [], float("inf")
    t_bad, region = None, loop.unsafe_region(loop.env(x))
    if region is not None:
        t_bad = 0.0
    periods_done = 0
    h = loop.period / STEPS
    for k, cname in enumerate(run["commands"]):
        if t_bad is not None:
            break
        net = loop.network_of[prev]
        nets.append(net)
        scores = loop.scores(net, x, run["noise"][k])
        top = sorted((float(s) for s in scores), reverse=True)
        margin = min(margin, top[0] - top[1])
        picked = int(np.argmax(scores)) if loop.argmax else int(np.argmin(scores))
        if loop.names[picked] != cname:
            agree = False
        cmd = loop.names.index(cname)
        u, d = loop.command_inputs[cmd], [float(v) for v in run["disturbances"][k]]
        for s in range(STEPS):
            x = loop.rk4_step(x, u, d, h)
            region = loop.unsafe_region(loop.env(x))
            if region is not None:
                t_bad = k * loop.period + (s + 1) * h
                break
        else:
            periods_done += 1
        prev = cmd
    return {
        "commands_agree": agree,
        "unsafe_time": t_bad,
        "unsafe_region": region if t_bad is not None else None,
        "periods_safe": periods_done,
        "networks": nets,
        "min_margin": margin,
    }


def main():
    req = json.load(sys.stdin)
    loop = Loop(req["spec"])
    json.dump({"runs": [replay(loop, run) for run in req["runs"]]}, sys.stdout)


if __name__ == "__main__":
    main()
