#!/bin/bash
#SBATCH --job-name=si2-chain
#SBATCH --ntasks=2
# one job, three pw.x runs into the batch log: scf, relax, then vc-relax from the relaxed positions
echo "Loading modules: openmpi/4.1.4 quantum-espresso/6.7"
date; hostname
export OMP_NUM_THREADS=1
env | grep OMP
LOG=$(readlink -f /proc/$$/fd/1)     # this job's own log (where pw.x's stdout lands)
PW="nice -n 10 mpirun --allow-run-as-root --oversubscribe -np 2 pw.x"
echo "=== step 1: scf"; $PW -in scf.in; echo "scf exit $?"
echo "=== step 2: relax"; $PW -in relax.in; echo "relax exit $?"
# relaxed positions: the last ATOMIC_POSITIONS block pw.x printed in this log
awk '/ATOMIC_POSITIONS/{n=0; blk=""; on=1; next} on&&n<2{blk=blk $0 "\n"; n++} END{printf "%s", blk}' "$LOG" > relaxed_positions.txt
echo "relaxed positions taken from the log:"; cat relaxed_positions.txt
sed '/^ATOMIC_POSITIONS/,/^K_POINTS/{/^ATOMIC_POSITIONS/!{/^K_POINTS/!d}}' vcrelax.in | sed '/^ATOMIC_POSITIONS/r relaxed_positions.txt' > vcrelax_from_relax.in
echo "=== step 3: vc-relax"; $PW -in vcrelax_from_relax.in; echo "vc-relax exit $?"
rm -rf ./tmp; date; echo "Job finished"
