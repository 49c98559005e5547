#!/usr/bin/env bash
# A twinring search as a SLURM job array: one array task per shard, then one merge job.
#
#   scripts/batch_array.sh submit CONFIG N [OUTDIR]   submit N shard tasks and a merge job that waits for them
#   scripts/batch_array.sh local  CONFIG N [OUTDIR]   the same, one shard after the other, without SLURM
#
# Each array task runs
#     twinring search CONFIG --shard $SLURM_ARRAY_TASK_ID/N --out OUTDIR/shard-$SLURM_ARRAY_TASK_ID
# and the merge job
#     twinring merge OUTDIR/shard-0 ... OUTDIR/shard-(N-1) --out OUTDIR/merged
# which writes the same candidates.ecsv and peaks.ecsv as one unsplit run.
#
# Faults: every finished chunk is kept in OUTDIR/shard-K/chunks/, so a task that is preempted, requeued
# (--requeue below) or resubmitted by hand continues where it stopped:
#     sbatch --array=3,7 --export=ALL,CONFIG=...,N=...,OUT=... scripts/batch_array.sh task
# reruns shards 3 and 7 only; then submit the merge again (`... scripts/batch_array.sh merge`).
# The merge refuses shards of different configs, missing, duplicate or unfinished shards.
#
# Inside one task the chunks run with the config's compute section; on a node with several cores use e.g.
#     compute: {backend: processes, workers: 8, memory_gb: 16}
# with --cpus-per-task=8 and --mem=16G (the shard's config must not differ in search/prepare/map settings;
# compute settings may differ between shards, except compute.threads, which changes the last bits).
#
# PBS/Torque: the same script works with `qsub -J 0-$((N-1))`, using PBS_ARRAY_INDEX for the task id.
#
#SBATCH --job-name=twinring
#SBATCH --time=04:00:00
#SBATCH --cpus-per-task=1
#SBATCH --mem=4G
#SBATCH --requeue
#SBATCH --output=twinring-%A_%a.log

set -euo pipefail

TWINRING=${TWINRING:-twinring}

shard_dirs() {
    local k
    for ((k = 0; k < N; k++)); do printf '%s\n' "$OUT/shard-$k"; done
}

run_task() {
    local k=${1:-${SLURM_ARRAY_TASK_ID:-${PBS_ARRAY_INDEX:-}}}
    if [[ -z "$k" ]]; then
        echo "batch_array.sh: no array task id (SLURM_ARRAY_TASK_ID or PBS_ARRAY_INDEX)" >&2
        exit 2
    fi
    "$TWINRING" search "$CONFIG" --shard "$k/$N" --out "$OUT/shard-$k"
}

run_merge() {
    mapfile -t dirs < <(shard_dirs)
    "$TWINRING" merge "${dirs[@]}" --out "$OUT/merged"
}

mode=${1:-}
case "$mode" in
    submit | local)
        CONFIG=${2:?usage: batch_array.sh submit|local CONFIG N [OUTDIR]}
        N=${3:?usage: batch_array.sh submit|local CONFIG N [OUTDIR]}
        OUT=${4:-shards}
        CONFIG=$(realpath "$CONFIG")
        mkdir -p "$OUT"
        OUT=$(realpath "$OUT")
        export CONFIG N OUT
        if [[ "$mode" == local ]]; then
            for ((k = 0; k < N; k++)); do run_task "$k"; done
            run_merge
        else
            self=$(realpath "$0")
            jid=$(sbatch --parsable --array="0-$((N - 1))" --export="ALL,CONFIG=$CONFIG,N=$N,OUT=$OUT" "$self" task)
            mid=$(sbatch --parsable --dependency="afterok:${jid%%;*}" --job-name=twinring-merge \
                --export="ALL,CONFIG=$CONFIG,N=$N,OUT=$OUT" "$self" merge)
            echo "submitted shard array ${jid%%;*} (N = $N) and merge job ${mid%%;*}; results in $OUT/merged"
        fi
        ;;
    task)
        : "${CONFIG:?}" "${N:?}" "${OUT:?}"
        run_task
        ;;
    merge)
        : "${CONFIG:?}" "${N:?}" "${OUT:?}"
        run_merge
        ;;
    *)
        sed -n '2,8p' "$0" >&2
        exit 2
        ;;
esac
