#!/usr/bin/env python3
"""The divergence floor that storing logits in a narrow float type causes.

Storing a logit row z in bf16 or f16 rounds every entry: z'_i = z_i + e_i. Even
when the model itself is perfect, p = softmax(z) and q = softmax(z') differ.
Model of that floor, used to check klgauge's `storage_floor`:

* Second-order expansion (common practice; see any text on the Fisher
  information of the softmax/exponential family): with d_i = log p_i - log q_i,
  KL(p||q) = 1/2 Var_p(d) + O(d^3), and Var_p(d) = Var_p(e) because the
  normaliser shifts every d_i by the same constant.
* Rounding to nearest with spacing s leaves an error spread evenly over
  [-s/2, s/2], variance s^2/12 (common practice: the uniform quantisation-noise
  model). Taking the errors as independent,
      E[Var_p(e)] = sum_i p_i (1 - p_i) s_i^2 / 12,
  so the predicted floor of one row is  1/2 * sum_i p_i (1 - p_i) s_i^2 / 12.
* An entry that is exactly representable in the storage type (for example the
  0 that centering puts at the row maximum) has no error: its variance is 0.

The spacing s_i depends on |z_i| and the type: a normal number in
[2^k, 2^(k+1)) has spacing 2^(k - m), m = 23 (f32), 10 (f16), 7 (bf16)
(IEEE 754 binary32/binary16 and the bfloat16 layout: 1 sign bit, 8 exponent
bits, 7 stored significand bits). Below the smallest normal (2^-126 for f32
and bf16, 2^-14 for f16) the spacing stays at that of the smallest binade.

So raw logits near 25 (spacing 1/8 in bf16) cost about 1e-3 nats for a
spread-out row, while centered logits (the mass sits near 0, where the
spacing is tiny) cost orders of magnitude less.

Command line:  python scripts/floor_model.py FILE_OR_DIR [--as bf16|f16|f32]
prints the predicted floor (mean over rows) of a logit file, taking the stored
values as the true ones, in the dtype it is stored in or the one given.
"""
from __future__ import annotations

import sys

import numpy as np

MANTISSA_BITS = {"f32": 23, "f16": 10, "bf16": 7}
MIN_NORMAL_EXP = {"f32": -126, "f16": -14, "bf16": -126}
FORMS = ("raw", "centered", "logprobs")


def rounding_step(x: np.ndarray, dtype: str) -> np.ndarray:
    """Spacing of the numbers representable in `dtype` around each |x| (float64)."""
    if dtype not in MANTISSA_BITS:
        raise ValueError(f"unknown dtype {dtype!r}; expected one of {sorted(MANTISSA_BITS)}")
    x = np.abs(np.asarray(x, dtype=np.float64))
    # frexp: x = m * 2^e with m in [0.5, 1), so x lies in [2^(e-1), 2^e).
    _, e = np.frexp(x)
    k = np.maximum(e.astype(np.int64) - 1, MIN_NORMAL_EXP[dtype])
    step = np.ldexp(1.0, k - MANTISSA_BITS[dtype])
    return np.where(x == 0.0, 0.0, step)


def transform(z: np.ndarray, form: str) -> np.ndarray:
    """Apply a logits form to rows z (last axis = vocabulary), in float64."""
    z = np.asarray(z, dtype=np.float64)
    if form == "raw":
        return z
    m = z.max(axis=-1, keepdims=True)
    if form == "centered":
        return z - m
    if form == "logprobs":
        return z - (m + np.log(np.exp(z - m).sum(axis=-1, keepdims=True)))
    raise ValueError(f"unknown form {form!r}; expected one of {FORMS}")


def softmax(z: np.ndarray) -> np.ndarray:
    z = np.asarray(z, dtype=np.float64)
    e = np.exp(z - z.max(axis=-1, keepdims=True))
    return e / e.sum(axis=-1, keepdims=True)


def _error_variance(v: np.ndarray, dtype: str, exact_is_free: bool) -> np.ndarray:
    var = rounding_step(v, dtype) ** 2 / 12.0
    if exact_is_free:
        var = np.where(round_to(v, dtype) == v, 0.0, var)
    return var


def predicted_floor_rows(z: np.ndarray, dtype: str, form: str = "raw",
                         ref_dtype: str | None = None, exact_is_free: bool = True) -> np.ndarray:
    """Predicted KL (nats) per row caused by storing rows z in `dtype` after `form`.

    With `ref_dtype`, the reference is taken as stored in that type too and
    the two independent rounding errors add their variances. `exact_is_free`
    gives entries already representable in the type no error; pass False
    when z are stored values standing in for unknown exact ones (then only
    an exact 0 is free).
    """
    v = transform(z, form)
    p = softmax(v)
    var = _error_variance(v, dtype, exact_is_free)
    if ref_dtype is not None:
        var = var + _error_variance(v, ref_dtype, exact_is_free)
    return 0.5 * np.sum(p * (1.0 - p) * var, axis=-1)


def predicted_floor(z: np.ndarray, dtype: str, form: str = "raw",
                    ref_dtype: str | None = None, exact_is_free: bool = True) -> float:
    """Mean over rows of `predicted_floor_rows`."""
    z = np.atleast_2d(z)
    return float(np.mean(predicted_floor_rows(z, dtype, form, ref_dtype, exact_is_free)))


# --- direct simulation ------------------------------------------------------

def round_to_bf16(x: np.ndarray) -> np.ndarray:
    """Round to the nearest bfloat16 (ties to even), returned as float64.

    Via float32 bits: add 0x7FFF plus the lowest kept bit, drop the low 16 bits
    (common practice for float32 -> bfloat16 round-to-nearest-even; no NaN/inf
    handling needed for the finite data used here).
    """
    f = np.asarray(x, dtype=np.float32)
    u = f.view(np.uint32).astype(np.uint64)
    u = (u + 0x7FFF + ((u >> 16) & 1)) & 0xFFFF0000
    return u.astype(np.uint32).view(np.float32).astype(np.float64)


def round_to(x: np.ndarray, dtype: str) -> np.ndarray:
    if dtype == "bf16":
        return round_to_bf16(x)
    if dtype == "f16":
        return np.asarray(x, dtype=np.float64).astype(np.float16).astype(np.float64)
    if dtype == "f32":
        return np.asarray(x, dtype=np.float64).astype(np.float32).astype(np.float64)
    raise ValueError(f"unknown dtype {dtype!r}")


def kl_rows(zp: np.ndarray, zq: np.ndarray) -> np.ndarray:
    """KL(softmax(zp) || softmax(zq)) per row in float64, as a sum of
    non-negative terms p*(d + exp(-d) - 1), d = log p - log q."""
    zp = np.asarray(zp, dtype=np.float64)
    zq = np.asarray(zq, dtype=np.float64)
    lp = transform(zp, "logprobs")
    lq = transform(zq, "logprobs")
    d = lp - lq
    return np.sum(np.exp(lp) * (d + np.expm1(-d)), axis=-1)


def measured_floor(z: np.ndarray, dtype: str, form: str = "raw") -> float:
    """Mean KL caused by actually rounding rows z (after `form`) to `dtype`."""
    v = transform(z, form)
    return float(np.mean(kl_rows(v, round_to(v, dtype))))


def _main(argv: list[str]) -> int:
    import argparse
    import glob
    import os

    ap = argparse.ArgumentParser(description="predicted storage floor of a logit file")
    ap.add_argument("path")
    ap.add_argument("--as", dest="as_dtype", choices=sorted(MANTISSA_BITS))
    args = ap.parse_args(argv)
    try:
        import torch
        from safetensors import safe_open
    except ImportError as e:  # pragma: no cover
        print(f"floor_model.py: needs torch and safetensors ({e})", file=sys.stderr)
        return 2
    files = sorted(glob.glob(os.path.join(args.path, "*.safetensors"))) if os.path.isdir(args.path) else [args.path]
    if not files:
        print(f"floor_model.py: {args.path}: no .safetensors files", file=sys.stderr)
        return 2
    names = {torch.float32: "f32", torch.float16: "f16", torch.bfloat16: "bf16"}
    total, rows = 0.0, 0
    for f in files:
        if not os.path.isfile(f):
            print(f"floor_model.py: {f}: no such file", file=sys.stderr)
            return 2
        try:
            with safe_open(f, framework="pt") as h:
                t = h.get_tensor("logits")
        except Exception as e:
            print(f"floor_model.py: {f}: cannot read tensor 'logits': {e}", file=sys.stderr)
            return 2
        dt = args.as_dtype or names.get(t.dtype)
        if dt is None:
            print(f"floor_model.py: {f}: unsupported logits dtype {t.dtype}", file=sys.stderr)
            return 2
        z = t.reshape(-1, t.shape[-1]).double().numpy()
        # Stored values are taken as the true ones; the form does not matter
        # for the spacing since it is applied already.
        total += float(np.sum(predicted_floor_rows(z, dt, "raw", exact_is_free=False)))
        rows += z.shape[0]
    print(f"{rows} rows, predicted storage floor {total / max(rows, 1):.3e} nats per position")
    return 0


if __name__ == "__main__":
    sys.exit(_main(sys.argv[1:]))
