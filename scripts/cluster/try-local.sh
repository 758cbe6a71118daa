#!/bin/bash
# Runs the cluster scripts on this machine, without a scheduler, to check
# them end to end: the Slurm array tasks (SLURM_ARRAY_TASK_ID set by hand),
# the Slurm merge step, then the commands of the Kubernetes manifest
# (JOB_COMPLETION_INDEX set by hand; needs python3 with PyYAML to read them).
# Each merged report must match a single run's positions and mean kl.
#
#   scripts/cluster/try-local.sh target/release/klgauge REF CAND [CAND ...]
set -euo pipefail
here=$(cd "$(dirname "$0")" && pwd)
[[ $# -ge 3 ]] || { echo "usage: $0 KLGAUGE_BIN REF CAND [CAND ...]" >&2; exit 2; }
bin=$(cd "$(dirname "$1")" && pwd)/$(basename "$1")
ref=$2
shift 2
cands="$*"
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
shards=3

"$bin" compare "$ref" $cands --samples 1,4 --json "$work/single.json" > /dev/null

check() { # merged report vs the single run
    python3 - "$1" "$work/single.json" <<'PY'
import json, sys
m, s = (json.load(open(p)) for p in sys.argv[1:3])
for a, b in zip(m["candidates"], s["candidates"]):
    assert a["positions"] == b["positions"], (a["positions"], b["positions"])
    x, y = a["kl"]["mean"], b["kl"]["mean"]
    assert x == y or abs(x - y) <= 1e-12 * abs(y), (x, y)
print("  merged report matches the single run:", sys.argv[1])
PY
}

echo "slurm scripts"
export KLGAUGE_BIN=$bin KLGAUGE_REF=$ref KLGAUGE_CANDS=$cands KLGAUGE_OUT=$work/slurm KLGAUGE_SHARDS=$shards
export KLGAUGE_ARGS="--samples 1,4"
for ((i = 0; i < shards; i++)); do
    SLURM_ARRAY_TASK_ID=$i SLURM_ARRAY_TASK_COUNT=$shards SLURM_CPUS_PER_TASK=1 bash "$here/shard.sbatch" > /dev/null
done
bash "$here/merge.sbatch" > /dev/null
check "$work/slurm/report.json"

if python3 -c 'import yaml' 2> /dev/null; then
    echo "kubernetes manifest commands"
    mkdir -p "$work/bin"
    ln -s "$bin" "$work/bin/klgauge"
    python3 - "$here/klgauge-job.yaml" "$work" <<'PY'
import yaml, sys
docs = list(yaml.safe_load_all(open(sys.argv[1])))
jobs = {d["metadata"]["name"]: d for d in docs if d["kind"] == "Job"}
shard = jobs["klgauge-shards"]["spec"]["template"]["spec"]["containers"][0]["args"][0]
pod = jobs["klgauge-merge"]["spec"]["template"]["spec"]
open(sys.argv[2] + "/shard.sh", "w").write(shard)
open(sys.argv[2] + "/wait.sh", "w").write(pod["initContainers"][0]["args"][0])
open(sys.argv[2] + "/merge.sh", "w").write(pod["containers"][0]["args"][0])
PY
    export PATH=$work/bin:$PATH SHARDS=$shards REF=$ref CANDS=$cands RUN_DIR=$work/k8s THREADS=1
    export COMPARE_ARGS="--samples 1,4" MERGE_ARGS=""
    for ((i = 0; i < shards; i++)); do
        JOB_COMPLETION_INDEX=$i sh "$work/shard.sh" > /dev/null
    done
    sh "$work/wait.sh"
    sh "$work/merge.sh" > /dev/null
    check "$work/k8s/report.json"
else
    echo "kubernetes manifest commands: skipped (no PyYAML)"
fi
