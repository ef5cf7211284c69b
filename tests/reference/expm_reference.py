"""Reference values for the exact method's discretisation (engine/tests/it/discretise_expm.rs).

For a few matrices A (entries multiples of 1/16, so exact in binary) and steps t, writes
e^{At} and the integral of e^{As} over [0, t], each entry as the pair of adjacent
float64 values that bracket the real value (computed by mpmath at 60 digits with
mpmath.expm of Van Loan's block matrix [[A, I], [0, 0]] t, whose top-right block is the
integral: common practice), and the same two matrices from scipy.linalg.expm in float64.

Usage: expm_reference.py OUT.json
"""
import json
import math
import sys

import mpmath
import numpy as np
import scipy.linalg

mpmath.mp.dps = 60

CASES = [
    # (name, A, t)
    ("diagonal", [[-1.5, 0.0], [0.0, 0.25]], 0.2),
    ("yaw model (psi' = r, r' = -r/4)", [[0.0, 1.0], [0.0, -0.25]], 0.125),
    ("rotation", [[0.0, 2.0], [-2.0, 0.0]], 0.1875),
    ("nilpotent", [[0.0, 1.0, 0.0], [0.0, 0.0, 1.0], [0.0, 0.0, 0.0]], 0.15625),
    ("dense 3x3", [[-0.5, 0.25, 0.0625], [0.125, -1.0, 0.5], [0.0, -0.375, -0.25]], 0.25),
    ("unstable", [[0.5, 1.0], [0.0, 0.75]], 0.25),
]


def bracket(x):
    """Largest float64 <= x and smallest float64 >= x, for an mpmath real x."""
    f = float(x)  # nearest
    fx = mpmath.mpf(f)
    if fx == x:
        return [f, f]
    if fx < x:
        return [f, math.nextafter(f, math.inf)]
    return [math.nextafter(f, -math.inf), f]


def main():
    out = []
    for name, a, t in CASES:
        n = len(a)
        big = mpmath.zeros(2 * n, 2 * n)
        for i in range(n):
            for j in range(n):
                big[i, j] = mpmath.mpf(a[i][j]) * mpmath.mpf(t)
            big[i, n + i] = mpmath.mpf(t)
        e = mpmath.expm(big)
        phi = [[bracket(e[i, j]) for j in range(n)] for i in range(n)]
        gamma = [[bracket(e[i, n + j]) for j in range(n)] for i in range(n)]
        bign = np.zeros((2 * n, 2 * n))
        bign[:n, :n] = np.array(a) * t
        bign[:n, n:] = np.eye(n) * t
        es = scipy.linalg.expm(bign)
        out.append({
            "name": name,
            "a": a,
            "t": t,
            "phi": phi,
            "gamma": gamma,
            "phi_scipy": es[:n, :n].tolist(),
            "gamma_scipy": es[:n, n:].tolist(),
        })
    with open(sys.argv[1], "w") as f:
        json.dump(out, f)


if __name__ == "__main__":
    main()
