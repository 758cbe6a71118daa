#!/usr/bin/env python3
"""Writes the seed corpus for the fuzz targets (standard library only).

Seeds are small valid logit files of every layout the reader accepts, plus
a few classic breakages, so the fuzzer starts from inputs that reach deep
into the validation instead of dying at the header-length check.

Usage: make_seeds.py OUT_DIR   (writes OUT_DIR/read_file, OUT_DIR/compare_pair)
"""
import json
import math
import os
import random
import struct
import sys


def pack(dtype, values):
    if dtype == "F32":
        return struct.pack("<%df" % len(values), *values)
    if dtype == "F16":
        return struct.pack("<%de" % len(values), *values)
    if dtype == "BF16":
        # bfloat16 is the upper half of an IEEE float32 (truncation).
        return b"".join(struct.pack("<f", v)[2:] for v in values)
    if dtype == "I64":
        return struct.pack("<%dq" % len(values), *values)
    if dtype == "I32":
        return struct.pack("<%di" % len(values), *values)
    if dtype in ("U8", "BOOL"):
        return bytes(values)
    raise ValueError(dtype)


def safetensors(tensors, metadata=None):
    """tensors: list of (name, dtype, shape, values) -> file bytes."""
    header, data = {}, b""
    if metadata:
        header["__metadata__"] = metadata
    for name, dtype, shape, values in tensors:
        b = pack(dtype, values)
        header[name] = {"dtype": dtype, "shape": shape, "data_offsets": [len(data), len(data) + len(b)]}
        data += b
    h = json.dumps(header, separators=(",", ":")).encode()
    return struct.pack("<Q", len(h)) + h + data


def main():
    out = sys.argv[1]
    rng = random.Random(7)
    rd, pd = os.path.join(out, "read_file"), os.path.join(out, "compare_pair")
    os.makedirs(rd, exist_ok=True)
    os.makedirs(pd, exist_ok=True)

    def logits(n):
        return [rng.gauss(0.0, 2.0) for _ in range(n)]

    files = {}
    files["2d-f32-targets-offsets"] = safetensors(
        [("logits", "F32", [6, 5], logits(30)), ("targets", "I64", [6], [0, 1, 2, 3, 4, -1]),
         ("prompt_offsets", "I64", [3], [0, 2, 6])],
        {"model": "Wren-7", "logits_form": "raw"})
    files["2d-f32-plain"] = safetensors([("logits", "F32", [4, 3], logits(12))])
    files["3d-bf16-mask"] = safetensors(
        [("logits", "BF16", [2, 3, 4], logits(24)), ("mask", "U8", [2, 3], [1, 1, 0, 1, 0, 1])])
    files["3d-f16-bool-i32"] = safetensors(
        [("logits", "F16", [2, 2, 3], logits(12)), ("mask", "BOOL", [2, 2], [1, 0, 1, 1]),
         ("targets", "I32", [2, 2], [2, 1, 0, -5])])
    files["vocab-1"] = safetensors([("logits", "F32", [3, 1], [0.0, 1.0, -2.0])])
    specials = [float("nan"), float("inf"), float("-inf"), 3.0e38, -3.0e38, 1e-40, 0.0, -0.0]
    files["special-values"] = safetensors([("logits", "F32", [4, 4], specials + logits(8))])
    files["all-neg-inf-row"] = safetensors([("logits", "F32", [2, 3], [float("-inf")] * 3 + [0.0, 1.0, 2.0])])
    files["centered"] = safetensors([("logits", "F16", [3, 4], [0.0, -1.0, -2.5, -0.5] * 3)],
                                    {"logits_form": "centered"})
    # Breakages.
    good = files["2d-f32-targets-offsets"]
    files["truncated"] = good[:-7]
    files["header-only"] = good[: 8 + struct.unpack("<Q", good[:8])[0]]
    files["empty-header"] = struct.pack("<Q", 2) + b"{}"
    files["random"] = bytes(rng.randrange(256) for _ in range(200))

    for name, b in files.items():
        with open(os.path.join(rd, name), "wb") as f:
            f.write(b)

    # Pairs: [split u16][options u8][reference][candidate].
    def pair(name, a, b, opts):
        with open(os.path.join(pd, name), "wb") as f:
            f.write(struct.pack("<HB", len(a), opts) + a + b)

    a = files["2d-f32-targets-offsets"]
    b = safetensors(
        [("logits", "F32", [6, 5], logits(30)), ("targets", "I64", [6], [0, 1, 2, 3, 4, -1]),
         ("prompt_offsets", "I64", [3], [0, 2, 6])])
    pair("2d-pair", a, b, 0b0110)
    pair("2d-pair-vocab", a, b, 0b0010_1011)
    pair("3d-pair", files["3d-bf16-mask"], safetensors([("logits", "BF16", [2, 3, 4], logits(24))]), 0b0110)
    pair("3d-f16-pair", files["3d-f16-bool-i32"], safetensors([("logits", "F16", [2, 2, 3], logits(12))]), 0b1110)
    pair("special-pair", files["special-values"], safetensors([("logits", "F32", [4, 4], logits(16))]), 0b0110)
    pair("special-both", files["special-values"], files["special-values"], 0b0110)
    pair("neg-inf-pair", files["all-neg-inf-row"], safetensors([("logits", "F32", [2, 3], [0.0, float("-inf"), 1.0, 0.0, 0.0, 0.0])]), 2)
    pair("self", a, a, 0)


if __name__ == "__main__":
    main()
