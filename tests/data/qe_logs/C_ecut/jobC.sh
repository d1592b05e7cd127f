#!/bin/bash
#SBATCH --job-name=si2-ecut-scan
#SBATCH --ntasks=2
# one job, the same relax at two cutoffs (a loop as job arrays/scans do), all into the batch log
echo "Loading modules: openmpi/4.1.4 quantum-espresso/6.7"
date; hostname
export OMP_NUM_THREADS=1
env | grep OMP
for ec in 14 18; do
  echo "=== ecutwfc = $ec"
  sed "s/ecutwfc = [0-9]*/ecutwfc = $ec/" relax.in > relax_ec$ec.in
  nice -n 10 mpirun --allow-run-as-root --oversubscribe -np 2 pw.x -in relax_ec$ec.in
  echo "exit $?"
done
rm -rf ./tmp; date; echo "Job finished"
