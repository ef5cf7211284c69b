#!/usr/bin/env python3
"""Support values of constrained zonotopes, for engine/tests/it/star_sampling.rs.

A star is {x : x_i = c_i + Σ_s g_is ε_s + d_i, ε ∈ [−1, 1]^K, |d_i| ≤ e_i,
a_k·ε ≤ rhs_k}. Its support in direction v, max of v·x over the star, is a linear
program; the reference is scipy.optimize.linprog with HiGHS (a general-purpose LP
solver from PyPI), feasibility tolerances tightened to 1e-10.

Usage: star_support_reference.py IN.json OUT.json
IN.json:  {"stars": [{"comps": [{"c", "terms": [[s, g], ...], "e"}],
                       "cons": [{"terms": [[s, a], ...], "rhs"}], "dirs": [[v...], ...]}]}
OUT.json: {"sups": [[support or null when linprog finds the star empty, ...], ...]}
"""
import json
import sys

import numpy as np
from scipy.optimize import linprog

OPTIONS = {"primal_feasibility_tolerance": 1e-10, "dual_feasibility_tolerance": 1e-10}


def supports(star):
    comps, cons = star["comps"], star["cons"]
    syms = sorted({s for c in comps for s, _ in c["terms"]} | {s for h in cons for s, _ in h["terms"]})
    col = {s: k for k, s in enumerate(syms)}
    n_sym, n = len(syms), len(comps)
    # Variables: the symbols, then one error term d_i per state.
    bounds = [(-1.0, 1.0)] * n_sym + [(-c["e"], c["e"]) for c in comps]
    g = np.zeros((n, n_sym + n))
    centre = np.array([c["c"] for c in comps])
    for i, c in enumerate(comps):
        for s, v in c["terms"]:
            g[i, col[s]] = v
        g[i, n_sym + i] = 1.0
    a = np.zeros((len(cons), n_sym + n))
    for k, h in enumerate(cons):
        for s, v in h["terms"]:
            a[k, col[s]] = v
    b = np.array([h["rhs"] for h in cons])
    kw = {"A_ub": a, "b_ub": b} if len(cons) else {}
    out = []
    for v in star["dirs"]:
        v = np.array(v)
        res = linprog(-(v @ g), bounds=bounds, method="highs", options=OPTIONS, **kw)
        if res.status == 2:
            out.append(None)
        elif res.status == 0:
            out.append(float(-res.fun + v @ centre))
        else:
            raise RuntimeError(f"linprog: {res.message}")
    return out


def main():
    stars = json.load(open(sys.argv[1]))["stars"]
    json.dump({"sups": [supports(s) for s in stars]}, open(sys.argv[2], "w"))


if __name__ == "__main__":
    main()
