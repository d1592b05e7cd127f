#!/bin/bash
#SBATCH --job-name=si2-ipi
#SBATCH --ntasks=2
echo "Loading modules: openmpi/4.1.4 quantum-espresso/6.7 python/3.11"
date; hostname
export OMP_NUM_THREADS=1
env | grep OMP
nice -n 10 python relax_ipi.py
echo "python exit $?"
rm -rf ./tmp; date; echo "Job finished"
