#!/usr/bin/env python3
"""The short script a user would otherwise write: stream the reference and
the candidate logit files block by block, torch.log_softmax in float32,
F.kl_div, sum. Used by run.py as the baseline klgauge is measured against.

    torch_reference.py REF CAND [CAND ...] [--block 64]

Prints one JSON line: rows, seconds of the streaming loop (imports and file
opening excluded, which favours this script), the summed KL per candidate.
"""
import argparse
import json
import struct
import sys
import time

import numpy as np
import torch
import torch.nn.functional as F

NP = {"F32": np.float32, "F16": np.float16, "BF16": np.int16}


def open_logits(path):
    with open(path, "rb") as f:
        n = struct.unpack("<Q", f.read(8))[0]
        h = json.loads(f.read(n))
    t = h["logits"]
    rows = int(np.prod(t["shape"][:-1]))
    vocab = t["shape"][-1]
    mm = np.memmap(path, dtype=NP[t["dtype"]], mode="r", offset=8 + n + t["data_offsets"][0], shape=(rows, vocab))
    return mm, t["dtype"]


def to_float(block, dtype):
    a = torch.from_numpy(np.array(block))
    if dtype == "BF16":
        a = a.view(torch.bfloat16)
    return a.float()


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("ref")
    ap.add_argument("cands", nargs="+")
    ap.add_argument("--block", type=int, default=64)
    a = ap.parse_args()
    ref, rd = open_logits(a.ref)
    cands = [open_logits(c) for c in a.cands]
    rows = ref.shape[0]
    sums = [0.0] * len(cands)
    t0 = time.perf_counter()
    with torch.no_grad():
        for r0 in range(0, rows, a.block):
            r1 = min(rows, r0 + a.block)
            lp = torch.log_softmax(to_float(ref[r0:r1], rd), dim=-1)
            for k, (c, cd) in enumerate(cands):
                lq = torch.log_softmax(to_float(c[r0:r1], cd), dim=-1)
                # KL(p || q): kl_div takes the input as log q and the target as log p.
                sums[k] += F.kl_div(lq, lp, log_target=True, reduction="sum").item()
    dt = time.perf_counter() - t0
    print(json.dumps({"rows": rows, "seconds": dt, "kl_sum": sums, "threads": torch.get_num_threads()}))


if __name__ == "__main__":
    sys.exit(main())
