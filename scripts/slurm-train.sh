#!/bin/bash
# Slurm batch template for a shardmill job: one MPI rank per core, one BLAS thread per rank.
#   Submit:    sbatch scripts/slurm-train.sh path/to/job.toml [--set section.key=value …] [other train flags]
#   Resubmit:  the same line, unedited. `train --continue` resumes from the workdir's newest checkpoint when there is
#              one and starts the run otherwise, so a first submission, a resubmission and a requeue all work.
# Lines marked "site" are the only ones to adapt.
# Ranks × threads: `shardmill scale job.toml --layouts 1x32,2x16,4x8,8x4,16x2,32x1` on one node of the partition
#   compares the layouts of its cores and prints the Slurm request of the best one (README, "Threads inside a rank"):
#   --ntasks-per-node=P and --cpus-per-task=T here, and `--set run.threads=T` on the sbatch line. Exact mode gives
#   the same bits for every P and T.
# Many variants of a job in the same allocation (README, "Many variants in one allocation"): replace the srun line's
#   `shardmill train "$JOB" --continue --no-progress "$@"` by `shardmill variants "$JOB" plan.toml --group-ranks 2`;
#   resubmitting the same line skips the finished variants and continues the others from their checkpoints.
#SBATCH --job-name=shardmill
#SBATCH --nodes=2                 # site: nodes
#SBATCH --ntasks-per-node=32      # site: one rank per core, or cores / T ranks of T threads each (below)
#SBATCH --cpus-per-task=1         # site: T, the threads of each rank; then add --set run.threads=T when submitting
#SBATCH --time=01:00:00           # site
#SBATCH --output=shardmill-%j.out
#SBATCH --signal=TERM@120         # SIGTERM 2 min before the limit: every rank checkpoints, then exits 143
##SBATCH --requeue                # site, optional: with REQUEUE=yes below, a checkpointed stop goes back in the queue

set -uo pipefail
JOB=${1:?usage: sbatch slurm-train.sh job.toml [--set section.key=value ...]}
shift
REQUEUE=${REQUEUE:-no}            # site, optional: yes requeues this job after a checkpointed stop (exit 143)

# site: with the site's MPI instead of the MPICH that pip installs, load it and build mpi4py against it
# (README, "Running on a cluster"), and use the srun --mpi plugin that MPI needs.
# module load mpi/openmpi
# source /path/to/venv/bin/activate

# at most T threads per rank (run.threads chooses within it; --cpus-per-task gives each rank its T cores)
THREADS=${SLURM_CPUS_PER_TASK:-1}
export OPENBLAS_NUM_THREADS=$THREADS OMP_NUM_THREADS=$THREADS MKL_NUM_THREADS=$THREADS
# One compile of the job's kernels before the ranks start, so they all load them from the cache.
export NUMBA_CACHE_DIR=${NUMBA_CACHE_DIR:-$HOME/.cache/shardmill-numba}
SETS=()
ARGS=("$@")
for ((i = 0; i < ${#ARGS[@]}; i++)); do  # compile takes only the --set assignments of the extra arguments
  case "${ARGS[$i]}" in
    --set) if ((i + 1 < ${#ARGS[@]})); then SETS+=(--set "${ARGS[$((i + 1))]}"); fi; i=$((i + 1)) ;;
    --set=*) SETS+=("${ARGS[$i]}") ;;
  esac
done
shardmill compile "$JOB" "${SETS[@]}" || exit $?

# --mpi=pmi2: the MPICH that pip installs joins one world through PMI-2. Under Slurm's default (MpiDefault=none)
# every task would be a world of its own; shardmill refuses that in one line.
# --cpu-bind=cores needs a task plugin that binds (TaskPlugin=task/affinity or task/cgroup); site: drop it otherwise.
srun --mpi=pmi2 --cpu-bind=cores shardmill train "$JOB" --continue --no-progress "$@"
status=$?
if [ "$status" -eq 143 ]; then
  # Slurm shows the job as FAILED with exit code 143 (128 + SIGTERM): that is a checkpointed stop, not a crash.
  echo "shardmill: stopped by SIGTERM after a checkpoint (exit 143); submitting this script again continues the run"
  if [ "$REQUEUE" = yes ] && [ -n "${SLURM_JOB_ID:-}" ]; then
    scontrol requeue "$SLURM_JOB_ID" && echo "shardmill: job $SLURM_JOB_ID requeued"
  fi
fi
exit "$status"
