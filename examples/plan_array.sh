#!/usr/bin/env bash
# Run a braid plan's replicates as a job array on a Slurm cluster, then merge.
#
#   sbatch --array=1-16 examples/plan_array.sh PLAN.toml RESULTS_DIR
#   # when every task has finished:
#   braid plan merge RESULTS_DIR/shard-*/plan-shard.json --out RESULTS_DIR/plan
#
# Task K of N runs replicate block K of N with the seeds a single run would
# use, so the merged report is byte for byte the report of one run. The plan
# must fix its sample sizes ([search] grid = [...] or per_cohort in every
# design): bisection needs every replicate at each step and runs on one
# machine. Each task uses the cores it is given (RAYON_NUM_THREADS).
#SBATCH --job-name=braid-plan
#SBATCH --cpus-per-task=4
#SBATCH --mem=4G
#SBATCH --time=02:00:00
set -euo pipefail

plan="${1:?give the plan file}"
results="${2:?give the results folder}"
k="${SLURM_ARRAY_TASK_ID:?submit with --array=1-N}"
n="${SLURM_ARRAY_TASK_COUNT:?submit with --array=1-N}"
export RAYON_NUM_THREADS="${SLURM_CPUS_PER_TASK:-1}"

mkdir -p "$results"
braid plan "$plan" --shard "$k/$n" --quiet --out "$results/shard-$k"
