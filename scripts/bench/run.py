#!/usr/bin/env python3
"""Throughput benchmark of `klgauge compare` against the torch script a user
would otherwise write (torch_reference.py), on invented logit files.

    python scripts/bench/run.py [--rows 2048] [--rounds 3] [--quick] [--only NAME ...]

For each case it writes the files (make_logits.py), drops them from the
page cache and reads them back (as a later run finds files read from disk,
see as_read_from_disk), reads them again before every round so both tools
find them in the page cache, then runs klgauge (default metrics and
the default --samples 1,4,16) and the torch script alternately, several
rounds, and prints the median (and best) rows/s and GB/s of logits read, the CPU
seconds, klgauge's peak private memory (RssAnon, polled from
/proc/PID/status) and the ratios the speed targets are about: of the
medians, of the best rounds, and the median of the ratios within each
round. klgauge is
timed as a whole process (start to report); the torch script times only its
streaming loop, which favours torch.

The timed runs are not watched: memory is measured in one more run of each
klgauge case before the rounds, whose time is not counted. (Polling
/proc/PID/status every 2 ms from this script took CPU from a run that
uses both cores: klgauge's median time with one candidate was 0.151 s
watched against 0.139 s not, ten runs of each, alternating.)

This is a benchmark, not a test: it asserts nothing. Numbers on a shared
machine are noisy: the load average is printed with them; compare ratios
measured in the same run.
"""
import argparse
import glob
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import threading
import time

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(os.path.dirname(HERE))
SIZE = {"bf16": 2, "f16": 2, "f32": 4}

# Groups of runs on one set of files, run in turn within each round so that
# the ratios compare runs made under the same machine load:
# name, dtype, vocab, candidates in the files, runs (label, candidates used,
# klgauge threads, None for the default or "s0" for --samples 0, tool).
GROUPS = [
    ("bf16-128k", "bf16", 128256, 3, [
        ("klgauge", 1, None, "k"), ("klgauge --threads 1", 1, 1, "k"), ("klgauge --samples 0", 1, "s0", "k"),
        ("klgauge 3 candidates", 3, None, "k"),
        ("torch", 1, None, "t"), ("torch 3 candidates", 3, None, "t")]),
    ("f16-128k", "f16", 128256, 1, [("klgauge", 1, None, "k"), ("torch", 1, None, "t")]),
    ("f32-128k", "f32", 128256, 1, [("klgauge", 1, None, "k"), ("torch", 1, None, "t")]),
    ("bf16-32k", "bf16", 32000, 1, [("klgauge", 1, None, "k"), ("torch", 1, None, "t")]),
]


def run_cmd(cmd, watch=False, env=None):
    """Runs cmd; returns (wall s, user+sys CPU s, peak RssAnon KiB, peak RssFile KiB, stdout).
    The peaks are polled from /proc/PID/status every 2 ms where `watch`, else 0:
    the polling takes CPU from the run (see the module's docstring)."""
    t0 = time.perf_counter()
    p = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env, text=True)
    peak = {"RssAnon": 0, "RssFile": 0}
    stop = threading.Event()

    def poll():
        path = f"/proc/{p.pid}/status"
        while not stop.is_set():
            try:
                with open(path) as f:
                    for line in f:
                        k = line.split(":")[0]
                        if k in peak:
                            peak[k] = max(peak[k], int(line.split()[1]))
            except (OSError, ValueError):
                pass
            stop.wait(0.002)

    th = threading.Thread(target=poll, daemon=True)
    if watch:
        th.start()
    out_chunks = []
    reader = threading.Thread(target=lambda: out_chunks.append(p.stdout.read()), daemon=True)
    reader.start()
    err = p.stderr.read()
    _, status, ru = os.wait4(p.pid, 0)
    p.returncode = os.waitstatus_to_exitcode(status)
    wall = time.perf_counter() - t0
    stop.set()
    if watch:
        th.join()
    reader.join()
    out = out_chunks[0] if out_chunks else ""
    if p.returncode not in (0, 1):
        sys.exit(f"{' '.join(cmd)} failed ({p.returncode}):\n{err}")
    return wall, ru.ru_utime + ru.ru_stime, peak["RssAnon"], peak["RssFile"], out


def warm(paths):
    for p in paths:
        with open(p, "rb") as f:
            while f.read(1 << 24):
                pass


def kib_per_fault(paths):
    """KiB the kernel maps per page fault when the files are touched through
    a map, page by page: how the page cache holds them, which moves a run
    of klgauge by a third or more (see DEVELOPERS.md, "AVX-512 machine, at
    a011e0d"). 2,048 means whole 2 MiB pieces mapped at once, 64 means 4 KiB
    pages (the kernel maps a 64 KiB window around each fault). Returns None
    where the system does not count faults."""
    try:
        import mmap
        import resource
    except ImportError:
        return None
    page = mmap.PAGESIZE
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    total = 0
    for p in paths:
        with open(p, "rb") as f:
            m = mmap.mmap(f.fileno(), 0, prot=mmap.PROT_READ)
            try:
                for i in range(0, len(m), page):
                    m[i]
                total += len(m)
            finally:
                m.close()
    faults = resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before
    return total / max(faults, 1) / 1024


def page_cache_reclaim():
    """A line naming the proactive reclaim of this machine's page cache, or
    None. Some virtual machines run DAMON with a "pageout" scheme that drops
    page cache left untouched for about a minute; files read back after that
    come back in pieces of other sizes, which moves klgauge's runs (see
    kib_per_fault)."""
    root = "/sys/kernel/mm/damon/admin/kdamonds"

    def read(*parts):
        try:
            with open(os.path.join(root, *parts)) as f:
                return f.read().strip()
        except OSError:
            return None

    # kdamonds/K/contexts/C/schemes/S/action
    for action in sorted(glob.glob(os.path.join(root, "*", "contexts", "*", "schemes", "*", "action"))):
        rel = os.path.relpath(action, root)
        k = rel.split(os.sep)[0]
        if read(k, "state") == "on" and read(rel) == "pageout":
            return ("this machine pages out idle memory (DAMON kdamond "
                    f"{k}, action pageout): how the page cache holds the files can differ "
                    "from one run of this script to the next")
    return None


def drop_from_cache(paths):
    """Drops the files from the page cache (written back first, so that
    nothing dirty keeps a page): the next read of them comes from disk."""
    for p in paths:
        fd = os.open(p, os.O_RDONLY)
        try:
            os.fsync(fd)
            os.posix_fadvise(fd, 0, 0, os.POSIX_FADV_DONTNEED)
        finally:
            os.close(fd)


def as_read_from_disk(paths):
    """Drops the just-written files from the page cache and reads them back.

    How the page cache holds a file depends on how it got there: a file
    just written may sit in 4 KiB pages, one read back from disk in large
    pieces (on recent kernels and file systems that support them), and
    klgauge reads rows the way that is cheaper for what it finds (see
    LogitFile::stored_row). Logits worth a release decision are usually
    read back from disk, so the benchmark starts every case from that
    state. (A machine that reclaims idle page cache can change it during
    the rounds; kib_per_fault reports it before and after them.)"""
    drop_from_cache(paths)
    warm(paths)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--klgauge", default=os.path.join(REPO, "target", "release", "klgauge"))
    ap.add_argument("--python", default=sys.executable, help="interpreter with torch and numpy")
    ap.add_argument("--rows", type=int, default=2048)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--only", nargs="*", help="group names to run (default: all)")
    ap.add_argument("--quick", action="store_true", help="only the first group, 512 rows, 2 rounds")
    ap.add_argument("--data", help="where to write the files (default: a temporary directory, removed after)")
    ap.add_argument("--json", help="also write the results here")
    a = ap.parse_args()
    groups = GROUPS
    if a.quick:
        groups, a.rows, a.rounds = GROUPS[:1], 512, 2
    if a.only:
        groups = [g for g in GROUPS if g[0] in a.only]
    if not os.path.exists(a.klgauge):
        sys.exit(f"no binary at {a.klgauge}: run `cargo build --release` first")
    base = a.data or tempfile.mkdtemp(prefix="klgauge-bench-")
    print(f"klgauge {a.klgauge}; torch via {a.python}; {a.rows} rows; {a.rounds} rounds; "
          f"{os.cpu_count()} CPUs; load average at start {os.getloadavg()[0]:.2f}")
    print("klgauge: whole process, default metrics and --samples; torch: its streaming loop only")
    reclaim = page_cache_reclaim()
    if reclaim:
        print(f"note: {reclaim}")
    results = {}
    try:
        for name, dtype, vocab, ncand, runs in groups:
            d = os.path.join(base, name)
            files = subprocess.run([a.python, os.path.join(HERE, "make_logits.py"), d, "--rows", str(a.rows),
                                    "--vocab", str(vocab), "--dtype", dtype, "--candidates", str(ncand)],
                                   check=True, capture_output=True, text=True).stdout.split()
            as_read_from_disk(files)

            def command(nc, threads, tool):
                used = files[:1 + nc]
                if tool == "k":
                    extra = ["--samples", "0"] if threads == "s0" else (["--threads", str(threads)] if threads else [])
                    return [a.klgauge, "compare", *used] + extra
                return [a.python, os.path.join(HERE, "torch_reference.py"), *used]

            # Memory: one watched run of each klgauge case, not timed.
            memory = {}
            warm(files)
            for label, nc, threads, tool in runs:
                if tool == "k":
                    _, _, anon, rfile, _ = run_cmd(command(nc, threads, tool), watch=True)
                    memory[label] = (anon, rfile)
            cache_before = kib_per_fault(files)
            times = {label: [] for label, *_ in runs}
            for _ in range(a.rounds):
                # Read the files again before every round: a virtual machine's
                # host may reclaim page cache between runs, and a run that
                # meets a cold file measures the disk, not the tool.
                warm(files)
                for label, nc, threads, tool in runs:
                    wall, cpu, _, _, out = run_cmd(command(nc, threads, tool))
                    if tool != "k":
                        wall = json.loads(out.strip().splitlines()[-1])["seconds"]
                    times[label].append((wall, cpu))
            cache_after = kib_per_fault(files)
            print(f"\n{name}: {a.rows} rows x {vocab} {dtype}")
            if cache_before is not None and cache_after is not None:
                print(f"  page cache: {cache_before:,.0f} KiB mapped per fault before the rounds, {cache_after:,.0f} after"
                      " (2,048: whole 2 MiB pieces; 64: 4 KiB pages)")
            group = {"page_cache_kib_per_fault": [cache_before, cache_after]}
            for label, nc, threads, tool in runs:
                ts = times[label]
                anon, rfile = memory.get(label, (0, 0))
                sec = statistics.median(t[0] for t in ts)
                gb = a.rows * vocab * SIZE[dtype] * (1 + nc) / 1e9
                best = min(t[0] for t in ts)
                r = {"seconds": sec, "best_seconds": best, "rows_per_s": a.rows / sec,
                     "best_rows_per_s": a.rows / best, "gb_per_s": gb / sec,
                     "cpu_seconds": statistics.median(t[1] for t in ts), "all_seconds": [round(t[0], 3) for t in ts],
                     "peak_rss_anon_mib": anon / 1024, "peak_rss_file_mib": rfile / 1024}
                group[label] = r
                mem = f"  peak RssAnon {r['peak_rss_anon_mib']:6.1f} MiB" if tool == "k" else ""
                print(f"  {label:<22} {r['rows_per_s']:8.0f} rows/s {r['gb_per_s']:6.2f} GB/s  best {r['best_rows_per_s']:8.0f} rows/s"
                      f"  cpu {r['cpu_seconds']:6.2f} s{mem}")
            # Each ratio from the medians and from the best rounds: on a shared
            # machine the best round is the one least disturbed by neighbours.
            pairs = [("klgauge / torch (rows/s)", "torch", "klgauge"),
                     ("klgauge / torch, 3 candidates", "torch 3 candidates", "klgauge 3 candidates"),
                     ("3 candidates / 1 candidate (time)", "klgauge 3 candidates", "klgauge"),
                     ("default --samples / --samples 0 (time)", "klgauge", "klgauge --samples 0"),
                     (f"{os.cpu_count()} threads / 1 thread (speed)", "klgauge --threads 1", "klgauge")]
            # And the median of the ratios within each round: the two runs of
            # a round are seconds apart, so a machine whose speed drifts over
            # minutes moves both alike.
            ratios, best_ratios, round_ratios = {}, {}, {}
            for name_, num, den in pairs:
                if num in group and den in group:
                    ratios[name_] = group[num]["seconds"] / group[den]["seconds"]
                    best_ratios[name_] = group[num]["best_seconds"] / group[den]["best_seconds"]
                    round_ratios[name_] = statistics.median(
                        n[0] / d[0] for n, d in zip(times[num], times[den]))
            if ratios:
                print(f"  {'':<40} median   best  per round")
            for k, v in ratios.items():
                print(f"  {k:<40} {v:6.2f} {best_ratios[k]:6.2f} {round_ratios[k]:10.2f}")
            group["ratios"] = ratios
            group["best_ratios"] = best_ratios
            group["round_ratios"] = round_ratios
            results[name] = group
            if a.data is None:
                # Keep the disk and the page cache small: drop files no later group uses.
                shutil.rmtree(d, ignore_errors=True)
    finally:
        if a.data is None:
            shutil.rmtree(base, ignore_errors=True)
    print(f"\nload average at end {os.getloadavg()[0]:.2f}")
    print("targets: klgauge >= 10x torch at bf16 128k; 3 candidates <= 2x one; 2 threads >= 1.7x one")
    if a.json:
        with open(a.json, "w") as f:
            json.dump(results, f, indent=2)


if __name__ == "__main__":
    sys.exit(main())
