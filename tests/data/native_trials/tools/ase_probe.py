import sys, os, warnings
from ase.io import read
from ase.io.formats import filetype
warnings.simplefilter("ignore")
for f in sys.argv[1:]:
    if os.path.isdir(f): continue
    try: ft = filetype(f, guess=False)
    except Exception as e: ft = f"ERR {type(e).__name__}: {str(e)[:60]}"
    try:
        imgs = read(f, index=":")
        a = imgs[-1]
        print(f"{f}\t{ft}\tframes={len(imgs)}\tpbc={a.pbc.tolist()}\tcellvol={a.cell.volume:.3f}\tformula={a.get_chemical_formula()}")
    except Exception as e:
        print(f"{f}\t{ft}\tREAD-ERR {type(e).__name__}: {str(e)[:90]}")
