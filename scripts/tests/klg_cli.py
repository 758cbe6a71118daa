"""Shared bits of the CLI checks: where the klgauge binary is, how to run it,
how to read its CSV and JSON reports. Tests skip cleanly without a binary."""

from __future__ import annotations

import csv
import json
import math
import os
import subprocess
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
BIN = Path(os.environ.get("KLGAUGE_BIN", REPO / "target" / "release" / "klgauge"))

needs_binary = pytest.mark.skipif(
    not (BIN.is_file() and os.access(BIN, os.X_OK)),
    reason=f"klgauge binary not found at {BIN} (build it or set KLGAUGE_BIN)",
)

CSV_COLUMNS = [
    "row", "prompt", "position", "target", "kl", "kl_reverse", "tv", "top1_agree",
    "entropy_ref", "entropy_cand", "nll_ref", "nll_cand",
]


def run(*args, timeout=60, check_rc=None):
    """Run the binary with string arguments; return CompletedProcess."""
    p = subprocess.run(
        [str(BIN), *map(str, args)], capture_output=True, text=True, timeout=timeout
    )
    if check_rc is not None and p.returncode != check_rc:
        raise AssertionError(
            f"klgauge {' '.join(map(str, args))}: exit {p.returncode}, want {check_rc}\n"
            f"stderr: {p.stderr[-3000:]}"
        )
    return p


def num(field: str):
    """A CSV numeric field: '' -> None, otherwise float (accepts inf/nan)."""
    field = field.strip()
    if field == "":
        return None
    return float(field)


def read_csv(path):
    with open(path, newline="") as f:
        rd = csv.reader(f)
        header = next(rd)
        rows = [dict(zip(header, r)) for r in rd if r]
    return header, rows


def read_json(path):
    # Python's json accepts the non-standard Infinity/NaN tokens; record
    # whether the file is strict JSON separately where that matters.
    with open(path) as f:
        return json.load(f)


def is_strict_json(path) -> bool:
    def bad(tok):
        raise ValueError(tok)

    with open(path) as f:
        try:
            json.load(f, parse_constant=bad)
            return True
        except ValueError:
            return False


def close(got, want, rel=1e-4, abs_=1e-7) -> bool:
    """The tolerance of the core's contract: within max(rel*|want|, abs)."""
    if got is None or want is None:
        return got is None and want is None
    if math.isinf(want) or math.isinf(got):
        return got == want
    return abs(got - want) <= max(rel * abs(want), abs_)
