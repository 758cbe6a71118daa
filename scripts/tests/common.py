"""Readers and reference implementations used by the tests; independent of the dumper's own code."""
from __future__ import annotations

import glob
import json
import os

import numpy as np


def shard_paths(directory: str) -> list[str]:
    return sorted(glob.glob(os.path.join(directory, "*.safetensors")))


def load_shards(directory: str) -> list[dict]:
    """Every shard as a dict of torch tensors plus its '__metadata__'."""
    from safetensors import safe_open

    shards = []
    for path in shard_paths(directory):
        with safe_open(path, framework="pt") as h:
            d = {k: h.get_tensor(k) for k in h.keys()}
            d["__metadata__"] = h.metadata()
            d["__path__"] = path
        shards.append(d)
    return shards


def concat(directory: str):
    """(logits float64 numpy [rows, vocab], targets, mask, prompt lengths)."""
    import torch

    shards = load_shards(directory)
    logits = torch.cat([s["logits"] for s in shards]).double().numpy()
    targets = torch.cat([s["targets"] for s in shards]).numpy()
    mask = torch.cat([s["mask"] for s in shards]).numpy()
    lengths = []
    for s in shards:
        off = s["prompt_offsets"].numpy()
        lengths.extend(np.diff(off).tolist())
    return logits, targets, mask, lengths


def log_softmax64(z: np.ndarray) -> np.ndarray:
    z = np.asarray(z, dtype=np.float64)
    m = z.max(axis=-1, keepdims=True)
    return z - (m + np.log(np.exp(z - m).sum(axis=-1, keepdims=True)))


def read_jsonl(path: str) -> list[dict]:
    with open(path, encoding="utf-8") as f:
        return [json.loads(l) for l in f if l.strip()]


def np_fake_quant(w: np.ndarray, qmax: int, group_size: int) -> tuple[np.ndarray, np.ndarray]:
    """Direct numpy group-wise symmetric round-to-nearest along the input dim.

    Returns (dequantised weight, per-element scale) in float32. np.round rounds
    half to even, as torch.round does.
    """
    w = np.asarray(w, dtype=np.float32)
    out_f, in_f = w.shape
    g = in_f if group_size <= 0 else group_size
    deq = np.empty_like(w)
    scale_full = np.empty_like(w)
    for start in range(0, in_f, g):
        block = w[:, start:start + g]
        scale = (np.abs(block).max(axis=1, keepdims=True) / np.float32(qmax)).astype(np.float32)
        safe = np.where(scale > 0, scale, np.float32(1.0))
        q = np.clip(np.round(block / safe), -qmax, qmax)
        deq[:, start:start + g] = np.where(scale > 0, q * safe, 0.0)
        scale_full[:, start:start + g] = scale
    return deq, scale_full


def bf16_half_step(x: np.ndarray) -> np.ndarray:
    """Half the bf16 spacing at |x| (7 stored significand bits), for error bounds."""
    x = np.abs(np.asarray(x, dtype=np.float64))
    _, e = np.frexp(x)
    return np.ldexp(1.0, np.maximum(e - 1, -126) - 7) / 2.0
