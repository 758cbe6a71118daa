#!/usr/bin/env python3
"""Make a corpus of broken logit inputs for klgauge, one case per directory.

    python scripts/make_broken_corpus.py OUTDIR

Writes OUTDIR/<case>/ref... and OUTDIR/<case>/cand... (a file or a shard
directory, or a path that deliberately does not exist) and OUTDIR/manifest.json,
a list of objects:

    name     case name
    ref      reference path, relative to OUTDIR
    cand     candidate path, relative to OUTDIR
    culprit  which of "ref"/"cand" the error message must name (any one of the list)
    single   true when the culprit is bad on its own, so `inspect` must refuse it too
    what     the fault in words
    basis    "spec" when SPEC.md says it is an input error, "reading" when it is
             our reading of the contract
    level    "container" when the safetensors format itself is broken (the
             `safetensors` package refuses the culprit too), "content" when the
             file is valid safetensors but not a valid logit file or pair

Everything is generated from a fixed seed; nothing is edited by hand. Every
case must make `klgauge compare REF CAND` exit with code 2 and a short message.
"""

from __future__ import annotations

import json
import os
import shutil
import struct
import sys

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import st_write  # noqa: E402

ROWS, VOCAB = 6, 16
CONTAINER = {
    "truncated_data", "truncated_header", "empty_file", "shorter_than_prefix",
    "header_len_beyond_file", "header_len_huge", "header_not_json", "header_not_object",
    "header_not_utf8", "offsets_overlap", "offsets_beyond_file", "offsets_reversed",
    "shape_disagrees_with_bytes", "unknown_dtype", "random_bytes", "random_after_small_prefix",
}


def logits(rng, rows=ROWS, vocab=VOCAB):
    return rng.normal(size=(rows, vocab)).astype(np.float32) * 2


def good_tensors(rng, rows=ROWS, vocab=VOCAB, targets=True):
    t = {"logits": ("F32", logits(rng, rows, vocab))}
    if targets:
        t["targets"] = ("I64", np.arange(rows) % vocab)
    return t


def good_bytes(rng, **kw):
    return st_write.build(good_tensors(rng, **kw), metadata={"model": "Wren-7"})


def split(raw: bytes):
    (n,) = struct.unpack("<Q", raw[:8])
    return n, json.loads(raw[8 : 8 + n]), raw[8 + n :]


def main(out: str) -> None:
    rng = np.random.default_rng(20240601)
    if os.path.exists(out):
        shutil.rmtree(out)
    os.makedirs(out)
    cases = []

    def case(name, what, culprit, single, basis="spec"):
        d = os.path.join(out, name)
        os.makedirs(d)
        level = "container" if name in CONTAINER else "content"
        entry = {"name": name, "what": what, "culprit": culprit, "single": single, "basis": basis,
                 "level": level,
                 "ref": f"{name}/ref.safetensors", "cand": f"{name}/cand.safetensors"}
        cases.append(entry)
        return d, entry

    def put(path, data: bytes):
        with open(path, "wb") as f:
            f.write(data)

    def pair_with_bad(name, what, bad: bytes, side="cand", single=True, basis="spec"):
        d, e = case(name, what, [side], single, basis)
        good = good_bytes(rng)
        put(os.path.join(d, "ref.safetensors"), bad if side == "ref" else good)
        put(os.path.join(d, "cand.safetensors"), bad if side == "cand" else good)
        return d, e

    def header_case(name, what, header: dict, data: bytes, side="cand", basis="spec"):
        h = st_write.header_bytes(header)
        pair_with_bad(name, what, struct.pack("<Q", len(h)) + h + data, side, basis=basis)

    g = good_bytes(rng)
    n, hdr, buf = split(g)

    # ---- the container itself
    pair_with_bad("truncated_data", "file cut inside the tensor data", g[: len(g) - 37])
    pair_with_bad("truncated_header", "file cut inside the JSON header", g[: 8 + n // 2], side="ref")
    pair_with_bad("empty_file", "zero bytes", b"")
    pair_with_bad("shorter_than_prefix", "5 bytes, less than the 8-byte length prefix", g[:5])
    pair_with_bad("header_len_beyond_file", "length prefix larger than the file",
                  struct.pack("<Q", len(g) + 100) + g[8:])
    pair_with_bad("header_len_huge", "length prefix 2^62", struct.pack("<Q", 2**62) + g[8:], side="ref")
    junk = b"this is not a JSON header, just words.."
    pair_with_bad("header_not_json", "header bytes are not JSON", struct.pack("<Q", len(junk)) + junk + buf)
    arr = b"[1, 2, 3]       "
    pair_with_bad("header_not_object", "header is a JSON array", struct.pack("<Q", len(arr)) + arr + buf)
    bad_utf8 = b'{"\xff\xfe": 1}   '
    pair_with_bad("header_not_utf8", "header is not UTF-8", struct.pack("<Q", len(bad_utf8)) + bad_utf8 + buf)

    lg = logits(rng)
    lb = lg.tobytes()
    tb = np.arange(ROWS, dtype="<i8").tobytes()
    header_case("offsets_overlap", "targets data overlaps the logits data",
                {"logits": {"dtype": "F32", "shape": [ROWS, VOCAB], "data_offsets": [0, len(lb)]},
                 "targets": {"dtype": "I64", "shape": [ROWS], "data_offsets": [len(lb) - 16, len(lb) - 16 + len(tb)]}},
                lb + tb)
    header_case("offsets_beyond_file", "logits data_offsets end past the end of the file",
                {"logits": {"dtype": "F32", "shape": [ROWS, VOCAB], "data_offsets": [0, len(lb)]}},
                lb[: len(lb) - 64])
    header_case("offsets_reversed", "data_offsets end before they begin",
                {"logits": {"dtype": "F32", "shape": [ROWS, VOCAB], "data_offsets": [len(lb), 0]}}, lb)
    header_case("shape_disagrees_with_bytes", "shape [6,16] but the offsets span 6*15 floats",
                {"logits": {"dtype": "F32", "shape": [ROWS, VOCAB], "data_offsets": [0, ROWS * (VOCAB - 1) * 4]}},
                lb[: ROWS * (VOCAB - 1) * 4])
    header_case("unknown_dtype", "logits dtype F99",
                {"logits": {"dtype": "F99", "shape": [ROWS, VOCAB], "data_offsets": [0, len(lb)]}}, lb)

    # ---- the logits tensor
    def tensors_case(name, what, tensors, side="cand", single=True, basis="spec"):
        pair_with_bad(name, what, st_write.build(tensors, {"model": "Wren-7"}), side, single, basis)

    tensors_case("no_logits_tensor", "only a tensor named 'scores'", {"scores": ("F32", lg)})
    tensors_case("integer_logits", "logits stored as I32", {"logits": ("I32", (lg * 10).astype(np.int32))})
    tensors_case("logits_rank1", "logits of shape [16]", {"logits": ("F32", lg[0])})
    tensors_case("logits_rank4", "logits of shape [2,3,1,16]", {"logits": ("F32", lg.reshape(2, 3, 1, VOCAB))})

    d, e = case("zero_rows", "logits of shape [0,16] in both files", ["ref", "cand"], True)
    for s in ("ref", "cand"):
        st_write.write(os.path.join(d, f"{s}.safetensors"), {"logits": ("F32", np.zeros((0, VOCAB)))})
    d, e = case("zero_vocab", "logits of shape [6,0] in both files", ["ref", "cand"], True)
    for s in ("ref", "cand"):
        st_write.write(os.path.join(d, f"{s}.safetensors"), {"logits": ("F32", np.zeros((ROWS, 0)))})

    # ---- the pair
    d, e = case("vocab_mismatch", "reference vocabulary 16, candidate 17", ["cand"], False)
    st_write.write(os.path.join(d, "ref.safetensors"), good_tensors(rng))
    st_write.write(os.path.join(d, "cand.safetensors"), good_tensors(rng, vocab=VOCAB + 1))
    d, e = case("row_mismatch", "reference 6 rows, candidate 7", ["cand"], False)
    st_write.write(os.path.join(d, "ref.safetensors"), good_tensors(rng))
    st_write.write(os.path.join(d, "cand.safetensors"), good_tensors(rng, rows=ROWS + 1))
    d, e = case("targets_differ", "the two files carry different target tokens", ["cand"], False)
    st_write.write(os.path.join(d, "ref.safetensors"), good_tensors(rng))
    t = good_tensors(rng)
    t["targets"] = ("I64", (np.arange(ROWS) + 1) % VOCAB)
    st_write.write(os.path.join(d, "cand.safetensors"), t)

    # ---- side tensors
    tensors_case("targets_wrong_shape", "targets of shape [5] for 6 rows",
                 {"logits": ("F32", lg), "targets": ("I64", np.arange(ROWS - 1))})
    tensors_case("targets_float", "targets stored as F32",
                 {"logits": ("F32", lg), "targets": ("F32", np.arange(ROWS))})
    d, e = case("targets_out_of_range", "a target id equal to the vocabulary size, in both files",
                ["ref", "cand"], True, basis="reading")
    for s in ("ref", "cand"):
        st_write.write(os.path.join(d, f"{s}.safetensors"),
                       {"logits": ("F32", logits(rng)), "targets": ("I64", np.array([0, 1, VOCAB, 3, 4, 5]))})
    tensors_case("offsets_not_monotone", "prompt_offsets [0,4,2,6]",
                 {"logits": ("F32", lg), "prompt_offsets": ("I64", np.array([0, 4, 2, 6]))})
    tensors_case("offsets_not_ending_at_rows", "prompt_offsets [0,2,5] for 6 rows",
                 {"logits": ("F32", lg), "prompt_offsets": ("I64", np.array([0, 2, 5]))})
    tensors_case("offsets_not_starting_at_zero", "prompt_offsets [1,3,6]",
                 {"logits": ("F32", lg), "prompt_offsets": ("I64", np.array([1, 3, 6]))})
    tensors_case("offsets_with_3d_logits", "prompt_offsets beside a 3-D logits tensor",
                 {"logits": ("F32", lg.reshape(2, 3, VOCAB)), "prompt_offsets": ("I64", np.array([0, 3, 6]))})
    tensors_case("mask_wrong_shape", "mask of shape [7] for 6 rows",
                 {"logits": ("F32", lg), "mask": ("U8", np.ones(ROWS + 1))})
    tensors_case("mask_float", "mask stored as F32",
                 {"logits": ("F32", lg), "mask": ("F32", np.ones(ROWS))})

    # ---- directories
    def dir_case(name, what, fill, side="cand"):
        d, e = case(name, what, [side], True)
        other = "ref" if side == "cand" else "cand"
        st_write.write(os.path.join(d, f"{other}.safetensors"), good_tensors(rng, targets=False))
        sd = os.path.join(d, side)
        os.makedirs(sd)
        fill(sd)
        e[side] = f"{name}/{side}"

    dir_case("dir_empty", "an empty directory", lambda sd: None)
    dir_case("dir_no_shard", "a directory holding only a text file",
             lambda sd: open(os.path.join(sd, "notes.txt"), "w").write("Wren-7 dump notes\n"), side="ref")

    def two_vocabs(sd):
        st_write.write(os.path.join(sd, "a.safetensors"), good_tensors(rng, rows=3, targets=False))
        st_write.write(os.path.join(sd, "b.safetensors"), good_tensors(rng, rows=3, vocab=VOCAB + 2, targets=False))

    dir_case("dir_shard_other_vocab", "second shard has vocabulary 18, first 16", two_vocabs)

    def bad_shard(sd):
        st_write.write(os.path.join(sd, "a.safetensors"), good_tensors(rng, rows=3, targets=False))
        put(os.path.join(sd, "b.safetensors"), good_bytes(rng, rows=3, targets=False)[:40])

    dir_case("dir_truncated_shard", "second shard is cut inside its header", bad_shard)

    # ---- paths and noise
    d, e = case("missing_path", "the candidate path does not exist", ["cand"], True)
    st_write.write(os.path.join(d, "ref.safetensors"), good_tensors(rng))
    e["cand"] = "missing_path/does-not-exist.safetensors"
    pair_with_bad("random_bytes", "4 KiB of random bytes", rng.bytes(4096))
    pair_with_bad("random_after_small_prefix", "length prefix 64 then random bytes",
                  struct.pack("<Q", 64) + rng.bytes(1024))

    with open(os.path.join(out, "manifest.json"), "w") as f:
        json.dump(cases, f, indent=1)
    print(f"{len(cases)} cases in {out}")


if __name__ == "__main__":
    if len(sys.argv) != 2:
        print("usage: make_broken_corpus.py OUTDIR", file=sys.stderr)
        sys.exit(2)
    main(sys.argv[1])
