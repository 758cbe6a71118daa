#!/usr/bin/env python3
"""Throughput benchmark of `klgauge compare` against the torch script a user
would otherwise write (torch_reference.py), on invented logit files.

    python scripts/bench/run.py [--rows 2048] [--rounds 3] [--quick] [--only NAME ...]

For each case it writes the files (make_logits.py), reads them once so both
tools find them in the page cache, then runs klgauge (default metrics and
the default --samples 1,4,16) and the torch script alternately, several
rounds, and prints the median rows/s and GB/s of logits read, the CPU
seconds, klgauge's peak private memory (RssAnon, polled from
/proc/PID/status) and the ratios the speed targets are about. klgauge is
timed as a whole process (start to report); the torch script times only its
streaming loop, which favours torch.

This is a benchmark, not a test: it asserts nothing. Numbers on a shared
machine are noisy: the load average is printed with them; compare ratios
measured in the same run.
"""
import argparse
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

# name, dtype, vocab, candidates, klgauge threads (None = default), run torch
CASES = [
    ("bf16-128k", "bf16", 128256, 1, None, True),
    ("bf16-128k-1thread", "bf16", 128256, 1, 1, False),
    ("bf16-128k-3cand", "bf16", 128256, 3, None, True),
    ("f16-128k", "f16", 128256, 1, None, True),
    ("f32-128k", "f32", 128256, 1, None, True),
    ("bf16-32k", "bf16", 32000, 1, None, True),
]


def run_polled(cmd, env=None):
    """Runs cmd; returns (wall s, user+sys CPU s, peak RssAnon KiB, peak RssFile KiB, stdout)."""
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
    th.start()
    out_chunks = []
    reader = threading.Thread(target=lambda: out_chunks.append(p.stdout.read()), daemon=True)
    reader.start()
    err = p.stderr.read()
    _, status, ru = os.wait4(p.pid, 0)
    p.returncode = os.waitstatus_to_exitcode(status)
    wall = time.perf_counter() - t0
    stop.set()
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


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--klgauge", default=os.path.join(REPO, "target", "release", "klgauge"))
    ap.add_argument("--python", default=sys.executable, help="interpreter with torch and numpy")
    ap.add_argument("--rows", type=int, default=2048)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--only", nargs="*", help="case names to run (default: all)")
    ap.add_argument("--quick", action="store_true", help="only the first case, 512 rows, 2 rounds")
    ap.add_argument("--data", help="where to write the files (default: a temporary directory)")
    ap.add_argument("--json", help="also write the results here")
    a = ap.parse_args()
    cases = CASES
    if a.quick:
        cases, a.rows, a.rounds = CASES[:1], 512, 2
    if a.only:
        cases = [c for c in CASES if c[0] in a.only]
    if not os.path.exists(a.klgauge):
        sys.exit(f"no binary at {a.klgauge}: run `cargo build --release` first")
    base = a.data or tempfile.mkdtemp(prefix="klgauge-bench-")
    print(f"klgauge {a.klgauge}; torch via {a.python}; {a.rows} rows; {a.rounds} rounds; "
          f"{os.cpu_count()} CPUs; load average at start {os.getloadavg()[0]:.2f}")
    results = {}
    made = {}
    try:
        last_use = {c[1:4]: i for i, c in enumerate(cases)}
        for i, (name, dtype, vocab, ncand, threads, with_torch) in enumerate(cases):
            key = (dtype, vocab, ncand)
            if key not in made:
                d = os.path.join(base, f"{dtype}-{vocab}-{ncand}")
                out = subprocess.run([a.python, os.path.join(HERE, "make_logits.py"), d, "--rows", str(a.rows),
                                      "--vocab", str(vocab), "--dtype", dtype, "--candidates", str(ncand)],
                                     check=True, capture_output=True, text=True).stdout.split()
                made[key] = out
            files = made[key]
            warm(files)
            gb = a.rows * vocab * SIZE[dtype] * len(files) / 1e9
            kcmd = [a.klgauge, "compare", *files] + (["--threads", str(threads)] if threads else [])
            tcmd = [a.python, os.path.join(HERE, "torch_reference.py"), *files]
            k_runs, t_runs = [], []
            for _ in range(a.rounds):
                wall, cpu, anon, rfile, _ = run_polled(kcmd)
                k_runs.append((wall, cpu, anon, rfile))
                if with_torch:
                    wall_t, cpu_t, anon_t, _, out = run_polled(tcmd)
                    t_runs.append((json.loads(out.strip().splitlines()[-1])["seconds"], cpu_t, anon_t))
            kw = statistics.median(r[0] for r in k_runs)
            r = {
                "rows": a.rows, "vocab": vocab, "dtype": dtype, "candidates": ncand, "threads": threads,
                "klgauge_seconds": kw, "klgauge_rows_per_s": a.rows / kw, "klgauge_gb_per_s": gb / kw,
                "klgauge_cpu_seconds": statistics.median(r[1] for r in k_runs),
                "klgauge_peak_rss_anon_mib": max(r[2] for r in k_runs) / 1024,
                "klgauge_peak_rss_file_mib": max(r[3] for r in k_runs) / 1024,
                "klgauge_all_seconds": [round(r[0], 3) for r in k_runs],
            }
            if t_runs:
                tw = statistics.median(t[0] for t in t_runs)
                r.update({"torch_seconds": tw, "torch_rows_per_s": a.rows / tw, "torch_gb_per_s": gb / tw,
                          "torch_all_seconds": [round(t[0], 3) for t in t_runs], "ratio_vs_torch": tw / kw})
            results[name] = r
            line = (f"{name:<20} klgauge {r['klgauge_rows_per_s']:8.0f} rows/s {r['klgauge_gb_per_s']:6.2f} GB/s "
                    f"cpu {r['klgauge_cpu_seconds']:5.2f} s  RssAnon {r['klgauge_peak_rss_anon_mib']:5.1f} MiB")
            if t_runs:
                line += f" | torch {r['torch_rows_per_s']:7.0f} rows/s {r['torch_gb_per_s']:5.2f} GB/s | x{r['ratio_vs_torch']:.1f}"
            print(line, flush=True)
            if a.data is None and last_use[key] == i:
                # Keep the disk and the page cache small: drop files no later case uses.
                shutil.rmtree(os.path.dirname(files[0]), ignore_errors=True)
    finally:
        if a.data is None:
            shutil.rmtree(base, ignore_errors=True)
    one, three, single = results.get("bf16-128k"), results.get("bf16-128k-3cand"), results.get("bf16-128k-1thread")
    print()
    if one and three:
        print(f"3 candidates cost {three['klgauge_seconds'] / one['klgauge_seconds']:.2f}x one candidate (target <= 2)")
    if one and single:
        print(f"{os.cpu_count()} threads give {single['klgauge_seconds'] / one['klgauge_seconds']:.2f}x one thread (target >= 1.7 on 2 cores)")
    if one and "ratio_vs_torch" in one:
        print(f"bf16 128k: {one['ratio_vs_torch']:.1f}x the torch script's rows/s (target >= 10)")
    print(f"load average at end {os.getloadavg()[0]:.2f}")
    if a.json:
        with open(a.json, "w") as f:
            json.dump(results, f, indent=2)


if __name__ == "__main__":
    sys.exit(main())
