#!/usr/bin/env python3
"""Two builds of the kernel benchmark (benches/kernel.rs) run at the same
time, one per core, and the ratio of their times per function.

    python scripts/bench/kernel_ab.py OLD_BENCH NEW_BENCH [--rounds 6]
        [--only normalise_store,compare_fused_bf16] [--args "128256 avx2"]

OLD_BENCH and NEW_BENCH are copies of the benchmark binary that
`cargo bench --bench kernel --no-run` prints (target/release/deps/kernel-*),
built at the two commits. Each round starts both at once, pinned to
different cores with `taskset`, and swaps the cores in the next round.

Why at the same time: on a shared virtual machine the speed of a loop
drifts by 10 to 30 percent from one minute to the next (see DEVELOPERS.md,
Performance), more than most kernel changes are worth. Two runs that share
the same minutes see the same drift, so the ratio within a round is steady
even when the times are not. The two runs do slow each other a little
(they share the last-level cache and memory), by the same amount.

It prints, per function, the median time of each build (microseconds, the
benchmark's own median per round) and the median of the per-round ratios
old / new: above 1 means the new build is faster. A measuring tool, not a
test: it asserts nothing.
"""
import argparse
import os
import statistics
import subprocess
import sys


def parse(out):
    """{function: median microseconds} from the benchmark's table."""
    got = {}
    for line in out.splitlines():
        p = line.split()
        # level, function, min us, median us, col/ns
        if len(p) == 5:
            try:
                got[p[1]] = float(p[3])
            except ValueError:
                pass
    return got


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("old")
    ap.add_argument("new")
    ap.add_argument("--rounds", type=int, default=6)
    ap.add_argument("--only", default="", help="comma-separated function names")
    ap.add_argument("--args", default="128256",
                    help="the benchmark's arguments, e.g. \"128256 avx2\" (vocabulary, level)")
    a = ap.parse_args()
    if len(os.sched_getaffinity(0)) < 2:
        sys.exit("kernel_ab.py needs two CPUs")
    cores = sorted(os.sched_getaffinity(0))[:2]
    only = [f for f in a.only.split(",") if f]
    times = {"old": {}, "new": {}}
    ratios = {}
    for r in range(a.rounds):
        ca, cb = (cores[0], cores[1]) if r % 2 == 0 else (cores[1], cores[0])
        procs = {
            k: subprocess.Popen(["taskset", "-c", str(c), b] + a.args.split(),
                                stdout=subprocess.PIPE, text=True)
            for k, b, c in (("old", a.old, ca), ("new", a.new, cb))
        }
        got = {k: parse(p.communicate()[0]) for k, p in procs.items()}
        for f in got["old"]:
            if f in got["new"] and (not only or f in only):
                for k in got:
                    times[k].setdefault(f, []).append(got[k][f])
                ratios.setdefault(f, []).append(got["old"][f] / got["new"][f])
    print(f"{a.rounds} rounds, both builds at once on cores {cores[0]} and {cores[1]} (swapped each round)")
    print(f"{'function':26s} {'old us':>9s} {'new us':>9s}  old/new per round            median")
    for f, rs in ratios.items():
        print(f"{f:26s} {statistics.median(times['old'][f]):9.1f} {statistics.median(times['new'][f]):9.1f}  "
              + " ".join(f"{x:.2f}" for x in rs).ljust(28) + f" {statistics.median(rs):.3f}")


if __name__ == "__main__":
    main()
