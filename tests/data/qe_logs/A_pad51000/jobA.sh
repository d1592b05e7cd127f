#!/bin/bash
#SBATCH --job-name=si2-relax
#SBATCH --ntasks=2
#SBATCH --time=00:10:00
# a site-style job script: module banner, date, host, OMP env, (padding: a long listing), pw.x, epilogue
echo "Loading modules: openmpi/4.1.4 quantum-espresso/6.7"
echo "Job started on $(hostname) at $(date)"
date
hostname
export OMP_NUM_THREADS=1
env | grep OMP
if [ "${PAD_BYTES:-0}" -gt 0 ]; then
  echo "== installed software (dpkg -l, first $PAD_BYTES bytes) =="
  for i in 1 2 3; do dpkg -l; done | head -c "$PAD_BYTES"; echo
fi
if [ -n "$CAT_INPUT" ]; then echo "== input =="; cat relax.in; fi
nice -n 10 mpirun --allow-run-as-root --oversubscribe -np 2 pw.x -in relax.in
echo "pw.x exited with status $?"
rm -rf ./tmp
date
echo "Job finished"
