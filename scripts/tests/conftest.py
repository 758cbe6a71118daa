"""Shared fixtures: a tiny model built offline and its logit dumps."""
from __future__ import annotations

import json
import os
import sys

import pytest

SCRIPTS = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
REPO = os.path.dirname(SCRIPTS)
if SCRIPTS not in sys.path:
    sys.path.insert(0, SCRIPTS)

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
os.environ.setdefault("TRANSFORMERS_VERBOSITY", "error")
os.environ.setdefault("HF_HUB_DISABLE_PROGRESS_BARS", "1")
# One thread: the models are tiny, and on a shared two-core machine several
# OpenMP threads spinning against other jobs make a forward pass 100x slower.
os.environ.setdefault("OMP_NUM_THREADS", "1")

import torch  # noqa: E402

torch.set_num_threads(1)

import dump_logits  # noqa: E402

SHARD_ROWS = 40


def klgauge_path() -> str:
    return os.environ.get("KLGAUGE_BIN", os.path.join(REPO, "target", "release", "klgauge"))


@pytest.fixture(scope="module")
def klgauge_bin() -> str:
    path = klgauge_path()
    if not (os.path.isfile(path) and os.access(path, os.X_OK)):
        pytest.skip(f"klgauge binary not found at {path} (build it with `cargo build --release` "
                    f"or point KLGAUGE_BIN at it)")
    return path


@pytest.fixture(scope="module")
def tiny_model(tmp_path_factory) -> str:
    import make_tiny_model

    out = tmp_path_factory.mktemp("tiny") / "wren7-tiny"
    assert make_tiny_model.main([str(out)]) == 0
    return str(out)


@pytest.fixture(scope="module")
def prompts_file(tiny_model, tmp_path_factory) -> str:
    """The tiny model's invented prompts plus one pre-tokenised record and one
    with a not-counted preamble."""
    path = tmp_path_factory.mktemp("prompts") / "prompts.jsonl"
    with open(os.path.join(tiny_model, "prompts.jsonl"), encoding="utf-8") as f:
        lines = [json.loads(l) for l in f if l.strip()]
    lines.insert(3, {"ids": [0, 42, 269, 369, 374, 15, 25, 9, 17, 30]})
    lines.append({"text": "Wren-7 here. Your parcel is at the Corrin Street locker.", "count_from": 5})
    with open(path, "w", encoding="utf-8") as f:
        for rec in lines:
            f.write(json.dumps(rec) + "\n")
    return str(path)


def run_dump(*argv) -> None:
    code = dump_logits.main([str(a) for a in argv])
    assert code == 0, f"dump_logits.py {' '.join(map(str, argv))} exited {code}"


@pytest.fixture(scope="module")
def ref_dump(tiny_model, prompts_file, tmp_path_factory) -> str:
    out = tmp_path_factory.mktemp("dumps") / "ref"
    run_dump(tiny_model, prompts_file, out, "--dtype", "f32", "--shard-rows", SHARD_ROWS)
    return str(out)


@pytest.fixture(scope="module")
def cand_dump(tiny_model, prompts_file, tmp_path_factory) -> str:
    out = tmp_path_factory.mktemp("dumps") / "int4"
    run_dump(tiny_model, prompts_file, out, "--dtype", "bf16", "--fake-quant", "int4",
             "--group-size", 64, "--shard-rows", SHARD_ROWS)
    return str(out)
