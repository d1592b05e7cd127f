#!/bin/bash
#SBATCH --job-name=screen-loop
#SBATCH --ntasks=2
# one job looping over two structures of a screening campaign (a bulk Si2 relax, an invented Al2 cell of the same shape),
# every pw.x run into the batch log
echo "Loading modules: openmpi/4.1.4 quantum-espresso/6.7"
date; hostname
export OMP_NUM_THREADS=1
env | grep OMP
for inp in si2.in al2.in; do
  echo "=== $inp"
  nice -n 10 mpirun --allow-run-as-root --oversubscribe -np 2 pw.x -in $inp
  echo "exit $?"
done
rm -rf ./tmp; date; echo "Job finished"
