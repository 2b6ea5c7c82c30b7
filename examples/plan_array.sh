#!/usr/bin/env bash
# Run one block of a braid plan's replicates: task K of N of a job array.
#
#   examples/plan_array.sh PLAN.toml RESULTS_DIR K N
#
# Submit it as an array of N tasks with the cluster's scheduler, passing
# each task's index (1 to N) as K. When every task has finished:
#
#   braid plan merge RESULTS_DIR/shard-*/plan-shard.json --out RESULTS_DIR/plan
#
# Task K of N runs replicate block K of N with the seeds a single run would
# use, so the merged report is byte for byte the report of one run. The plan
# must fix its sample sizes ([search] grid = [...] or per_cohort in every
# design): bisection needs every replicate at each step and runs on one
# machine. Each task uses the cores in RAYON_NUM_THREADS (1 unless set;
# set it to the cores the scheduler gives the task).
set -euo pipefail

plan="${1:?give the plan file}"
results="${2:?give the results folder}"
k="${3:?give the index K of this task (1 to N)}"
n="${4:?give the number of tasks N}"
export RAYON_NUM_THREADS="${RAYON_NUM_THREADS:-1}"

mkdir -p "$results"
braid plan "$plan" --shard "$k/$n" --quiet --out "$results/shard-$k"
