#!/usr/bin/env python3
"""Two builds of the kernel benchmark (benches/kernel.rs) run at the same
time, one per core, and the ratio of their times per function.

    python scripts/bench/kernel_ab.py OLD_BENCH NEW_BENCH [--rounds 6]
        [--only normalise_store,compare_fused_bf16] [--args "128256 avx2"]
        [--alternate]

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

With --alternate the builds run one after the other on the first core
instead, the order swapped each round, and it compares each build's
fastest time over all rounds (the benchmark's own minimum, the run least
disturbed by the machine): no shared cache or memory between the two, at
the price of their not sharing the same seconds. The "fastest of N
alternating runs" figures in DEVELOPERS.md come from this mode.
"""
import argparse
import os
import statistics
import subprocess
import sys


def parse(out, column=3):
    """{function: microseconds} from the benchmark's table: its median
    (column 3) or its minimum (column 2)."""
    got = {}
    for line in out.splitlines():
        p = line.split()
        # level, function, min us, median us, col/ns
        if len(p) == 5:
            try:
                got[p[1]] = float(p[column])
            except ValueError:
                pass
    return got


def alternate(a, only):
    """--alternate: one build after the other on one core; fastest of all rounds."""
    core = sorted(os.sched_getaffinity(0))[0]
    best = {"old": {}, "new": {}}
    for r in range(a.rounds):
        order = (("old", a.old), ("new", a.new)) if r % 2 == 0 else (("new", a.new), ("old", a.old))
        for k, b in order:
            out = subprocess.run(["taskset", "-c", str(core), b] + a.args.split(),
                                 capture_output=True, text=True, check=True).stdout
            for f, t in parse(out, column=2).items():
                if not only or f in only:
                    best[k][f] = min(t, best[k].get(f, t))
    print(f"{a.rounds} rounds, builds one after the other on core {core} (order swapped each round)")
    print(f"{'function':26s} {'old min us':>11s} {'new min us':>11s}  old/new of the fastest")
    for f in best["old"]:
        if f in best["new"]:
            o, n = best["old"][f], best["new"][f]
            print(f"{f:26s} {o:11.1f} {n:11.1f}  {o / n:.3f}")


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("old")
    ap.add_argument("new")
    ap.add_argument("--rounds", type=int, default=6)
    ap.add_argument("--only", default="", help="comma-separated function names")
    ap.add_argument("--args", default="128256",
                    help="the benchmark's arguments, e.g. \"128256 avx2\" (vocabulary, level)")
    ap.add_argument("--alternate", action="store_true",
                    help="one build after the other on one core, fastest of all rounds")
    a = ap.parse_args()
    only = [f for f in a.only.split(",") if f]
    if a.alternate:
        return alternate(a, only)
    if len(os.sched_getaffinity(0)) < 2:
        sys.exit("kernel_ab.py needs two CPUs")
    cores = sorted(os.sched_getaffinity(0))[:2]
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
