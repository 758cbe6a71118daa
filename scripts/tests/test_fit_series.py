"""The fused pass's polynomial coefficients in src/kernel/mod.rs are the
ones scripts/fit_series.py computes (Chebyshev interpolation with numpy),
and the polynomial they make matches g(d) = d + expm1(-d) from numpy in
float64 over its whole range."""
import os
import re
import subprocess
import sys

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(os.path.dirname(HERE))


def rust_consts():
    src = open(os.path.join(REPO, "src", "kernel", "mod.rs")).read()
    out = {}
    for name in ("G_SHORT", "G_LONG"):
        m = re.search(name + r": \[f32; \d+\] = \[([^\]]*)\]", src)
        assert m, name
        out[name] = [float(v) for v in m.group(1).replace("\n", " ").split(",") if v.strip()]
    return out


def script_consts():
    text = subprocess.run(
        [sys.executable, os.path.join(REPO, "scripts", "fit_series.py")],
        check=True, capture_output=True, text=True).stdout
    out = {}
    for m in re.finditer(r"const (G_\w+): \[f32; \d+\] = \[([^\]]*)\]", text):
        out[m.group(1)] = [float(v) for v in m.group(2).split(",")]
    return out


def test_coefficients_are_the_fitted_ones():
    rust, fitted = rust_consts(), script_consts()
    assert set(rust) == set(fitted) == {"G_SHORT", "G_LONG"}
    for k in rust:
        assert np.array_equal(np.float32(rust[k]), np.float32(fitted[k])), k


def test_polynomials_match_expm1_in_float64():
    # The bound: a few f32 ulp relative to g, what the kernel's own test
    # (series_for_g_matches_expm1_over_its_range) allows after f32 rounding.
    for name, bound in (("G_SHORT", 0.5), ("G_LONG", 1.25)):
        c = np.float32(rust_consts()[name]).astype(np.float64)
        d = np.linspace(-bound, bound, 100_001)
        d = d[np.abs(d) > 1e-6]
        want = d + np.expm1(-d)
        got = d * d * np.polynomial.polynomial.polyval(d, c)
        assert np.max(np.abs(got - want) / want) < 1e-7, name
