#!/usr/bin/env python3
"""Writes an invented reference/candidate pair of logit files for benchmarks.

    make_logits.py OUT_DIR --rows 2048 --vocab 128256 --dtype bf16 --candidates 3

The reference rows are Gaussian scores (sd 2.5) with a handful of boosted
columns, roughly the shape of a language model's next-token scores; candidate
k adds independent Gaussian noise (sd 0.03, 0.1, 0.3, ...) as a stand-in for
weight compression. Files are written in blocks of rows, so memory stays small
whatever the size. Layout follows the klgauge input contract: `logits`
[rows, vocab] plus I64 `targets`.
"""
import argparse
import json
import os
import struct
import sys

import numpy as np

DTYPES = {"f32": ("F32", 4), "f16": ("F16", 2), "bf16": ("BF16", 2)}
NOISE = [0.1, 0.03, 0.3, 0.05, 0.2]


def encode(block, dtype):
    """float32 block -> little-endian bytes of the stored dtype."""
    if dtype == "f32":
        return block.astype("<f4").tobytes()
    if dtype == "f16":
        return block.astype("<f2").tobytes()
    # bf16: round to nearest even on the float32 bits (common practice).
    u = block.astype("<f4").view("<u4").astype(np.uint64)
    u = (u + 0x7FFF + ((u >> 16) & 1)) >> 16
    return u.astype("<u2").tobytes()


def header(rows, vocab, dtype, model):
    name, size = DTYPES[dtype]
    nbytes = rows * vocab * size
    h = {
        "__metadata__": {"model": model, "logits_form": "raw"},
        "logits": {"dtype": name, "shape": [rows, vocab], "data_offsets": [0, nbytes]},
        "targets": {"dtype": "I64", "shape": [rows], "data_offsets": [nbytes, nbytes + 8 * rows]},
    }
    raw = json.dumps(h, separators=(",", ":")).encode()
    raw += b" " * (-len(raw) % 8)
    return struct.pack("<Q", len(raw)) + raw


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out")
    ap.add_argument("--rows", type=int, default=2048)
    ap.add_argument("--vocab", type=int, default=128256)
    ap.add_argument("--dtype", choices=sorted(DTYPES), default="bf16")
    ap.add_argument("--candidates", type=int, default=1)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--block", type=int, default=64)
    a = ap.parse_args()
    os.makedirs(a.out, exist_ok=True)
    rng = np.random.default_rng(a.seed)
    targets = np.zeros(a.rows, dtype=np.int64)
    names = ["ref"] + [f"cand{k}" for k in range(1, a.candidates + 1)]
    files = [open(os.path.join(a.out, f"{n}.safetensors"), "wb") for n in names]
    for k, f in enumerate(files):
        f.write(header(a.rows, a.vocab, a.dtype, "Wren-7" if k == 0 else f"Wren-7 compressed variant {k}"))
    for r0 in range(0, a.rows, a.block):
        n = min(a.block, a.rows - r0)
        x = rng.standard_normal((n, a.vocab), dtype=np.float32) * 2.5
        hot = rng.integers(0, a.vocab, size=(n, 8))
        x[np.arange(n)[:, None], hot] += rng.uniform(6, 14, size=(n, 8)).astype(np.float32)
        # The token that follows: one of the boosted columns, as in a model that predicts well.
        targets[r0:r0 + n] = hot[np.arange(n), rng.integers(0, 8, size=n)]
        files[0].write(encode(x, a.dtype))
        for k, f in enumerate(files[1:]):
            noise = NOISE[k % len(NOISE)]
            y = x + rng.standard_normal((n, a.vocab), dtype=np.float32) * noise
            f.write(encode(y, a.dtype))
    for f in files:
        f.write(targets.astype("<i8").tobytes())
        f.close()
    print(" ".join(os.path.join(a.out, f"{n}.safetensors") for n in names))


if __name__ == "__main__":
    sys.exit(main())
