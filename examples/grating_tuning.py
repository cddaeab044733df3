"""Orientation and spatial-frequency tuning from gratings
==========================================================

Subspace reverse correlation of the flashed gratings, F1/F0 from the drifting trials, and the tuning
fits, for every cell.
"""

from pathlib import Path

from map2d.contract import load_session
from map2d.fit.tuning import grating_tuning_columns
from map2d.gratings import analyze_drifting, analyze_flashed

DEMO = Path(__file__).resolve().parent.parent / "data_demo"
session = load_session(DEMO)

flashed = analyze_flashed(session.responses, session.gratings, max_lag_s=0.2, rng=0)
drifting = analyze_drifting(session.responses, session.gratings)
table = grating_tuning_columns(flashed, drifting, cell_ids=session.cell_ids)

# H: the complex first harmonic over phase, per orientation x SF (geometry.py's convention).
print("flashed surface", flashed.harmonic_at_peak.shape, "(cells, orientations, SFs)")
for i, cell in enumerate(table["cell"]):
    if table["grating_responsive"][i]:
        print(f"cell {cell}: orientation {table['pref_orientation_deg'][i]:.0f} deg, "
              f"SF {table['pref_sf_cpd'][i]:.3f} cycles/deg, F1/F0 {table['f1_f0'][i]:.2f} "
              f"({table['grating_class'][i]})")
