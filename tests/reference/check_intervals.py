"""Check interval enclosures against mpmath evaluated at 60 significant digits.

Reads JSON lines produced by engine/tests/it/interval_reference.rs: each record names a
function, its argument intervals, sample points (endpoints and interior points, exact
doubles) and our enclosure. For every sample point where the real function is defined,
the exact value (mpmath, 60 digits) must lie inside the enclosure. Reference: mpmath
(https://mpmath.org), arbitrary-precision elementary functions.
"""
import json
import math
import sys

try:
    import mpmath
    from mpmath import mp, mpf
except ImportError as e:  # fail loudly: CI installs mpmath
    print(f"mpmath is required for this check: {e}", file=sys.stderr)
    sys.exit(3)

mp.dps = 60


def exact(f, args):
    """The exact real value, or None where the function is undefined."""
    a = [mpf(x) for x in args]
    x = a[0]
    if f == "add":
        return a[0] + a[1]
    if f == "sub":
        return a[0] - a[1]
    if f == "mul":
        return a[0] * a[1]
    if f == "div":
        return None if a[1] == 0 else a[0] / a[1]
    if f == "sqr":
        return x * x
    if f == "powi3":
        return x ** 3
    if f == "powi_m2":
        return None if x == 0 else x ** -2
    if f == "pow":
        return None if x <= 0 else mpmath.power(x, a[1])
    if f == "sqrt":
        return None if x < 0 else mpmath.sqrt(x)
    if f == "exp":
        return mpmath.exp(x)
    if f == "log":
        return None if x <= 0 else mpmath.log(x)
    if f == "sin":
        return mpmath.sin(x)
    if f == "cos":
        return mpmath.cos(x)
    if f == "tan":
        return mpmath.tan(x)
    if f == "atan":
        return mpmath.atan(x)
    if f == "tanh":
        return mpmath.tanh(x)
    if f == "atan2":
        y, xx = a[0], a[1]
        if y == 0 and xx == 0:
            return mpf(0)
        return mpmath.atan2(y, xx)
    raise ValueError(f)


def main(path):
    checked = {}
    defined = {}
    compared = {}
    failures = 0
    with open(path) as fh:
        for line in fh:
            r = json.loads(line)
            f = r["f"]
            checked[f] = checked.get(f, 0) + 1
            lo, hi = r["enc"]
            if lo is None or hi is None:  # undefined enclosure claims nothing
                continue
            defined[f] = defined.get(f, 0) + 1
            # infinite ends travel as the strings "inf" / "-inf"
            lo = mpf(float(lo)) if isinstance(lo, str) else mpf(lo)
            hi = mpf(float(hi)) if isinstance(hi, str) else mpf(hi)
            for p in r["pts"]:
                v = exact(f, p)
                if v is None:
                    continue
                compared[f] = compared.get(f, 0) + 1
                if not (lo <= v <= hi):
                    failures += 1
                    if failures <= 20:
                        print(f"OUTSIDE: {f}{tuple(p)} = {mpmath.nstr(v, 25)} not in [{r['enc'][0]!r}, {r['enc'][1]!r}] (args {r['args']})")
    for f in sorted(checked):
        print(f"{f}: {checked[f]} intervals, {defined.get(f, 0)} with a defined enclosure, "
              f"{compared.get(f, 0)} exact values compared")
    if failures:
        print(f"{failures} sample values outside their enclosure")
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1]))
