#!/usr/bin/env python3
"""Checks output bounds against the exact value of the network, computed with Python's
`fractions.Fraction` (exact rational arithmetic; every f64 is a dyadic rational, so
the real-arithmetic network value at an f64 point is computed without any rounding).

Usage: exact_bounds_check.py CASES.json  -> prints {"checked": N, "violations": [...]}
and exits 1 if any bound misses the exact value.

CASES.json: {"cases": [{"name", "layers": [{"w": [[...]], "b": [...]} | "relu"],
  "points": [[x...]], "bounds": {METHOD: {"lower", "upper", "diff_lower", "diff_upper"}}}]}
Every point lies in the box the bounds were computed for.
"""
import json
import sys
from fractions import Fraction


def exact_eval(layers, x):
    a = [Fraction(v) for v in x]
    for layer in layers:
        if layer == "relu":
            a = [v if v > 0 else Fraction(0) for v in a]
        else:
            w, b = layer["w"], layer["b"]
            a = [sum((Fraction(wij) * aj for wij, aj in zip(row, a)), Fraction(bi)) for row, bi in zip(w, b)]
    return a


def main():
    data = json.load(open(sys.argv[1]))
    checked, violations = 0, []
    for case in data["cases"]:
        layers = case["layers"]
        for x in case["points"]:
            y = exact_eval(layers, x)
            for method, bd in case["bounds"].items():
                for i, yi in enumerate(y):
                    checked += 1
                    if not (Fraction(bd["lower"][i]) <= yi <= Fraction(bd["upper"][i])):
                        violations.append(f"{case['name']} {method} output {i} at {x}: exact {float(yi)!r} "
                                          f"not in [{bd['lower'][i]!r}, {bd['upper'][i]!r}]")
                    for j, yj in enumerate(y):
                        d = yi - yj
                        if not (Fraction(bd["diff_lower"][i][j]) <= d <= Fraction(bd["diff_upper"][i][j])):
                            violations.append(f"{case['name']} {method} y{i}-y{j} at {x}: exact {float(d)!r} "
                                              f"not in [{bd['diff_lower'][i][j]!r}, {bd['diff_upper'][i][j]!r}]")
    print(json.dumps({"checked": checked, "violations": violations[:20], "violation_count": len(violations)}))
    sys.exit(1 if violations else 0)


if __name__ == "__main__":
    main()
