#!/usr/bin/env bash
# Where one spglib call spends its time: builds the installed spglib version's own C library from its
# source distribution with symbols (RelWithDebInfo), puts it into a throw-away venv beside the same
# version's wheel, and samples get_symmetry_dataset on a one-atom fcc cell with `perf`.
# Needs gcc, cmake, perf and PyPI access; writes only under ${WORK:-/tmp/dw-spglib-prof}.
# Usage: bash bench/profile_spglib.sh        (about 2 minutes; result table on stdout)
set -euo pipefail
WORK=${WORK:-/tmp/dw-spglib-prof}
PY=${PYTHON:-python}
VER=$($PY -c "import spglib; print(spglib.__version__)")
mkdir -p "$WORK" && cd "$WORK"
[ -d "spglib-$VER" ] || { $PY -m pip download -q --no-deps --no-binary spglib "spglib==$VER" -d .; tar xzf "spglib-$VER.tar.gz"; }
[ -f "spglib-$VER/b/libsymspg.so.$VER" ] || {
  cmake -S "spglib-$VER" -B "spglib-$VER/b" -DCMAKE_BUILD_TYPE=RelWithDebInfo -DSPGLIB_WITH_TESTS=OFF >/dev/null
  cmake --build "spglib-$VER/b" -j 2 >/dev/null; }
[ -x venv/bin/python ] || { $PY -m venv venv; venv/bin/pip install -q numpy "spglib==$VER"; }
LIB=$(venv/bin/python -c "import spglib, os; print(os.path.join(os.path.dirname(spglib.__file__), 'lib64'))")
for f in "$LIB"/libsymspg.so*; do cp "spglib-$VER/b/libsymspg.so.$VER" "$f"; done
cat > sample.py <<'EOF'
import numpy as np, spglib
fcc = (np.array([[0, 2, 2], [2, 0, 2], [2, 2, 0.0]]), [[0, 0, 0]], [1])   # Å; Fm-3m
for _ in range(200):
    spglib.get_symmetry_dataset(fcc, symprec=1e-3)
EOF
perf record -q --call-graph dwarf -F 2000 -o perf.data venv/bin/python sample.py 2>/dev/null
perf report -i perf.data --children --sort symbol -g none 2>/dev/null \
  | grep -E "get_dataset|det_determine_all|ref_get_exact_structure|ssm_get_exact_positions|set_Wyckoffs_labels|spa_search_spacegroup|prm_get_primitive|cel_is_overlap" \
  | awk '{printf "%8s  %s %s\n", $1, $4, $5}'
