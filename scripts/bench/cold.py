#!/usr/bin/env python3
"""klgauge on logit files the page cache does not hold, against reading
the same files front to back, optionally within a memory limit smaller
than the files (a file larger than memory).

    python scripts/bench/cold.py DIR [--candidates 1] [--rounds 6]
        [--limit-mib 256] [--no-unlimited] [--klgauge BIN] [--old BIN]

DIR holds ref.safetensors and cand1..3.safetensors, as `run.py --data DIR`
leaves them (its bf16-128k group) or `make_logits.py DIR --candidates 3`
writes them. Before every timed run the files are dropped from the page
cache (fsync, then POSIX_FADV_DONTNEED), so each run reads them from the
disk. In each round it runs, in turn: `cat` of the same files to
/dev/null (the speed at which this machine reads them, in one stream,
with the kernel's read-ahead), `klgauge compare` (default metrics and
--samples), and, with --old, another klgauge build. It prints the median
wall seconds, GB/s of logits read, and the median of the per-round ratios
to `cat` (1.0: klgauge reads the files as fast as cat does), and how many
bytes each run read from the disk (more than the files hold: it read some
of them twice), and the median share of its wall time during which the
disk had requests in flight (where sysfs has the device's `stat`): a run
slower than `cat` with the disk busy for less of it leaves the disk idle
somewhere.

With --limit-mib the same rounds run again inside a memory cgroup of that
size (cgroup v2 `memory.max` or v1 `memory.limit_in_bytes`; needs root),
which the page cache of the files counts against: files larger than the
limit stream through it as files larger than RAM stream through a
machine. It prints the cgroup's peak usage where the system records it,
and klgauge's peak private memory (RssAnon) from one more watched run.
Where no cgroup can be made it says so and runs only the unlimited case.

A measuring tool, not a test: it asserts nothing. Disk speed on a shared
virtual machine moves within minutes (cat of the same 1 GB took 0.33 s to
1.2 s here within an hour), hence the per-round ratios.
"""
import argparse
import os
import resource
import statistics
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(os.path.dirname(HERE))
sys.path.insert(0, HERE)
from run import drop_from_cache as drop, run_cmd  # noqa: E402


class Cgroup:
    """A memory cgroup of `limit` bytes that child processes join before
    they start; v2 where the unified hierarchy has the memory controller,
    else v1."""

    def __init__(self, limit):
        self.dir = None
        name = f"klgauge-bench-{os.getpid()}"
        v2 = "/sys/fs/cgroup"
        try:
            with open(os.path.join(v2, "cgroup.controllers")) as f:
                has_memory = "memory" in f.read().split()
        except OSError:
            has_memory = False
        candidates = []
        if has_memory:
            candidates.append((os.path.join(v2, name), "memory.max", "memory.peak"))
        candidates.append((os.path.join(v2, "memory", name), "memory.limit_in_bytes",
                           "memory.max_usage_in_bytes"))
        self.error = None
        for d, limit_file, peak_file in candidates:
            try:
                os.mkdir(d)
            except OSError as e:
                self.error = f"{d}: {e.strerror}"
                continue
            try:
                with open(os.path.join(d, limit_file), "w") as f:
                    f.write(str(limit))
            except OSError as e:
                self.error = f"{os.path.join(d, limit_file)}: {e.strerror}"
                os.rmdir(d)
                continue
            self.dir, self.peak_file = d, peak_file
            return

    def join(self):
        """For preexec_fn: moves the child into the cgroup."""
        with open(os.path.join(self.dir, "cgroup.procs"), "w") as f:
            f.write(str(os.getpid()))

    def peak_and_reset(self):
        """Peak usage in MiB since the last call (None where not recorded)."""
        path = os.path.join(self.dir, self.peak_file)
        try:
            with open(path) as f:
                v = int(f.read().split()[0])
        except (OSError, ValueError, IndexError):
            return None
        try:
            with open(path, "w") as f:
                f.write("0")
        except OSError:
            pass
        return v / 2**20

    def remove(self):
        if self.dir:
            try:
                os.rmdir(self.dir)
            except OSError:
                pass


def disk_busy_ms(files):
    """A function giving the milliseconds the device holding the files has
    spent with requests in flight (field 10 of its `stat` in sysfs,
    `io_ticks`; Documentation/admin-guide/iostats.rst), or None where
    sysfs has no block device for it (tmpfs, overlay)."""
    st = os.stat(files[0]).st_dev
    path = f"/sys/dev/block/{os.major(st)}:{os.minor(st)}/stat"

    def busy():
        with open(path) as f:
            return int(f.read().split()[9])
    try:
        busy()
    except (OSError, ValueError, IndexError):
        return None
    return busy


def timed(cmd, files, cg, busy=None):
    """Wall seconds of one run on files just dropped from the page cache,
    the bytes it read from the disk (the children's block input count,
    `ru_inblock`, which counts 512-byte units on Linux: more than the
    files hold means the run read some of them twice), and the cgroup's
    peak usage in MiB during the run (None without one). The peak is
    reset after the drop: the page cache a previous run left in the
    cgroup stays charged to it until then, and was counted in the next
    run's peak. With `busy` (see `disk_busy_ms`), also the seconds the
    disk was busy during the run."""
    drop(files)
    time.sleep(0.2)
    pre = cg.join if cg else None
    if cg:
        cg.peak_and_reset()
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_inblock
    busy0 = busy() if busy else None
    t0 = time.perf_counter()
    p = subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, preexec_fn=pre)
    wall = time.perf_counter() - t0
    disk = (busy() - busy0) / 1e3 if busy else None
    read = (resource.getrusage(resource.RUSAGE_CHILDREN).ru_inblock - before) * 512
    if p.returncode not in (0, 1):
        sys.exit(f"{' '.join(cmd)} failed ({p.returncode}):\n{p.stderr.decode(errors='replace')}")
    return wall, read, cg.peak_and_reset() if cg else None, disk


def measure(title, cases, files, rounds, cg):
    gb = sum(os.path.getsize(f) for f in files) / 1e9
    times = {name: [] for name, _ in cases}
    reads = {name: [] for name, _ in cases}
    peaks = {name: [] for name, _ in cases}
    disk = {name: [] for name, _ in cases}
    busy = disk_busy_ms(files)
    for _ in range(rounds):
        for name, cmd in cases:
            wall, read, peak, d = timed(cmd, files, cg, busy)
            times[name].append(wall)
            reads[name].append(read)
            peaks[name].append(peak)
            if d is not None:
                disk[name].append(d / wall)
    print(f"\n{title}: {len(files)} files, {gb:.2f} GB, {rounds} rounds, each run on files "
          "dropped from the page cache")
    base = times["cat"]
    for name, _ in cases:
        t = times[name]
        ratio = statistics.median(a / b for a, b in zip(t, base))
        peak = [p for p in peaks[name] if p is not None]
        pk = f"  cgroup peak {max(peak):5.0f} MiB" if peak else ""
        rd = f"  read {min(reads[name]) / 1e9:.2f} to {max(reads[name]) / 1e9:.2f} GB"
        dk = f"  disk busy {100 * statistics.median(disk[name]):3.0f}%" if disk[name] else ""
        print(f"  {name:22s} median {statistics.median(t):6.3f} s  best {min(t):6.3f} s  "
              f"{gb / statistics.median(t):5.2f} GB/s  / cat per round {ratio:5.2f}{rd}{dk}{pk}")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("dir")
    ap.add_argument("--candidates", type=int, default=1)
    ap.add_argument("--rounds", type=int, default=6)
    ap.add_argument("--limit-mib", type=int, default=256)
    ap.add_argument("--no-unlimited", action="store_true", help="skip the run without a memory limit")
    ap.add_argument("--klgauge", default=os.path.join(REPO, "target", "release", "klgauge"))
    ap.add_argument("--old", help="another klgauge build to run beside it")
    a = ap.parse_args()
    files = [os.path.join(a.dir, "ref.safetensors")] + [
        os.path.join(a.dir, f"cand{i}.safetensors") for i in range(1, a.candidates + 1)]
    missing = [f for f in files if not os.path.exists(f)]
    if missing:
        sys.exit(f"missing: {' '.join(missing)} (run.py --data DIR or make_logits.py DIR --candidates 3)")
    cases = [("cat", ["cat"] + files), ("klgauge", [a.klgauge, "compare"] + files)]
    if a.old:
        cases.append(("klgauge (--old)", [a.old, "compare"] + files))
    total = sum(os.path.getsize(f) for f in files)
    print(f"klgauge {a.klgauge}; load average at start {os.getloadavg()[0]:.2f}")

    drop(files)
    _, _, anon, rss_file, _ = run_cmd(cases[1][1], watch=True)
    print(f"klgauge peak RssAnon {anon / 1024:.1f} MiB, peak RssFile {rss_file / 1024:.1f} MiB "
          "(one watched run, no limit)")
    if not a.no_unlimited:
        measure("no memory limit", cases, files, a.rounds, None)
    if a.limit_mib:
        limit = a.limit_mib << 20
        cg = Cgroup(limit)
        if cg.dir is None:
            print(f"\nno memory cgroup could be made ({cg.error}); the limited case is skipped")
        else:
            try:
                note = "smaller than the files" if limit < total else "NOT smaller than the files"
                measure(f"within a {a.limit_mib} MiB memory cgroup ({note})", cases, files, a.rounds, cg)
            finally:
                cg.remove()
    print(f"\nload average at end {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
