#!/usr/bin/env python3
"""Reference optima of small linear programs over a box, for engine/tests/it/lp_reference.rs.

Reference: scipy.optimize.linprog with the HiGHS solver (a general-purpose LP solver
from PyPI), with its feasibility tolerances tightened to 1e-10. Its floating-point
answer is not trusted as a bound: its minimiser is repaired into an exactly feasible
point (exact_feasible.repair, Python's `fractions`), and the objective there is an
exact upper bound of the true minimum, which every rigorous lower bound must respect.

Usage: lp_reference.py CASES.json OUT.json
CASES.json: {"cases": [{"name", "cols", "a" (row-major), "b", "lo", "hi", "c", "c0",
  "anchor": point whose rows hold strictly, or null,
  "known": a point believed exactly feasible, or null}]}
OUT.json: {"results": [{"status": "optimal" | "infeasible" | other,
  "opt": linprog's optimum + c0 (or null),
  "upper": smallest f64 ≥ the objective at an exactly feasible point (or null),
  "upper_exact": whether "upper" equals that objective,
  "feasible_exact": whether an exactly feasible point was found,
  "repaired": how it was found ("clip", "anchor", "known", null)}]}
"""
import json
import sys
from fractions import Fraction

import numpy as np
from scipy.optimize import linprog

from exact_feasible import ceil_f64, dot, frac_vec, repair, violations

OPTIONS = {"primal_feasibility_tolerance": 1e-10, "dual_feasibility_tolerance": 1e-10, "presolve": True}


def solve(case):
    n = case["cols"]
    a = np.array(case["a"], dtype=float).reshape(-1, n) if case["b"] else np.zeros((0, n))
    b = np.array(case["b"], dtype=float)
    c = np.array(case["c"], dtype=float)
    bounds = list(zip(case["lo"], case["hi"]))
    kw = {"A_ub": a, "b_ub": b} if len(b) else {}
    res = linprog(c, bounds=bounds, method="highs", options=OPTIONS, **kw)
    rows = [list(r) for r in a]
    out = {"status": {0: "optimal", 2: "infeasible"}.get(res.status, f"status {res.status}: {res.message}"),
           "opt": None, "upper": None, "upper_exact": False, "feasible_exact": False, "repaired": None}
    candidates = []
    if res.status == 0:
        out["opt"] = float(res.fun) + case["c0"]
        fixed = repair(frac_vec(res.x), case["lo"], case["hi"], rows, case["b"], case["anchor"])
        if fixed is not None:
            candidates.append((fixed[1], fixed[0]))
    if case["known"] is not None:
        p = frac_vec(case["known"])
        inside = all(Fraction(l) <= pi <= Fraction(h) for pi, l, h in zip(p, case["lo"], case["hi"]))
        if inside and all(v <= 0 for v in violations(rows, case["b"], p)):
            candidates.append(("known", p))
    if candidates:
        how, best = min(candidates, key=lambda t: dot(case["c"], t[1]))
        value = dot(case["c"], best) + Fraction(case["c0"])
        out["upper"], out["upper_exact"] = ceil_f64(value)
        out["feasible_exact"] = True
        out["repaired"] = how
    return out


def main():
    cases = json.load(open(sys.argv[1]))["cases"]
    results = [solve(c) for c in cases]
    json.dump({"results": results}, open(sys.argv[2], "w"))


if __name__ == "__main__":
    main()
