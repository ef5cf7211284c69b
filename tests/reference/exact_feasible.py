"""Exact (rational) helpers shared by the LP and network reference checks.

Every f64 is a dyadic rational, so Python's `fractions.Fraction` evaluates linear forms
of f64 data without any rounding. A solver's floating-point answer is never taken as a
proof here: its point is repaired into an exactly feasible point, and the objective at
that point is an exact upper bound of the true minimum (any feasible point's value is).
"""
import math
from fractions import Fraction


def frac_vec(v):
    return [Fraction(x) for x in v]


def dot(a, x):
    return sum((Fraction(ai) * xi for ai, xi in zip(a, x)), Fraction(0))


def clip(x, lo, hi):
    """x clipped to the box [lo, hi], exactly."""
    return [min(max(xi, Fraction(l)), Fraction(h)) for xi, l, h in zip(x, lo, hi)]


def violations(rows, rhs, x):
    """a_i·x − b_i for every row, exactly (positive = violated)."""
    return [dot(a, x) - Fraction(b) for a, b in zip(rows, rhs)]


def repair(x, lo, hi, rows, rhs, anchor=None):
    """An exactly feasible point near x (rows·x ≤ rhs, lo ≤ x ≤ hi) and how it was
    found ("clip" or "anchor"), or None.

    x is clipped to the box; if a row is still violated and `anchor` is a point whose
    every row holds strictly (a_i·p < b_i, checked exactly), the point moves towards it:
    x_t = x + t·(p − x) with t = max_i v_i / (v_i + s_i) (v_i the violation at x, s_i
    the slack at p) satisfies every row, since a_i·x_t − b_i = v_i − t·(v_i + s_i) ≤ 0,
    and stays in the box by convexity.
    """
    x = clip(x, lo, hi)
    v = violations(rows, rhs, x)
    if all(vi <= 0 for vi in v):
        return x, "clip"
    if anchor is None:
        return None
    p = frac_vec(anchor)
    if any(pi < Fraction(l) or pi > Fraction(h) for pi, l, h in zip(p, lo, hi)):
        return None
    s = [-vi for vi in violations(rows, rhs, p)]
    if any(si <= 0 for si in s):
        return None
    t = max(vi / (vi + si) for vi, si in zip(v, s) if vi > 0)
    return [xi + t * (pi - xi) for xi, pi in zip(x, p)], "anchor"


def ceil_f64(q):
    """(the smallest f64 ≥ q, whether it equals q). For an f64 `b`:
    b ≤ q  ⇔  b < up or (b == up and exact)."""
    f = float(q)  # Fraction → float is correctly rounded
    if Fraction(f) < q:
        f = math.nextafter(f, math.inf)
    return f, Fraction(f) == q
