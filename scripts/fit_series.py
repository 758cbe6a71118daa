#!/usr/bin/env python3
"""Prints the polynomial coefficients of the fused pass's g(d) series
(`G_SHORT`, `G_LONG` in src/kernel/mod.rs).

g(d) = d + exp(-d) - 1 is evaluated as d^2 * P(d). P interpolates
f(d) = g(d) / d^2 at the Chebyshev nodes of [-a, a] (near-minimax,
common practice), which reaches the accuracy of a Taylor polynomial one
degree higher: on [-0.5, 0.5] degree 5 against Taylor's 6, on
[-1.25, 1.25] degree 7 against Taylor's 9. f is taken from its Taylor
series near 0 and from numpy's expm1 elsewhere, in float64.

    python scripts/fit_series.py
"""
from math import factorial

import numpy as np

FITS = [("G_SHORT", 0.5, 5), ("G_LONG", 1.25, 7)]


def f(d):
    d = np.asarray(d, dtype=np.float64)
    out = np.empty_like(d)
    near = np.abs(d) < 0.05
    dn = d[near]
    out[near] = sum((-dn) ** k / factorial(k + 2) for k in range(14))
    df = d[~near]
    out[~near] = (df + np.expm1(-df)) / df**2
    return out


def fit(a, n):
    k = np.arange(n + 1)
    nodes = a * np.cos((2 * k + 1) * np.pi / (2 * (n + 1)))
    return np.polyfit(nodes, f(nodes), n)[::-1]  # lowest degree first


def main():
    for name, a, n in FITS:
        c = fit(a, n)
        x = np.linspace(-a, a, 200_001)
        p = np.polynomial.polynomial.polyval(x, c.astype(np.float32).astype(np.float64))
        err = np.max(np.abs(p - f(x)) / f(x))
        print(f"/// g(d) / d^2 on |d| <= {a}, degree {n}: largest relative error "
              f"{err:.1e} with the coefficients rounded to f32 (scripts/fit_series.py).")
        body = ", ".join(f"{np.float32(v)!r}".replace("np.float32(", "").rstrip(")") for v in c)
        print(f"const {name}: [f32; {n + 1}] = [{body}];")


if __name__ == "__main__":
    main()
