#!/usr/bin/env python3
"""Exact minima of output differences of small ReLU networks over polytopes, for
engine/tests/it/net_polytope_milp.rs.

Reference: scipy.optimize.milp (HiGHS, a general-purpose MILP solver from PyPI) on the
standard big-M encoding of ReLU (common practice: h ≥ z, h ≥ 0, h ≤ z − l·(1 − δ),
h ≤ u·δ with δ binary and [l, u] valid pre-activation bounds, here from interval
arithmetic computed in this script). The solver's value is not trusted as a bound: its
minimiser is repaired into an exactly feasible input (exact_feasible.repair) and the
network is evaluated there exactly (relu_nets.exact_eval, Python's `fractions`), which
gives an exact value that no lower bound may exceed.

Inputs live in a box x = m + r∘ε, ε ∈ [−1, 1]^n (m, r multiples of 1/16, so exact),
cut by 1–3 halfspaces g·ε ≤ rhs on the box's symbols ε.

Usage: net_milp_reference.py OUT_DIR   (writes OUT_DIR/net*.onnx and manifest.json)
manifest.json: {"nets": [{"file", "mid", "rad", "halfspaces": [{"g", "rhs"}],
  "pairs": [{"i", "j", "milp", "milp_dual", "polished", "polished_tol", "upper",
             "upper_exact", "box_milp", "repaired"}]}]}
("polished": the MILP's minimum made accurate by an LP on its activation pattern, see
polish(); "upper": the smallest f64 ≥ the exact value at the best repaired minimiser.)
"""
import json
import os
import sys
from fractions import Fraction

import numpy as np
from scipy.optimize import Bounds, LinearConstraint, linprog, milp

from exact_feasible import ceil_f64, repair
from relu_nets import exact_eval, interval_preactivations, random_net, write_onnx

N_NETS = 16
rng = np.random.default_rng(20260417)


def min_difference(layers, mid, rad, halfspaces, i, j):
    """min over the polytope of y_i − y_j by MILP: (objective, HiGHS dual bound, ε*)."""
    n = len(mid)
    lo = mid - rad
    hi = mid + rad
    pre = interval_preactivations(layers, lo, hi)
    # Variable layout: ε (n), then per hidden layer z (pre-activations), h, δ.
    names = []
    lb, ub, integ = [], [], []

    def add(kind, l, u, integer=False):
        names.append(kind)
        lb.append(l)
        ub.append(u)
        integ.append(1 if integer else 0)
        return len(names) - 1

    eps = [add("eps", -1.0, 1.0) for _ in range(n)]
    rows, rlo, rhi = [], [], []

    def row(coeffs, l, u):
        rows.append(coeffs)
        rlo.append(l)
        rhi.append(u)

    prev = None  # indices of the previous layer's outputs
    for k, (w, b) in enumerate(layers[:-1]):
        l, u = pre[k]
        z = [add("z", l[q], u[q]) for q in range(w.shape[0])]
        h = [add("h", max(l[q], 0.0), max(u[q], 0.0)) for q in range(w.shape[0])]
        for q in range(w.shape[0]):
            # z_q = W_q·a + b_q, with a = m + r∘ε for the first layer.
            coeffs = {z[q]: 1.0}
            if prev is None:
                const = float(w[q] @ mid + b[q])
                for p in range(n):
                    coeffs[eps[p]] = -w[q, p] * rad[p]
            else:
                const = float(b[q])
                for p, v in enumerate(prev):
                    coeffs[v] = -w[q, p]
            row(coeffs, const, const)
            if u[q] <= 0:
                row({h[q]: 1.0}, 0.0, 0.0)
            elif l[q] >= 0:
                row({h[q]: 1.0, z[q]: -1.0}, 0.0, 0.0)
            else:
                d = add("delta", 0.0, 1.0, integer=True)
                row({h[q]: 1.0, z[q]: -1.0}, 0.0, np.inf)  # h ≥ z
                row({h[q]: 1.0, z[q]: -1.0, d: -l[q]}, -np.inf, -l[q])  # h ≤ z − l(1 − δ)
                row({h[q]: 1.0, d: -u[q]}, -np.inf, 0.0)  # h ≤ u·δ
        prev = h
    for hs in halfspaces:
        row({eps[p]: hs["g"][p] for p in range(n)}, -np.inf, hs["rhs"])
    w, b = layers[-1]
    c = np.zeros(len(names))
    const = float(b[i] - b[j])
    if prev is None:  # no hidden layer (not generated here, kept for completeness)
        raise ValueError("networks have hidden layers")
    for p, v in enumerate(prev):
        c[v] = w[i, p] - w[j, p]
    a = np.zeros((len(rows), len(names)))
    for r_, coeffs in enumerate(rows):
        for v, val in coeffs.items():
            a[r_, v] = val
    res = milp(
        c,
        integrality=np.array(integ),
        bounds=Bounds(np.array(lb), np.array(ub)),
        constraints=LinearConstraint(a, np.array(rlo), np.array(rhi)),
        options={"mip_rel_gap": 1e-9, "presolve": True},
    )
    if res.status != 0:
        raise RuntimeError(f"milp did not solve: {res.message}")
    # HiGHS reports no dual bound when presolve alone solved the problem.
    dual = res.mip_dual_bound if res.mip_dual_bound is not None else res.fun
    return res.fun + const, dual + const, res.x[:n]


def polish(layers, mid, rad, halfspaces, i, j, eps_star):
    """The MILP's answer made accurate: with the activation pattern at its minimiser
    fixed (active where the pre-activation is ≥ 0), the network is affine in ε on the
    pattern's region, and min of y_i − y_j over that region ∩ the polytope is an LP
    (scipy.optimize.linprog, HiGHS, tolerances 1e-10). Its region contains the MILP's
    minimiser, so its value is at most the MILP's (up to tolerances) and at least the
    true minimum up to a feasibility error: `tol` = 2·1e-10·Σ|multipliers| bounds how
    far rows violated by 1e-10 can lower the value (weak duality).
    Returns (value, tol, ε) or None when the LP fails."""
    n = len(mid)
    x = mid + rad * np.asarray(eps_star)
    a_map = layers[0][0] * rad  # z = A ε + c
    c_map = layers[0][0] @ mid + layers[0][1]
    a_val = layers[0][0] @ x + layers[0][1]
    rows, rhs = [], []
    for k in range(len(layers) - 1):
        active = a_val >= 0
        for q in range(len(active)):
            sign = -1.0 if active[q] else 1.0  # active: −z ≤ 0; inactive: z ≤ 0
            rows.append(sign * a_map[q])
            rhs.append(-sign * c_map[q])
        a_map, c_map, a_val = a_map * active[:, None], c_map * active, np.maximum(a_val, 0.0)
        w, b = layers[k + 1]
        a_map, c_map, a_val = w @ a_map, w @ c_map + b, w @ a_val + b
    for hs in halfspaces:
        rows.append(np.array(hs["g"]))
        rhs.append(hs["rhs"])
    obj = a_map[i] - a_map[j]
    const = c_map[i] - c_map[j]
    res = linprog(obj, A_ub=np.array(rows), b_ub=np.array(rhs), bounds=[(-1.0, 1.0)] * n, method="highs",
                  options={"primal_feasibility_tolerance": 1e-10, "dual_feasibility_tolerance": 1e-10})
    if res.status != 0:
        return None
    mult = np.abs(res.ineqlin.marginals).sum() + np.abs(res.lower.marginals).sum() + np.abs(res.upper.marginals).sum()
    return float(res.fun + const), float(2e-10 * mult + 1e-12 * (1 + abs(res.fun + const))), res.x


def main():
    out_dir = sys.argv[1]
    os.makedirs(out_dir, exist_ok=True)
    nets = []
    for t in range(N_NETS):
        n_in = int(rng.integers(2, 4))
        hidden = [int(rng.integers(4, 9)) for _ in range(int(rng.integers(1, 3)))]
        n_out = int(rng.integers(2, 4))
        layers = random_net(rng, [n_in] + hidden + [n_out])
        # Box: centre and radius multiples of 1/16.
        mid = rng.integers(-32, 33, n_in) / 16.0
        rad = rng.integers(4, 33, n_in) / 16.0
        # Halfspaces on ε through the neighbourhood of an anchor point q that satisfies
        # them strictly (so the polytope is not empty and repair has an anchor).
        q = rng.uniform(-0.3, 0.3, n_in)
        halfspaces = []
        for _ in range(int(rng.integers(1, 4))):
            g = rng.standard_normal(n_in)
            rhs = float(g @ q + rng.uniform(0.05, 0.4) * np.abs(g).sum())
            halfspaces.append({"g": g.tolist(), "rhs": rhs})
        rows = [h["g"] for h in halfspaces]
        rhs = [h["rhs"] for h in halfspaces]
        pairs = []
        for i in range(n_out):
            for j in range(n_out):
                if i == j:
                    continue
                value, dual, eps = min_difference(layers, mid, rad, halfspaces, i, j)
                box_value, _, _ = min_difference(layers, mid, rad, [], i, j)
                polished = polish(layers, mid, rad, halfspaces, i, j, eps)
                # The exact value at the best repaired candidate (MILP and polished
                # minimisers): an exact upper bound of the true minimum.
                best = None
                for cand in [eps] + ([polished[2]] if polished else []):
                    fixed = repair([Fraction(float(e)) for e in cand], [-1.0] * n_in, [1.0] * n_in, rows, rhs, q.tolist())
                    if fixed is None:
                        continue
                    x = [Fraction(float(m_)) + Fraction(float(r_)) * e for m_, r_, e in zip(mid, rad, fixed[0])]
                    y = exact_eval(layers, x)
                    if best is None or y[i] - y[j] < best[0]:
                        best = (y[i] - y[j], fixed[1])
                if best is None:
                    raise RuntimeError("could not repair the minimiser into the polytope")
                upper, exact = ceil_f64(best[0])
                pairs.append({"i": i, "j": j, "milp": value, "milp_dual": dual,
                              "polished": polished[0] if polished else None,
                              "polished_tol": polished[1] if polished else None,
                              "upper": upper, "upper_exact": exact, "box_milp": box_value, "repaired": best[1]})
        name = f"net{t}.onnx"
        write_onnx(os.path.join(out_dir, name), layers)
        nets.append({"file": name, "widths": [n_in] + hidden + [n_out], "mid": mid.tolist(), "rad": rad.tolist(),
                     "halfspaces": halfspaces, "pairs": pairs})
    json.dump({"nets": nets}, open(os.path.join(out_dir, "manifest.json"), "w"))


if __name__ == "__main__":
    main()
