#!/bin/bash
#SBATCH --job-name=si2-resubmit
#SBATCH --ntasks=2
#SBATCH --open-mode=append
# a relax cut at its "walltime" (timeout -s TERM), then resubmitted into the same log: the second
# segment restarts pw.x from its own restart files (restart_mode = 'restart')
PW="nice -n 10 mpirun --allow-run-as-root --oversubscribe -np 2 pw.x"
echo "Loading modules: openmpi/4.1.4 quantum-espresso/6.7"
date; hostname
export OMP_NUM_THREADS=1
env | grep OMP
echo "=== segment 1"
timeout -s TERM ${LIMIT:-9} $PW -in relax.in
echo "segment 1 ended with status $? (124 = timed out)"
echo "=== segment 2 (resubmitted)"
date
$PW -in relax_restart.in
echo "segment 2 ended with status $?"
rm -rf ./tmp; date; echo "Job finished"
