"""A small, dependency-light safetensors writer and reader (numpy only).

Used by the cross-checks and the broken-input corpus of klgauge, and useful to
anyone who needs a logit file without torch.

The safetensors layout (as published with the format): 8 bytes little-endian
u64 N, then N bytes of a JSON object {name: {"dtype", "shape", "data_offsets":
[begin, end]}, "__metadata__": {str: str}}, then the byte buffer; offsets are
relative to the start of the buffer. The header is padded with spaces to a
multiple of 8 bytes, as the reference writer does.

Supported dtypes: F64, F32, F16, BF16, I64, I32, U8, BOOL.

    from st_write import write, read, stored_f64
    write("ref.safetensors", {"logits": ("BF16", x)}, metadata={"model": "Wren-7"})
    t = read("ref.safetensors")            # {name: Tensor(dtype, shape, values)}
    y = stored_f64(x, "BF16")              # the float64 values that BF16 storage keeps

Run as a script to write a small self-check file: python st_write.py OUT.safetensors
"""

from __future__ import annotations

import json
import struct
import sys
from dataclasses import dataclass

import numpy as np

# dtype name -> (numpy storage dtype, bytes per element)
_NP = {
    "F64": np.dtype("<f8"),
    "F32": np.dtype("<f4"),
    "F16": np.dtype("<f2"),
    "BF16": np.dtype("<u2"),  # stored as raw bf16 bits
    "I64": np.dtype("<i8"),
    "I32": np.dtype("<i4"),
    "U8": np.dtype("u1"),
    "BOOL": np.dtype("u1"),
}
FLOAT_DTYPES = ("F64", "F32", "F16", "BF16")


def f32_to_bf16_bits(a) -> np.ndarray:
    """Round float32 values to bfloat16 (round to nearest, ties to even) and
    return the 16-bit patterns. NaN stays NaN (quiet), infinities stay infinite.
    bfloat16 is the upper half of an IEEE binary32 (common practice)."""
    a = np.ascontiguousarray(np.asarray(a, dtype=np.float32))
    bits = a.view(np.uint32).astype(np.uint64)
    nan = np.isnan(a)
    rounded = (bits + 0x7FFF + ((bits >> 16) & 1)) >> 16
    out = rounded.astype(np.uint16)
    out[nan] = ((bits[nan] >> 16) | 0x40).astype(np.uint16)
    return out


def bf16_bits_to_f32(bits) -> np.ndarray:
    bits = np.asarray(bits, dtype=np.uint16)
    return (bits.astype(np.uint32) << 16).view(np.float32)


def stored_f64(x, dtype: str) -> np.ndarray:
    """The float64 values that storing x as `dtype` keeps (x is cast through
    float32 first for F16/BF16, as a model's f32 output would be)."""
    x = np.asarray(x)
    if dtype == "F64":
        return x.astype(np.float64)
    if dtype == "F32":
        return x.astype(np.float32).astype(np.float64)
    if dtype == "F16":
        return x.astype(np.float32).astype(np.float16).astype(np.float64)
    if dtype == "BF16":
        return bf16_bits_to_f32(f32_to_bf16_bits(x)).astype(np.float64)
    raise ValueError(f"not a float dtype: {dtype}")


def encode(x, dtype: str) -> bytes:
    """Little-endian bytes of array x stored as `dtype`."""
    x = np.asarray(x)
    if dtype == "BF16":
        return f32_to_bf16_bits(x).astype("<u2").tobytes()
    if dtype == "BOOL":
        return (np.asarray(x) != 0).astype(np.uint8).tobytes()
    if dtype in ("F16", "BF16"):
        x = x.astype(np.float32)
    return np.ascontiguousarray(x.astype(_NP[dtype])).tobytes()


def header_bytes(header: dict, pad: bool = True) -> bytes:
    h = json.dumps(header, separators=(",", ":")).encode()
    if pad:
        h += b" " * (-len(h) % 8)
    return h


def build(tensors: dict, metadata: dict | None = None) -> bytes:
    """Bytes of a safetensors file. `tensors` maps name -> (dtype, array)."""
    header = {}
    if metadata:
        header["__metadata__"] = {str(k): str(v) for k, v in metadata.items()}
    chunks, off = [], 0
    for name, (dtype, arr) in tensors.items():
        arr = np.asarray(arr)
        data = encode(arr, dtype)
        header[name] = {
            "dtype": dtype,
            "shape": list(arr.shape),
            "data_offsets": [off, off + len(data)],
        }
        chunks.append(data)
        off += len(data)
    h = header_bytes(header)
    return struct.pack("<Q", len(h)) + h + b"".join(chunks)


def write(path, tensors: dict, metadata: dict | None = None) -> None:
    with open(path, "wb") as f:
        f.write(build(tensors, metadata))


def write_raw(path, header: dict | bytes, data: bytes = b"", header_len: int | None = None) -> None:
    """Write a file with an arbitrary header (dict or raw bytes) and buffer.
    `header_len` overrides the length prefix (to make inconsistent files)."""
    h = header if isinstance(header, bytes) else header_bytes(header)
    n = len(h) if header_len is None else header_len
    with open(path, "wb") as f:
        f.write(struct.pack("<Q", n) + h + data)


@dataclass
class Tensor:
    dtype: str
    shape: tuple
    values: np.ndarray  # float64 for float dtypes, int64 for integer/bool


def read(path) -> dict:
    """Read a safetensors file into {name: Tensor}; `__metadata__` is returned
    under that key as a dict. Float values are decoded to float64."""
    with open(path, "rb") as f:
        raw = f.read()
    (n,) = struct.unpack("<Q", raw[:8])
    header = json.loads(raw[8 : 8 + n])
    buf = raw[8 + n :]
    out = {}
    for name, info in header.items():
        if name == "__metadata__":
            out[name] = dict(info)
            continue
        dt, shape = info["dtype"], tuple(info["shape"])
        b, e = info["data_offsets"]
        a = np.frombuffer(buf[b:e], dtype=_NP[dt])
        if dt == "BF16":
            a = bf16_bits_to_f32(a).astype(np.float64)
        elif dt in FLOAT_DTYPES:
            a = a.astype(np.float64)
        else:
            a = a.astype(np.int64)
        out[name] = Tensor(dt, shape, a.reshape(shape))
    return out


if __name__ == "__main__":
    if len(sys.argv) != 2:
        print("usage: python st_write.py OUT.safetensors", file=sys.stderr)
        sys.exit(2)
    rng = np.random.default_rng(0)
    write(
        sys.argv[1],
        {"logits": ("BF16", rng.normal(size=(4, 16))), "targets": ("I64", np.arange(4))},
        metadata={"model": "Wren-7 (self-check)", "logits_form": "raw"},
    )
    print(f"wrote {sys.argv[1]}")
