#!/usr/bin/env python3
"""Replay closed-loop trajectories of a demo scenario outside the engine.

Input (stdin, JSON): {"spec": path, "runs": [{"x0": [...], "initial_command": name,
"noise": [[...] per period], "disturbances": [[...] per period], "commands": [names]}]}.

For each run, the controller is re-evaluated with onnxruntime (a reference ONNX runtime)
at every period: observations from the spec's expressions (numpy), plus the recorded
noise, normalised, fed to the network of the previous command; the argmax is compared
with the recorded command. The plant is integrated with classical RK4 (200 steps per
period, an independent integrator) under the recorded disturbance, and the unsafe set is
tested at every fine step. Output (stdout, JSON): per run, whether every recorded command
is the runtime's argmax, the first unsafe time (or null), the networks used in order, and
the smallest margin between the top two scores seen (how far from a tie the decisions were).

Fails loudly when numpy or onnxruntime is missing.
"""

import json
import os
import sys

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(HERE, "..", "..", "demo"))
from simulate import ClosedLoop  # noqa: E402  (the demo's own loop: expressions, networks)


def main():
    req = json.load(sys.stdin)
    loop = ClosedLoop(req["spec"])
    names = [c["name"] for c in loop.spec["controller"]["commands"]]
    steps = 200
    out = []
    for run in req["runs"]:
        x = np.array([run["x0"]], dtype=np.float64)
        prev = names.index(run["initial_command"])
        agree, nets, t_bad, margin = True, [], None, np.inf
        if loop.is_unsafe(x)[0]:
            t_bad = 0.0
        for k, cname in enumerate(run["commands"]):
            if t_bad is not None:
                break
            e = loop.env(x)
            obs = np.stack([np.broadcast_to(o(e), (1,)) for o in loop.obs], axis=1)
            z = (obs + np.array([run["noise"][k]]) - loop.offset) / loop.scale
            j = int(loop.net_of_cmd[prev])
            nets.append(j)
            sess = loop.sessions[j]
            scores = sess.run(None, {sess.get_inputs()[0].name: z.astype(np.float64)})[0][0]
            top = np.sort(scores)[::-1]
            margin = min(margin, float(top[0] - top[1]))
            picked = int(np.argmax(scores)) if loop.decision == "argmax" else int(np.argmin(scores))
            if names[picked] != cname:
                agree = False
            u = loop.cmd_inputs[np.array([names.index(cname)])]
            d = np.array([run["disturbances"][k]], dtype=np.float64)
            dt = loop.period / steps
            for s in range(steps):
                k1 = loop.f(x, u, d)
                k2 = loop.f(x + 0.5 * dt * k1, u, d)
                k3 = loop.f(x + 0.5 * dt * k2, u, d)
                k4 = loop.f(x + dt * k3, u, d)
                x = x + dt / 6.0 * (k1 + 2 * k2 + 2 * k3 + k4)
                if loop.is_unsafe(x)[0]:
                    t_bad = k * loop.period + (s + 1) * dt
                    break
            prev = names.index(cname)
        out.append({"commands_agree": agree, "unsafe_time": t_bad, "networks": nets, "min_margin": margin})
    json.dump({"runs": out}, sys.stdout)


if __name__ == "__main__":
    main()
