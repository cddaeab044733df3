"""Export maps as a TIFF hyperstack and read them back
======================================================

``maps.tif`` is an ImageJ hyperstack (T = lag, Z = cell, C = ON/OFF/linear), calibrated in degrees
so that calibrated x is azimuth.
"""

from pathlib import Path

import numpy as np

from map2d.contract import load_session
from map2d.export.tiff import read_maps_tiff, write_maps_tiff
from map2d.maps import compute_maps

DEMO = Path(__file__).resolve().parent.parent / "data_demo"
session = load_session(DEMO)
# trace_decay="auto": the demo holds imaging traces; remove the indicator decay as map2d analyze does
maps = compute_maps(session.responses, session.sparse_noise, max_lag_s=0.1, n_shuffles=100, rng=0,
                    trace_decay="auto")

stack = np.stack([maps.on, maps.off, maps.linear], axis=2).transpose(1, 0, 2, 3, 4)  # (T, Z, C, Y, X)
write_maps_tiff("maps.tif", stack.astype(np.float32), maps.grid, maps.lags_s, maps.cell_ids,
                unit_label=maps.unit)

back = read_maps_tiff("maps.tif")
print(back["axes"], back["array"].shape, "unit", back["unit"])
print("first plane:", back["labels"][0])
print("azimuth of column 0:", back["x_deg"][0], "deg")
