#!/usr/bin/env python3
"""High-precision Boys-function values F_n(x) = int_0^1 t^(2n) exp(-x t^2) dt
for tests/integrals.rs, computed with mpmath (PyPI `mpmath`) at 50 digits via
F_n(x) = gamma_lower(n + 1/2, x) / (2 x^(n + 1/2)), and F_n(0) = 1/(2n + 1).

Usage:
    /tmp/qcvenv/bin/pip install mpmath
    /tmp/qcvenv/bin/python scripts/reference/boys.py   # -> tests/data/qc/boys.json
"""
import json
import os

import mpmath as mp

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.normpath(os.path.join(HERE, "..", "..", "tests", "data", "qc", "boys.json"))
mp.mp.dps = 50


def boys(n, x):
    n = mp.mpf(n)
    x = mp.mpf(x)
    if x == 0:
        return 1 / (2 * n + 1)
    return mp.gammainc(n + mp.mpf(1) / 2, 0, x) / (2 * x ** (n + mp.mpf(1) / 2))


def main():
    xs = [0.0, 1e-14, 1e-10, 1e-7, 1e-4, 1e-3, 0.01, 0.0625, 0.1, 0.3, 0.5, 0.77, 1.0]
    # a dense sweep, off the internal grid points on purpose, and both sides of
    # every switch point an implementation might have
    xs += [0.013 + 0.37 * k for k in range(160)]
    xs += [29.9, 30.0, 30.1, 35.0, 39.99, 40.0, 40.01, 49.99, 50.0, 50.01, 60.0, 75.5, 100.0, 117.0,
           250.0, 1e3, 1e4, 1e6]
    ns = list(range(0, 33))
    values = []
    for n in ns:
        for x in xs:
            values.append([n, x, float(boys(n, x))])
    with open(OUT, "w") as fh:
        json.dump(
            {
                "generator": "scripts/reference/boys.py",
                "library": "mpmath",
                "library_version": mp.__version__,
                "digits": mp.mp.dps,
                "definition": "F_n(x) = int_0^1 t^(2n) exp(-x t^2) dt",
                "values": values,
            },
            fh,
            separators=(",", ":"),
        )
        fh.write("\n")
    print(f"{OUT}: {len(values)} values")


if __name__ == "__main__":
    main()
