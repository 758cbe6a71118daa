#!/usr/bin/env python3
"""Instructions executed per row by klgauge's kernel functions, counted by
valgrind's callgrind: the same count on every run of the same binary and
input, whatever else the machine is doing.

    python scripts/bench/instructions.py [BINARY ...] [--rows 512] [--vocab 128256]
        [--dtype bf16] [--candidates 1] [--data DIR]

With two or more binaries (say, builds of two commits) it prints them side
by side with the ratio to the first. Wall-clock benchmarks on a shared
virtual machine move by up to 1.5x within an hour (see DEVELOPERS.md,
Performance); instruction counts do not, so they are the steadier measure
of a kernel change, though not of its speed: two loops with the same count
can differ in time (cache misses, dependency chains, which execution ports
they need). Needs valgrind (Debian package `valgrind`). A measuring tool,
not a test: it asserts nothing.
"""
import argparse
import os
import re
import shutil
import subprocess
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(os.path.dirname(HERE))
# What the table shows: the per-row kernel entry points (each includes what
# it inlines), then the whole process.
FUNCTIONS = [
    ("normalise_row_at", "reference normalising pass"),
    ("compare_fused_at", "fused pair pass (per candidate)"),
    ("storage_floor_stored_at", "storage floor (64 sampled rows)"),
]


def count(binary, files, out_dir, tag):
    """Runs one compare under callgrind; returns {function: instructions} and the total."""
    out = os.path.join(out_dir, f"callgrind.{tag}.out")
    subprocess.run(["valgrind", "--tool=callgrind", f"--callgrind-out-file={out}", binary, "compare",
                    "--threads", "1", "--samples", "1,4,16", *files],
                   check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    text = subprocess.run(["callgrind_annotate", "--inclusive=yes", out], check=True,
                          capture_output=True, text=True).stdout
    got = {}
    total = None
    for line in text.splitlines():
        m = re.match(r"\s*([\d,]+)\s+\(.*?\)\s+(.*)", line)
        if not m:
            continue
        n = int(m.group(1).replace(",", ""))
        what = m.group(2)
        if "PROGRAM TOTALS" in what:
            total = n
        for f, _ in FUNCTIONS:
            # The dispatching wrapper, not its per-level body: it includes them.
            if re.search(rf"kernel::{f} \[", what) and f not in got:
                got[f] = n
    return got, total


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("binaries", nargs="*", default=[os.path.join(REPO, "target", "release", "klgauge")])
    ap.add_argument("--rows", type=int, default=512)
    ap.add_argument("--vocab", type=int, default=128256)
    ap.add_argument("--dtype", default="bf16", choices=["bf16", "f16", "f32"])
    ap.add_argument("--candidates", type=int, default=1)
    ap.add_argument("--data", help="where to write the files (default: a temporary directory, removed after)")
    a = ap.parse_args()
    if not shutil.which("valgrind"):
        sys.exit("instructions.py: needs valgrind (apt-get install valgrind)")
    for b in a.binaries:
        if not os.path.exists(b):
            sys.exit(f"instructions.py: no binary at {b}")
    base = a.data or tempfile.mkdtemp(prefix="klgauge-instr-")
    try:
        files = subprocess.run([sys.executable, os.path.join(HERE, "make_logits.py"), base, "--rows", str(a.rows),
                                "--vocab", str(a.vocab), "--dtype", a.dtype, "--candidates", str(a.candidates)],
                               check=True, capture_output=True, text=True).stdout.split()
        results = [count(b, files, base, i) for i, b in enumerate(a.binaries)]
    finally:
        if a.data is None:
            shutil.rmtree(base, ignore_errors=True)
    print(f"instructions per row ({a.rows} rows x {a.vocab} {a.dtype}, {a.candidates} candidate(s), one thread; "
          f"per column in brackets)")
    print(f"{'':<36}" + "".join(f"{f'binary {i + 1}':>30}" for i in range(len(a.binaries))))
    rows = [(label, f) for f, label in FUNCTIONS] + [("whole process", None)]
    for label, f in rows:
        line = f"{label:<36}"
        first = None
        for got, total in results:
            n = total if f is None else got.get(f)
            if n is None:
                line += f"{'-':>30}"
                continue
            per_row = n / (a.rows if f != "storage_floor_stored_at" else min(64, a.rows))
            if f == "compare_fused_at":
                per_row /= a.candidates
            cell = f"{per_row:,.0f} ({per_row / a.vocab:.2f})"
            if first is None:
                first = per_row
            elif first:
                cell += f" x{per_row / first:.3f}"
            line += f"{cell:>30}"
        print(line)
    for i, b in enumerate(a.binaries):
        print(f"binary {i + 1}: {b}")


if __name__ == "__main__":
    sys.exit(main())
