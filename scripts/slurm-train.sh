#!/bin/bash
# Slurm batch template for a shardmill job: one MPI rank per core, one BLAS thread per rank.
# Submit with: sbatch scripts/slurm-train.sh path/to/job.toml
#SBATCH --job-name=shardmill
#SBATCH --nodes=2
#SBATCH --ntasks-per-node=32
#SBATCH --cpus-per-task=1
#SBATCH --time=01:00:00
#SBATCH --output=shardmill-%j.out
#SBATCH --signal=TERM@120        # SIGTERM 2 min before the limit: shardmill checkpoints and exits 143

set -euo pipefail
JOB=${1:?usage: sbatch slurm-train.sh job.toml}

# Use the site's MPI: build mpi4py against it (see README, "Running on a cluster"), then
# load the same module here. The MPICH wheel's mpiexec is for single machines.
# module load mpi/openmpi   # site specific
# source /path/to/venv/bin/activate

export OPENBLAS_NUM_THREADS=1 OMP_NUM_THREADS=1 MKL_NUM_THREADS=1
# One compile of the job's kernels before the ranks start, so they all load them from the cache.
export NUMBA_CACHE_DIR=${NUMBA_CACHE_DIR:-$HOME/.cache/shardmill-numba}
python -m shardmill compile "$JOB"

# A rerun of this script after a time limit continues from the last checkpoint (add --resume once one exists).
srun --cpu-bind=cores python -m shardmill train "$JOB" --no-progress
