#!/bin/bash
# Submits N shard tasks as a job array and the merge as a job that starts
# only when every shard succeeded (afterok). Prints the two job ids.
#
#   KLGAUGE_REF=/data/wren7/ref KLGAUGE_CANDS="/data/wren7/int4" \
#   KLGAUGE_OUT=/shared/runs/wren7-int4 KLGAUGE_SHARDS=16 \
#   KLGAUGE_MERGE_ARGS="--max-kl-mean 0.02 --min-top1 0.9" \
#   scripts/cluster/submit-slurm.sh
set -euo pipefail
here=$(cd "$(dirname "$0")" && pwd)
: "${KLGAUGE_SHARDS:?set KLGAUGE_SHARDS}" "${KLGAUGE_OUT:?set KLGAUGE_OUT}"
mkdir -p "$KLGAUGE_OUT/partials"
shards=$(sbatch --parsable --array="0-$((KLGAUGE_SHARDS - 1))" --export=ALL "$here/shard.sbatch")
merge=$(sbatch --parsable --dependency="afterok:${shards%%;*}" --export=ALL "$here/merge.sbatch")
echo "shards: job $shards (array 0-$((KLGAUGE_SHARDS - 1)))"
echo "merge:  job $merge (runs after every shard succeeded)"
