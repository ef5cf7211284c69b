#!/usr/bin/env python3
"""Reference trajectories for the plant integrator tests, computed with scipy.

Reads a JSON object {"cases": [request, ...]} on stdin, each request being
  {"system": "van_der_pol", "mu": 1.0, ...} or
  {"system": "pendulum", "g_over_l": 9.81, "damping": 0.1, "torque": 0.5, ...}
  with "points": [[...], ...], "period": T, "periods": N.
Writes {"results": [result, ...]} on stdout; each result holds, for every point, the state at t = k*T, k = 0..N, computed by
scipy.integrate.solve_ivp (method DOP853, rtol = atol = 1e-12, dense output off,
t_eval at the period ends), plus "error_estimate": the largest difference from a
second run at rtol = atol = 1e-13, an estimate of the reference's own global error.

The right-hand sides are written here independently of the Rust expressions.
Fails loudly (non-zero exit) if numpy/scipy are missing.
"""
import json
import sys

import numpy as np
from scipy.integrate import solve_ivp


def rhs_for(req):
    if req["system"] == "van_der_pol":
        mu = float(req["mu"])
        return lambda t, s: [s[1], mu * (1.0 - s[0] ** 2) * s[1] - s[0]]
    if req["system"] == "pendulum":
        g_l = float(req["g_over_l"])
        c = float(req["damping"])
        tau = float(req["torque"])
        return lambda t, s: [s[1], -g_l * np.sin(s[0]) - c * s[1] + tau]
    raise SystemExit("unknown system " + repr(req["system"]))


def solve(f, x0, t_eval, tol):
    sol = solve_ivp(f, (0.0, t_eval[-1]), x0, method="DOP853", rtol=tol, atol=tol, t_eval=t_eval)
    if not sol.success:
        raise SystemExit("solve_ivp failed: " + sol.message)
    return sol.y.T


def run(req):
    f = rhs_for(req)
    period = float(req["period"])
    n = int(req["periods"])
    t_eval = np.array([k * period for k in range(n + 1)])
    trajs = []
    err = 0.0
    for x0 in req["points"]:
        a = solve(f, x0, t_eval, 1e-12)
        b = solve(f, x0, t_eval, 1e-13)
        err = max(err, float(np.max(np.abs(a - b))))
        trajs.append(a.tolist())
    return {"trajectories": trajs, "error_estimate": err, "rtol": 1e-12, "atol": 1e-12}


def main():
    req = json.load(sys.stdin)
    json.dump({"results": [run(case) for case in req["cases"]]}, sys.stdout)


if __name__ == "__main__":
    main()
