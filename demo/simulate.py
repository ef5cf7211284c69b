#!/usr/bin/env python3
"""Simulate the closed loop of a campaign spec from random initial states in its envelope.

A quick sanity check, not a proof: it shows whether a scenario has both safe and unsafe
regions and how often commands (and, for a bank, networks) switch along trajectories.

Semantics (spec v1, latency 0): with c_{-1} the initial command, at each k = 0..H-1 the
controller observes x(kT) plus noise, feeds (observation - offset) / scale to network
network_of_command[c_{k-1}], and takes c_k = argmax of its outputs (ties to the lowest
index, as numpy's argmax); the inputs of c_k hold on [kT, (k+1)T]. The plant is integrated
with classical RK4 on `--steps` fine steps per period; disturbances are constant on each
fine step, drawn uniformly in their range (`--mode random`) or at a random end of it
(`--mode extreme`); noise likewise at each sample. Unsafe is checked at every fine step
(an approximation of the continuous-time check), including t = 0. When a spec lists several
initial commands, trajectory i starts from initial command i modulo their number.

Usage: python3 demo/simulate.py demo/lander/spec.json [--n 2000] [--seed 1] [--mode random]
"""

import argparse
import json
import os
import re
import sys

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import numpy as np  # noqa: E402
import onnxruntime as ort  # noqa: E402

FUNCS = {
    "sin": np.sin,
    "cos": np.cos,
    "tan": np.tan,
    "exp": np.exp,
    "log": np.log,
    "sqrt": np.sqrt,
    "abs": np.abs,
    "atan": np.arctan,
    "atan2": np.arctan2,
    "tanh": np.tanh,
    "min": np.minimum,
    "max": np.maximum,
    "pi": np.pi,
}


def compile_expr(src, names):
    """Spec expression -> function of a dict of arrays. The spec language has Python's
    precedence for + - * / unary minus and a right-associative `^` binding tighter than
    unary minus, which is Python's `**`."""
    for tok in re.findall(r"[A-Za-z_][A-Za-z0-9_]*", src):
        if tok not in names and tok not in FUNCS:
            raise ValueError(f"unknown name '{tok}' in '{src}'")
    code = compile(src.strip().replace("^", "**"), "<spec>", "eval")
    return lambda env: eval(code, {"__builtins__": {}}, {**FUNCS, **env})


def compile_constraint(text, names):
    """`lhs op rhs` -> function giving a boolean array (closed set: < taken as <=)."""
    m = re.search(r"<=|>=|<|>", text)
    if m is None:
        raise ValueError(f"no comparison in '{text}'")
    lhs = compile_expr(text[: m.start()], names)
    rhs = compile_expr(text[m.end() :], names)
    if m.group(0).startswith("<"):
        return lambda env: lhs(env) <= rhs(env)
    return lambda env: lhs(env) >= rhs(env)


class ClosedLoop:
    def __init__(self, spec_path):
        with open(spec_path) as f:
            self.spec = s = json.load(f)
        base = os.path.dirname(os.path.abspath(spec_path))
        self.states = [x["name"] for x in s["states"]]
        self.inputs = [x["name"] for x in s["inputs"]]
        dist = s.get("disturbances", [])
        self.dist_names = [d["name"] for d in dist]
        self.dist_lo = np.array([d["range"][0] for d in dist])
        self.dist_hi = np.array([d["range"][1] for d in dist])
        every = self.states + self.inputs + self.dist_names
        self.rhs = [compile_expr(s["dynamics"][n], every) for n in self.states]
        c = s["controller"]
        self.period = c["period"]
        if c.get("latency_periods", 0) != 0:
            raise SystemExit("simulate.py implements latency 0 only")
        self.obs = [compile_expr(o["expr"], self.states) for o in c["observations"]]
        noise = [o.get("noise", [0.0, 0.0]) for o in c["observations"]]
        self.noise_lo = np.array([n[0] for n in noise])
        self.noise_hi = np.array([n[1] for n in noise])
        nz = c.get("normalization") or {"offset": [0.0] * len(self.obs), "scale": [1.0] * len(self.obs)}
        self.offset, self.scale = np.array(nz["offset"]), np.array(nz["scale"])
        opts = ort.SessionOptions()
        opts.intra_op_num_threads = 1
        opts.inter_op_num_threads = 1
        self.sessions = []
        for ref in c["networks"]:
            if ref.startswith("sha256:"):
                raise SystemExit("simulate.py reads networks from files only")
            self.sessions.append(ort.InferenceSession(os.path.join(base, ref), opts, providers=["CPUExecutionProvider"]))
        sel = c["selection"]
        n_cmd = len(c["commands"])
        self.net_of_cmd = np.zeros(n_cmd, dtype=int) if sel["mode"] == "single" else np.array(sel["network_of_command"])
        self.cmd_names = [k["name"] for k in c["commands"]]
        self.cmd_inputs = np.array([[k["set"][i] for i in self.inputs] for k in c["commands"]], dtype=float)
        init = c["initial_command"]
        init = [init] if isinstance(init, str) else init
        self.initial = [self.cmd_names.index(n) for n in init]
        self.decision = c["decision"]
        self.unsafe = [[compile_constraint(t, self.states) for t in conj["all"]] for conj in s["unsafe"]]
        self.horizon = s["horizon_periods"]
        self.env_lo = np.array([s["envelope"][n][0] for n in self.states])
        self.env_hi = np.array([s["envelope"][n][1] for n in self.states])

    def env(self, x, u=None, d=None):
        e = {n: x[:, i] for i, n in enumerate(self.states)}
        if u is not None:
            e.update({n: u[:, i] for i, n in enumerate(self.inputs)})
        if d is not None:
            e.update({n: d[:, i] for i, n in enumerate(self.dist_names)})
        return e

    def f(self, x, u, d):
        e = self.env(x, u, d)
        return np.stack([np.broadcast_to(r(e), (len(x),)).astype(float) for r in self.rhs], axis=1)

    def unsafe_region(self, x):
        """Index of the first unsafe region (in spec order) that holds each state, or -1."""
        e = self.env(x)
        out = np.full(len(x), -1)
        for i, conj in enumerate(self.unsafe):
            part = np.ones(len(x), dtype=bool)
            for c in conj:
                part &= np.broadcast_to(c(e), (len(x),))
            out = np.where((out < 0) & part, i, out)
        return out

    def is_unsafe(self, x):
        return self.unsafe_region(x) >= 0

    def draw(self, rng, lo, hi, n, mode):
        if mode == "extreme":
            return np.where(rng.random((n, len(lo))) < 0.5, lo, hi)
        return lo + (hi - lo) * rng.random((n, len(lo)))

    def decide(self, x, prev, rng, mode):
        e = self.env(x)
        obs = np.stack([np.broadcast_to(o(e), (len(x),)) for o in self.obs], axis=1)
        obs = obs + self.draw(rng, self.noise_lo, self.noise_hi, len(x), mode)
        z = (obs - self.offset) / self.scale
        nets = self.net_of_cmd[prev]
        cmd = np.empty(len(x), dtype=int)
        for j, sess in enumerate(self.sessions):
            m = nets == j
            if m.any():
                scores = sess.run(None, {sess.get_inputs()[0].name: z[m].astype(np.float64)})[0]
                cmd[m] = np.argmax(scores, axis=1) if self.decision == "argmax" else np.argmin(scores, axis=1)
        return cmd, nets

    def run(self, x0, rng, steps, mode):
        """Returns (unsafe flag, first unsafe time, command changes, network changes, final
        state, number of distinct networks used, first unsafe region or -1) per trajectory."""
        n = len(x0)
        x = x0.copy()
        prev = np.array([self.initial[i % len(self.initial)] for i in range(n)])
        prev_net = self.net_of_cmd[prev]
        region = self.unsafe_region(x)
        bad = region >= 0
        t_bad = np.where(bad, 0.0, np.inf)
        cmd_changes = np.zeros(n, dtype=int)
        net_changes = np.zeros(n, dtype=int)
        nets_used = np.zeros((n, len(self.sessions)), dtype=bool)
        dt = self.period / steps
        for k in range(self.horizon):
            cmd, nets = self.decide(x, prev, rng, mode)
            nets_used[np.arange(n), nets] = True
            if k > 0:
                net_changes += nets != prev_net
            cmd_changes += cmd != prev
            u = self.cmd_inputs[cmd]
            for s in range(steps):
                d = self.draw(rng, self.dist_lo, self.dist_hi, n, mode)
                k1 = self.f(x, u, d)
                k2 = self.f(x + 0.5 * dt * k1, u, d)
                k3 = self.f(x + 0.5 * dt * k2, u, d)
                k4 = self.f(x + dt * k3, u, d)
                x = x + dt / 6.0 * (k1 + 2 * k2 + 2 * k3 + k4)
                hit = self.unsafe_region(x)
                now = (hit >= 0) & ~bad
                t_bad[now] = k * self.period + (s + 1) * dt
                region[now] = hit[now]
                bad |= now
            prev, prev_net = cmd, nets
        return bad, t_bad, cmd_changes, net_changes, x, nets_used.sum(axis=1), region


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("spec")
    ap.add_argument("--n", type=int, default=2000, help="number of trajectories")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--steps", type=int, default=20, help="RK4 steps per control period")
    ap.add_argument("--mode", choices=["random", "extreme"], default="random")
    ap.add_argument("--grid", nargs=2, metavar=("STATE_A", "STATE_B"), help="print the unsafe fraction on a 6x6 grid")
    a = ap.parse_args()
    loop = ClosedLoop(a.spec)
    rng = np.random.default_rng(a.seed)
    x0 = loop.env_lo + (loop.env_hi - loop.env_lo) * rng.random((a.n, len(loop.states)))
    bad, t_bad, cmd_ch, net_ch, _, n_used, region = loop.run(x0, rng, a.steps, a.mode)
    name = loop.spec["name"]
    print(f"{name}: {a.n} trajectories, horizon {loop.horizon} x {loop.period} s, {a.steps} RK4 steps/period, "
          f"disturbance/noise mode {a.mode}, seed {a.seed}")
    print(f"  safe {np.mean(~bad):.3f}   unsafe {np.mean(bad):.3f}")
    H = loop.horizon
    print(f"  command changes per trajectory: mean {cmd_ch.mean():.2f} of {H} decisions "
          f"({cmd_ch.sum() / (a.n * H):.3f} of all decisions)")
    if len(loop.sessions) > 1:
        print(f"  network switches per trajectory: mean {net_ch.mean():.2f}; "
              f"trajectories that use more than one network: {np.mean(net_ch > 0):.3f}")
        print(f"  networks used per trajectory: mean {n_used.mean():.2f} of {len(loop.sessions)}; "
              + ", ".join(f"{k}: {np.mean(n_used == k):.3f}" for k in range(1, len(loop.sessions) + 1)))
    if bad.any():
        print(f"  first unsafe time: median {np.median(t_bad[bad]):.2f} s")
        for i, conj in enumerate(loop.spec["unsafe"]):
            print(f"  first entered through unsafe[{i}] ({' and '.join(conj['all'])}): {np.mean(region == i):.4f}")
    if a.grid:
        ia, ib = loop.states.index(a.grid[0]), loop.states.index(a.grid[1])
        ea = np.linspace(loop.env_lo[ia], loop.env_hi[ia], 7)
        eb = np.linspace(loop.env_lo[ib], loop.env_hi[ib], 7)
        print(f"  unsafe fraction by cell ({a.grid[0]} rows, {a.grid[1]} columns):")
        print("  " + " " * 16 + "".join(f"{(eb[j] + eb[j + 1]) / 2:>8.2f}" for j in range(6)))
        for i in range(6):
            row = []
            for j in range(6):
                m = (x0[:, ia] >= ea[i]) & (x0[:, ia] <= ea[i + 1]) & (x0[:, ib] >= eb[j]) & (x0[:, ib] <= eb[j + 1])
                row.append(f"{np.mean(bad[m]):8.2f}" if m.any() else "       -")
            print(f"  {(ea[i] + ea[i + 1]) / 2:>14.2f}  " + "".join(row))
    return 0


if __name__ == "__main__":
    sys.exit(main())
