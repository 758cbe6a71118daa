#!/usr/bin/env python3
"""Two klgauge builds side by side on the same files: whole runs, alternating.

    python scripts/bench/builds_ab.py OLD_KLGAUGE NEW_KLGAUGE DIR [--rounds 10]
        [--as-read-from-disk]

DIR holds ref.safetensors and cand1..3.safetensors, as `run.py --data DIR`
leaves them (its bf16-128k group) or `make_logits.py DIR --candidates 3`
writes them. For each of three cases (one candidate on two threads, one
candidate on one thread, three candidates) it runs `klgauge compare` with
each build in turn, the order swapped every round, and prints the median
wall seconds of each build and the median of the per-round ratios
old / new (above 1: the new build is faster), then the speed-target
ratios of the new build.

Why whole runs side by side: absolute times on a shared virtual machine
drift by 10 to 30 percent within minutes; two builds measured within the
same seconds see the same drift (see DEVELOPERS.md, Performance). With
--as-read-from-disk the files are first dropped from the page cache and
read back, the state run.py measures (how the cache holds a file decides
how klgauge reads rows). A measuring tool, not a test: it asserts nothing.
"""
import argparse
import os
import statistics
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
from run import as_read_from_disk, warm  # noqa: E402


def wall(cmd):
    t0 = time.perf_counter()
    subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=True)
    return time.perf_counter() - t0


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("old")
    ap.add_argument("new")
    ap.add_argument("dir")
    ap.add_argument("--rounds", type=int, default=10)
    ap.add_argument("--as-read-from-disk", action="store_true")
    a = ap.parse_args()
    files = [os.path.join(a.dir, n) for n in
             ["ref.safetensors", "cand1.safetensors", "cand2.safetensors", "cand3.safetensors"]]
    missing = [f for f in files if not os.path.exists(f)]
    if missing:
        sys.exit(f"missing: {' '.join(missing)} (run.py --data DIR or make_logits.py DIR --candidates 3)")
    if a.as_read_from_disk:
        as_read_from_disk(files)
    else:
        warm(files)
    cases = [
        ("one candidate, two threads", files[:2], []),
        ("one candidate, one thread", files[:2], ["--threads", "1"]),
        ("three candidates", files, []),
    ]
    times = {(c, b): [] for c, _, _ in cases for b in ("old", "new")}
    builds = [("old", a.old), ("new", a.new)]
    for r in range(a.rounds):
        order = builds if r % 2 == 0 else builds[::-1]
        for c, used, extra in cases:
            for b, exe in order:
                times[(c, b)].append(wall([exe, "compare", *used, *extra]))
    print(f"{a.rounds} rounds, builds alternating; wall seconds, median")
    print(f"{'case':<28} {'old':>8} {'new':>8}  old/new (median of rounds)")
    med = {}
    for c, _, _ in cases:
        o, n = times[(c, "old")], times[(c, "new")]
        ratio = statistics.median(x / y for x, y in zip(o, n))
        med[c] = statistics.median(n)
        print(f"{c:<28} {statistics.median(o):8.4f} {med[c]:8.4f}  {ratio:.3f}")
    one, single, three = (med[c] for c, _, _ in cases)
    print(f"new build: two threads / one thread {single / one:.2f}x (speed); "
          f"three candidates / one {three / one:.2f}x (time)")


if __name__ == "__main__":
    main()
