"""Reference checks of the exact method (engine/tests/it/exact_reference.rs).

`make DIR` writes small random linear closed loops (ours, for the test only): a plant
with two states, one input, one disturbance and dyadic coefficients, two observations
with noise, three commands, one ReLU network or a bank of two chosen by the previous
command (float64 ONNX, helpers in relu_nets.py), argmax or argmin, latency 0 or 1,
unsafe regions that are conjunctions of linear inequalities, and a 3x3 grid of cells.

`check DIR` reads the engine's verdicts (DIR/verdicts.json) and checks them against
references that share no code with the engine:
* an encoding of its own of each cell's closed loop as a MILP, solved by
  scipy.optimize.milp (HiGHS): states at 4 samples per period (discretised with
  scipy.linalg.expm, Van Loan's block matrix), its own interval big-M bounds, the
  decision won by a margin of 1e-6 and the sample 1e-4 deep inside an unsafe region.
  Where that program is feasible a real trajectory enters the unsafe set, so the engine
  must not have said "safe" (zero tolerance for that);
* the same program with every margin turned the other way (decisions lost by up to
  1e-6, regions grown by 1e-4): where it is infeasible no trajectory meets the unsafe
  set at those samples; counted, to show how much the engine decides;
* every counterexample is replayed: numpy evaluation of the network, the plant stepped
  exactly (scipy expm, 200 steps per period), its recorded noise, disturbances and
  commands; the commands must be the network's, and the state must enter the unsafe
  region it names (constraints ≤ 1e-9);
* dense simulation: 300 runs from every cell the engine proved safe (corners and random
  points, noise and disturbances at the ends of their ranges or random), 100 steps per
  period: none may come within 1e-9 of an unsafe region.

Prints a summary line `exact reference: ...`; exits non-zero with every failure listed.
"""
import json
import math
import os
import sys

import numpy as np
import scipy.linalg
from scipy.optimize import Bounds, LinearConstraint, milp

from relu_nets import random_net, write_onnx

N_CASES = 6
GRID = 3
SAMPLES_PY = 4


def dyadic(rng, lo, hi, denom=16):
    return float(rng.integers(int(lo * denom), int(hi * denom) + 1)) / denom


def make(out):
    cases = []
    for seed in range(N_CASES):
        rng = np.random.default_rng(1000 + seed)
        a = [[0.0, 1.0], [dyadic(rng, -1.0, 0.25), dyadic(rng, -1.0, 0.0)]]
        b = [0.0, dyadic(rng, 0.5, 1.5)]
        c = [0.0, dyadic(rng, -0.125, 0.125)]
        bank = seed % 2 == 0
        nets = []
        for k in range(2 if bank else 1):
            layers = random_net(rng, [2, 6, 3])
            # Round weights to multiples of 1/64 so the networks are exact in any reader.
            layers = [(np.round(w * 64) / 64, np.round(bb * 64) / 64) for w, bb in layers]
            name = f"case{seed}_net{k}.onnx"
            write_onnx(os.path.join(out, name), layers)
            nets.append({"file": name, "layers": [[w.tolist(), bb.tolist()] for w, bb in layers]})
        dyn_v = f"{a[1][0]} * p + {a[1][1]} * v + {b[1]} * u + w + {c[1]}"
        regions = [{"all": ["p >= 0.875"]}, {"all": ["p <= -0.75", "v <= 0.25"]}]
        if seed % 3 == 0:
            regions.append({"all": ["p + 0.5 * v >= 1.0"]})
        spec = {
            "name": f"exact reference case {seed}",
            "states": [{"name": "p"}, {"name": "v"}],
            "inputs": [{"name": "u"}],
            "disturbances": [{"name": "w", "range": [-0.0625, 0.0625]}],
            "dynamics": {"p": "v", "v": dyn_v},
            "controller": {
                "period": 0.5,
                "latency_periods": seed % 2 if seed < 4 else 0,
                "observations": [
                    {"name": "op", "expr": "p", "noise": [-0.015625, 0.015625]},
                    {"name": "ov", "expr": "v", "noise": [-0.03125, 0.03125]},
                ],
                "normalization": {"offset": [0.0, 0.0], "scale": [0.5, 1.0]},
                "networks": [n["file"] for n in nets],
                "selection": {"mode": "previous_command", "network_of_command": [0, 1, 1]} if bank else {"mode": "single"},
                "decision": "argmax" if seed % 3 != 1 else "argmin",
                "commands": [
                    {"name": "neg", "set": {"u": -1.0}},
                    {"name": "zero", "set": {"u": 0.0}},
                    {"name": "pos", "set": {"u": 1.0}},
                ],
                "initial_command": "zero",
            },
            "unsafe": regions,
            "horizon_periods": 3,
            "envelope": {"p": [-0.5, 0.5], "v": [-0.5, 0.5]},
            "refinement": {"max_depth": 4, "split": ["p", "v"]},
            "engine": {"method": "exact", "time_budget_s": 30.0, "exact_samples": 2},
        }
        spec_file = f"case{seed}.json"
        with open(os.path.join(out, spec_file), "w") as f:
            json.dump(spec, f, indent=1)
        cells = []
        for i in range(GRID):
            for j in range(GRID):
                w = 1.0 / GRID
                cells.append({"p": [-0.5 + i * w, -0.5 + (i + 1) * w], "v": [-0.5 + j * w, -0.5 + (j + 1) * w]})
        cases.append({
            "spec": spec_file, "cells": cells, "nets": nets, "a": a, "b": b, "c": c,
        })
    with open(os.path.join(out, "manifest.json"), "w") as f:
        json.dump(cases, f)


# ---------------------------------------------------------------------------
# The loop in numpy
# ---------------------------------------------------------------------------

class Loop:
    def __init__(self, case, spec):
        self.a = np.array(case["a"])
        self.b = np.array(case["b"])
        self.cst = np.array(case["c"])
        self.e = np.array([0.0, 1.0])
        self.nets = [[(np.array(w), np.array(b)) for w, b in n["layers"]] for n in case["nets"]]
        ctl = spec["controller"]
        self.period = ctl["period"]
        self.latency = ctl["latency_periods"]
        self.noise = [o["noise"] for o in ctl["observations"]]
        self.scale = np.array(ctl["normalization"]["scale"])
        self.offset = np.array(ctl["normalization"]["offset"])
        sel = ctl["selection"]
        self.net_of = sel.get("network_of_command", [0, 0, 0])
        self.argmax = ctl["decision"] == "argmax"
        self.u = [cmd["set"]["u"] for cmd in ctl["commands"]]
        self.c0 = [cmd["name"] for cmd in ctl["commands"]].index(ctl["initial_command"])
        self.names = [cmd["name"] for cmd in ctl["commands"]]
        self.wr = spec["disturbances"][0]["range"]
        self.horizon = spec["horizon_periods"]
        # Unsafe regions as rows a·x <= b over (p, v).
        self.regions = [[parse_linear(t) for t in r["all"]] for r in spec["unsafe"]]

    def step_matrices(self, h):
        n = 2
        big = np.zeros((2 * n, 2 * n))
        big[:n, :n] = self.a * h
        big[:n, n:] = np.eye(n) * h
        ex = scipy.linalg.expm(big)
        return ex[:n, :n], ex[:n, n:]

    def net_eval(self, k, z):
        a = np.array(z, dtype=float)
        layers = self.nets[k]
        for i, (w, b) in enumerate(layers):
            a = w @ a + b
            if i < len(layers) - 1:
                a = np.maximum(a, 0.0)
        return a

    def decide(self, prev, x, nu):
        z = (np.array(x) + np.array(nu) - self.offset) / self.scale
        y = self.net_eval(self.net_of[prev], z)
        return int(np.argmax(y) if self.argmax else np.argmin(y))

    def simulate(self, x0, c0, nus, ws, steps, commands=None):
        """States at `steps` points per period; returns (states, decided commands)."""
        phi, gam = self.step_matrices(self.period / steps)
        x = np.array(x0, dtype=float)
        prev = c0
        out = [x.copy()]
        decided = []
        for k in range(len(nus)):
            c = self.decide(prev, x, nus[k])
            decided.append(c)
            applied = c if self.latency == 0 else prev
            drive = self.b * self.u[applied] + self.e * ws[k] + self.cst
            for _ in range(steps):
                x = phi @ x + gam @ drive
                out.append(x.copy())
            prev = c
        return out, decided

    def in_region(self, x, r, tol):
        return all(row[0] @ x <= row[1] + tol for row in self.regions[r])


def parse_linear(text):
    """`lhs >= rhs` or `lhs <= rhs` with lhs a sum of `k * name` or `name` terms over p, v
    and rhs a number (the forms `make` writes) → (a, b) with a·x <= b."""
    if ">=" in text:
        lhs, rhs, sign = *text.split(">="), -1.0
    else:
        lhs, rhs, sign = *text.split("<="), 1.0
    a = np.zeros(2)
    for term in lhs.replace("-", "+-").split("+"):
        term = term.strip()
        if not term:
            continue
        if "*" in term:
            k, name = term.split("*")
            k = float(k)
        else:
            k, name = (-1.0, term[1:]) if term.startswith("-") else (1.0, term)
        a[["p", "v"].index(name.strip())] += k
    return sign * a, sign * float(rhs)


# ---------------------------------------------------------------------------
# The loop as a MILP of our own (scipy.optimize.milp)
# ---------------------------------------------------------------------------

class Program:
    def __init__(self):
        self.lb, self.ub, self.integ = [], [], []
        self.rows, self.rlo, self.rhi = [], [], []

    def var(self, lo, hi, integer=False):
        self.lb.append(lo)
        self.ub.append(hi)
        self.integ.append(1 if integer else 0)
        return len(self.lb) - 1

    def row(self, coeffs, lo, hi):
        self.rows.append(coeffs)
        self.rlo.append(lo)
        self.rhi.append(hi)

    def solve(self):
        n = len(self.lb)
        mat = np.zeros((len(self.rows), n))
        for i, r in enumerate(self.rows):
            for v, k in r:
                mat[i, v] += k
        res = milp(
            c=np.zeros(n),
            integrality=np.array(self.integ),
            bounds=Bounds(np.array(self.lb), np.array(self.ub)),
            constraints=[LinearConstraint(mat, np.array(self.rlo), np.array(self.rhi))],
            options={"time_limit": 60},
        )
        if res.status == 2:
            return "infeasible"
        if res.status == 0:
            return "feasible"
        return "unknown"


def box_bound(coeffs, lb, ub, const=0.0):
    lo = const + sum(k * (lb[v] if k > 0 else ub[v]) for v, k in coeffs)
    hi = const + sum(k * (ub[v] if k > 0 else lb[v]) for v, k in coeffs)
    pad = 1e-9 * (1 + abs(lo) + abs(hi))
    return lo - pad, hi + pad


def encode(loop, cell, c0, grown):
    """Feasible iff (up to HiGHS's tolerances) a trajectory from the cell reaches an
    unsafe region at a sample: 1e-4 deep and with decisions won by 1e-6 (grown=False),
    or within 1e-4 and with decisions lost by up to 1e-6 (grown=True)."""
    eps_d = -1e-6 if grown else 1e-6
    eps_u = -1e-4 if grown else 1e-4
    m = SAMPLES_PY
    phi, gam = loop.step_matrices(loop.period / m)
    p = Program()
    S = loop.horizon * m
    # State boxes for all commands (interval propagation, padded).
    lo = np.array([cell["p"][0], cell["v"][0]])
    hi = np.array([cell["p"][1], cell["v"][1]])
    boxes = [(lo, hi)]
    urange = (min(loop.u), max(loop.u))
    for s in range(S):
        mid, rad = (lo + hi) / 2, (hi - lo) / 2
        dmid = loop.b * (urange[0] + urange[1]) / 2 + loop.e * 0.0 + loop.cst
        drad = np.abs(loop.b) * (urange[1] - urange[0]) / 2 + np.abs(loop.e) * loop.wr[1]
        cm = phi @ mid + gam @ dmid
        cr = np.abs(phi) @ rad + np.abs(gam) @ drad
        pad = 1e-9 * (1 + np.abs(cm) + cr)
        lo, hi = cm - cr - pad, cm + cr + pad
        boxes.append((lo, hi))
    xs = [[p.var(boxes[s][0][i], boxes[s][1][i]) for i in range(2)] for s in range(S + 1)]
    decided = []
    for k in range(loop.horizon):
        d = [p.var(0, 1, True) for _ in loop.u]
        p.row([(v, 1.0) for v in d], 1, 1)
        nu = [p.var(n[0], n[1]) for n in loop.noise]
        w = p.var(loop.wr[0], loop.wr[1])
        # Network inputs.
        z = []
        for j in range(2):
            zb = ((boxes[k * m][0][j] + loop.noise[j][0] - loop.offset[j]) / loop.scale[j],
                  (boxes[k * m][1][j] + loop.noise[j][1] - loop.offset[j]) / loop.scale[j])
            zv = p.var(zb[0] - 1e-9, zb[1] + 1e-9)
            # z*scale - x - nu = -offset
            p.row([(zv, loop.scale[j]), (xs[k * m][j], -1.0), (nu[j], -1.0)], -loop.offset[j], -loop.offset[j])
            z.append(zv)
        if k == 0:
            nets = [(loop.net_of[c0], None)]
        else:
            nets = [(n, [decided[k - 1][c] for c in range(len(loop.u)) if loop.net_of[c] == n]) for n in sorted(set(loop.net_of))]
        for n, act in nets:
            cur = [[(v, 1.0)] for v in z]
            consts = [0.0] * len(z)
            layers = loop.nets[n]
            for li, (W, B) in enumerate(layers):
                new, newc = [], []
                for r in range(W.shape[0]):
                    coeffs = {}
                    cc = float(B[r])
                    for jj in range(W.shape[1]):
                        for v, kk in cur[jj]:
                            coeffs[v] = coeffs.get(v, 0.0) + W[r, jj] * kk
                        cc += W[r, jj] * consts[jj]
                    new.append(list(coeffs.items()))
                    newc.append(cc)
                cur, consts = new, newc
                if li < len(layers) - 1:
                    nxt, nxtc = [], []
                    for coeffs, cc in zip(cur, consts):
                        l, u = box_bound(coeffs, p.lb, p.ub, cc)
                        if u <= 0:
                            nxt.append([])
                            nxtc.append(0.0)
                        elif l >= 0:
                            nxt.append(coeffs)
                            nxtc.append(cc)
                        else:
                            y = p.var(0.0, u)
                            q = p.var(0, 1, True)
                            # y >= z ; y <= z - l(1-q) ; y <= u q
                            p.row([(y, 1.0)] + [(v, -kk) for v, kk in coeffs], cc, np.inf)
                            p.row([(y, 1.0)] + [(v, -kk) for v, kk in coeffs] + [(q, -l)], -np.inf, cc - l)
                            p.row([(y, 1.0), (q, -u)], -np.inf, 0.0)
                            nxt.append([(y, 1.0)])
                            nxtc.append(0.0)
                    cur, consts = nxt, nxtc
            # Decision rows: chosen c (and network n active) ⇒ y_c − y_j ≥ eps_d (argmax).
            for c in range(len(loop.u)):
                for j in range(len(loop.u)):
                    if j == c:
                        continue
                    sgn = 1.0 if loop.argmax else -1.0
                    coeffs = [(v, sgn * kk) for v, kk in cur[c]] + [(v, -sgn * kk) for v, kk in cur[j]]
                    cc = sgn * (consts[c] - consts[j])
                    l, _ = box_bound(coeffs, p.lb, p.ub, cc)
                    big = max(0.0, eps_d - l) * 1.01 + 1e-6
                    terms = coeffs + [(d[c], -big)]
                    if act is None:
                        p.row(terms, eps_d - big - cc, np.inf)
                    else:
                        terms += [(v, -big) for v in act]
                        p.row(terms, eps_d - 2 * big - cc, np.inf)
        decided.append(d)
        # Dynamics over the period's samples.
        for s in range(k * m, (k + 1) * m):
            for i in range(2):
                terms = [(xs[s + 1][i], 1.0)] + [(xs[s][j], -phi[i, j]) for j in range(2)]
                gb = gam[i] @ loop.b
                ge = gam[i] @ loop.e
                gc = gam[i] @ loop.cst
                const = gc
                if loop.latency == 0:
                    terms += [(d[c], -gb * loop.u[c]) for c in range(len(loop.u))]
                elif k == 0:
                    const += gb * loop.u[c0]
                else:
                    terms += [(decided[k - 1][c], -gb * loop.u[c]) for c in range(len(loop.u))]
                terms.append((w, -ge))
                p.row(terms, const - 1e-12, const + 1e-12)
    # Unsafe: one (sample, region) pair.
    zs = []
    for s in range(S + 1):
        for r, region in enumerate(loop.regions):
            zv = p.var(0, 1, True)
            zs.append(zv)
            for a, b in region:
                coeffs = [(xs[s][0], a[0]), (xs[s][1], a[1])]
                _, hi_ = box_bound(coeffs, p.lb, p.ub)
                big = max(0.0, hi_ - (b - eps_u)) * 1.01 + 1e-6
                p.row(coeffs + [(zv, big)], -np.inf, b - eps_u + big)
    p.row([(v, 1.0) for v in zs], 1, 1)
    return p


def main_check(out):
    cases = json.load(open(os.path.join(out, "manifest.json")))
    verdicts = json.load(open(os.path.join(out, "verdicts.json")))
    failures = []
    counts = {"safe": 0, "unsafe": 0, "inconclusive": 0}
    shrunk_feasible = grown_infeasible = decided_where_grown_infeasible = 0
    runs = 0
    rng = np.random.default_rng(7)
    for ci, case in enumerate(cases):
        spec = json.load(open(os.path.join(out, case["spec"])))
        loop = Loop(case, spec)
        for cj, cell in enumerate(case["cells"]):
            v = verdicts[ci][cj]
            kind = v["verdict"]
            counts[kind] += 1
            where = f"case {ci} cell {cj} {cell}"
            shrunk = [encode(loop, cell, loop.c0, False).solve()]
            grown = [encode(loop, cell, loop.c0, True).solve()]
            if "feasible" in shrunk:
                shrunk_feasible += 1
                if kind == "safe":
                    failures.append(f"{where}: engine says safe, scipy milp finds a trajectory 1e-4 deep in the unsafe set")
            if all(g == "infeasible" for g in grown):
                grown_infeasible += 1
                if kind != "inconclusive":
                    decided_where_grown_infeasible += 1
                if kind == "unsafe":
                    # Allowed only if the counterexample enters between samples; the replay decides.
                    pass
            if kind == "unsafe":
                cx = v["counterexample"]
                x0 = [cx["initial_state"]["p"], cx["initial_state"]["v"]]
                if not (cell["p"][0] <= x0[0] <= cell["p"][1] and cell["v"][0] <= x0[1] <= cell["v"][1]):
                    failures.append(f"{where}: counterexample starts outside the cell: {x0}")
                nus = list(zip(cx["noise"]["op"], cx["noise"]["ov"]))
                ws = cx["disturbances"]["w"]
                for k, nu in enumerate(nus):
                    if not all(loop.noise[j][0] <= nu[j] <= loop.noise[j][1] for j in range(2)):
                        failures.append(f"{where}: noise out of range at period {k}: {nu}")
                    if not loop.wr[0] <= ws[k] <= loop.wr[1]:
                        failures.append(f"{where}: disturbance out of range at period {k}")
                c0 = loop.names.index(cx["initial_command"])
                states, decided = loop.simulate(x0, c0, nus, ws, 200)
                named = [loop.names[c] for c in decided]
                if named != cx["commands"]:
                    failures.append(f"{where}: replayed commands {named} differ from the counterexample's {cx['commands']}")
                r = cx["unsafe_region"]
                if not any(loop.in_region(x, r, 1e-9) for x in states):
                    failures.append(f"{where}: counterexample does not enter unsafe region {r} when replayed")
            if kind == "safe":
                for t in range(300):
                    if t < 4:
                        x0 = [cell["p"][t % 2], cell["v"][t // 2]]
                    else:
                        x0 = [rng.uniform(*cell["p"]), rng.uniform(*cell["v"])]
                    mode = t % 3
                    nus, ws = [], []
                    for _ in range(loop.horizon):
                        if mode == 2:
                            nus.append([rng.uniform(*n) for n in loop.noise])
                            ws.append(rng.uniform(*loop.wr))
                        else:
                            nus.append([n[rng.integers(2)] for n in loop.noise])
                            ws.append(loop.wr[mode])
                    states, _ = loop.simulate(x0, loop.c0, nus, ws, 100)
                    runs += 1
                    for x in states:
                        if any(loop.in_region(x, r, 1e-9) for r in range(len(loop.regions))):
                            failures.append(f"{where}: engine says safe, a sampled run enters the unsafe set at {x.tolist()} (x0 {x0})")
                            break
    summary = (
        f"exact reference: cells {sum(counts.values())} (safe {counts['safe']}, unsafe {counts['unsafe']}, "
        f"inconclusive {counts['inconclusive']}); scipy milp: a trajectory 1e-4 deep in {shrunk_feasible} cells, "
        f"none within 1e-4 at the samples in {grown_infeasible} cells (engine decided {decided_where_grown_infeasible} of them); "
        f"{runs} sampled runs from safe cells"
    )
    print(summary)
    json.dump({"summary": summary, "counts": counts, "shrunk_feasible": shrunk_feasible,
               "grown_infeasible": grown_infeasible}, open(os.path.join(out, "check.json"), "w"))
    if failures:
        print("\n".join(failures[:50]), file=sys.stderr)
        sys.exit(1)


if __name__ == "__main__":
    if sys.argv[1] == "make":
        make(sys.argv[2])
    else:
        main_check(sys.argv[2])
