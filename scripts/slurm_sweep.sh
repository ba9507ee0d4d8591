#!/usr/bin/env bash
# A sweep as a Slurm array job: array task I of N shards runs `tiltyard sweep CONFIG --shard I/N`, and a
# last job, started once every task has ended (whether or not all succeeded), writes the comparison.
# The output folder must be one that every node sees (the runs of all shards meet there).
#
#   bash scripts/slurm_sweep.sh configs/toy_sweep.yaml 4    # on the login node: submits 4 shards + compare
#
# Any other scheduler works the same way: start `tiltyard sweep CONFIG --shard I/N` for I = 0..N-1
# anywhere, in any order, then `tiltyard compare SWEEP_FOLDER`. A shard that is started twice (a
# requeued task) skips finished runs, resumes interrupted ones, and leaves alone a run that another
# process is running (the run's lock); a failed run does not stop its shard.
#
# Size the tasks below for your runs; each run uses the task's CPUs as its torch threads.
#SBATCH --job-name=tiltyard-sweep
#SBATCH --cpus-per-task=2
#SBATCH --mem=8G
#SBATCH --time=04:00:00
#SBATCH --output=tiltyard-%A_%a.out
set -euo pipefail
CONFIG=${1:?usage: bash scripts/slurm_sweep.sh CONFIG [SHARDS]}
export HF_HUB_OFFLINE=1 TRANSFORMERS_OFFLINE=1 HF_DATASETS_OFFLINE=1

SHARDS=${2:-4}

# Slurm sets SLURM_ARRAY_TASK_ID in each task of an array job (https://slurm.schedmd.com/job_array.html).
if [ -n "${SLURM_ARRAY_TASK_ID:-}" ]; then          # inside the array: one shard, no comparison yet
  exec tiltyard sweep "$CONFIG" --shard "$SLURM_ARRAY_TASK_ID/$SHARDS" --no-compare
fi

# The sweep folder, from the dry run's first line ("sweep NAME: N runs; sweep folder PATH").
SWEEP_DIR=$(tiltyard sweep "$CONFIG" --dry-run | sed -n 's/^sweep .*; sweep folder //p' | head -n 1)
[ -n "$SWEEP_DIR" ] || { echo "could not find the sweep folder of $CONFIG" >&2; exit 2; }
JOB=$(sbatch --parsable --array="0-$((SHARDS - 1))" "$0" "$CONFIG" "$SHARDS")
sbatch --parsable --dependency="afterany:${JOB%%;*}" --job-name=tiltyard-compare \
  --output="tiltyard-%j-compare.out" --wrap "tiltyard compare '$SWEEP_DIR'"
echo "submitted $SHARDS shards of $CONFIG (job $JOB) and the comparison into $SWEEP_DIR"
