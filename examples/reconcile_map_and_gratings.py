"""Do the spatial map and the grating responses agree?
======================================================

For a linear cell the grating response is the Fourier component of the spatial map at the grating's
wave vector. Run the whole analysis, then compare the two views for every cell.
"""

from pathlib import Path

import numpy as np

from map2d.analysis import analyze_session
from map2d.contract import load_session

DEMO = Path(__file__).resolve().parent.parent / "data_demo"
session = load_session(DEMO)
an = analyze_session(session, rng=0)

cells = an.cells
for i, cell in enumerate(cells["cell"]):
    if cells["responsive"][i]:
        print(f"cell {cell}: agreement {cells['agreement'][i]:.2f}, linear {cells['linear'][i]} "
              f"({cells['linear_reason'][i]})")

# The map predicted from the gratings beside the measured map, in the band the gratings covered.
if an.inverse is not None:
    ok = np.isfinite(an.inverse.similarity)
    print(f"median map-vs-gratings similarity: {np.median(an.inverse.similarity[ok]):.2f}")
